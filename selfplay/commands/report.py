"""``selfplay report RUN --out DIR``: PNG plots and an HTML page of a run."""

from __future__ import annotations

import argparse

from selfplay.commands.argtypes import positive_int


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "report", help="write PNG plots and an index.html of a run",
        description="Plot games per hour, results by colour, game length, snapshot lag, losses, "
        "learning rate, sample reuse, replay window fill, value calibration, policy entropy, "
        "resignation false positives and Elo, and write index.html showing them with the run's "
        "status and configuration. A plot with nothing to show says why in the image.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the PNGs and index.html")
    p.add_argument("--overwrite", action="store_true", help="write into DIR even if it is not empty")
    p.add_argument("--last", type=positive_int, default=2000, metavar="N",
                   help="the newest N committed games feed the record-based plots (default 2000)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from selfplay.monitor.report import build_report

    plots = build_report(args.run, args.out, max_games=args.last, overwrite=args.overwrite)
    for p in plots:
        print(f"{p.file:28s} {'ok  ' + p.note if p.has_data else (p.note or 'no data yet')}")
    print(f"page: {args.out.rstrip('/')}/index.html")
    return 0
