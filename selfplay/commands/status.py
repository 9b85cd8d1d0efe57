"""``selfplay status RUN [--json]``: a one-shot summary of a run directory."""

from __future__ import annotations

import argparse
import json
import sys

from selfplay.errors import ConfigError
from selfplay.monitor.rates import WINDOW_SECONDS


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "status", help="print a one-shot summary of a run (games, rates, freshness, workers)",
        description="Summarise a run directory: games and positions, games per hour over the last "
        "window and since the start, per-worker rates and snapshot versions, data lag, buffer, "
        "learner and resignation figures. The JSON keys are documented in docs/metrics.md.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    p.add_argument("--window", type=float, default=WINDOW_SECONDS, metavar="S",
                   help=f"width of the recent-rate window in seconds (default {WINDOW_SECONDS:.0f})")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from selfplay.monitor.summary import compute_summary

    if not args.window > 0:
        raise ConfigError(f"--window {args.window} must be a positive number of seconds")
    summary = compute_summary(args.run, window=args.window)
    if args.json:
        json.dump(summary, sys.stdout, indent=2, sort_keys=False)
        sys.stdout.write("\n")
        return 0
    from rich.console import Console

    from selfplay.monitor.watch import render_summary

    Console().print(render_summary(summary))
    return 0
