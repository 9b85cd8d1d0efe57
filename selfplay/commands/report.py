"""``selfplay report RUN --out DIR``: PNG plots and an HTML page of a run."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "report", help="write PNG plots and an index.html of a run",
        description="Plot games per hour, game length, snapshot lag, losses, value calibration, "
        "policy entropy, resignation false positives and Elo, and write index.html showing them "
        "with the run's configuration. A plot with nothing to show yet says 'no data yet'.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the PNGs and index.html")
    p.add_argument("--overwrite", action="store_true", help="write into DIR even if it is not empty")
    p.add_argument("--last", type=int, default=2000, metavar="N",
                   help="the newest N committed games feed the record-based plots (default 2000)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from selfplay.monitor.report import build_report

    plots = build_report(args.run, args.out, max_games=args.last, overwrite=args.overwrite)
    for p in plots:
        print(f"{p.file:28s} {'ok' if p.has_data else 'no data yet'}{'  ' + p.note if p.note else ''}")
    print(f"page: {args.out.rstrip('/')}/index.html")
    return 0
