"""``selfplay games RUN [--last N] [--json]``: the committed games of a run, one row each.

The ids it lists are what ``selfplay show RUN --game ID`` and ``selfplay sgf export --game ID``
take. Rows come from the run's catalog, opened read-only, in commit order.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys

from selfplay.commands.argtypes import positive_int


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "games", help="list a run's committed games (ids for show and sgf export)",
        description="List the committed games of RUN in commit order: id, worker, snapshot "
        "versions, length in moves, result (player 0's view), resignation and finish time.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--last", type=positive_int, metavar="N", help="only the newest N games")
    p.add_argument("--json", action="store_true", help="print one JSON object per game, one per line")
    p.set_defaults(func=run)


def _result_text(result: int) -> str:
    return {1: "player 0 won", -1: "player 1 won", 0: "draw"}.get(result, str(result))


def _snapshots(lo: int | None, hi: int | None) -> str:
    if lo is None or hi is None or hi < 0:
        return "-"  # no network played (imported games carry -1)
    return str(lo) if lo == hi else f"{lo}-{hi}"


def run(args: argparse.Namespace) -> int:
    from selfplay.monitor.watch import fmt_time
    from selfplay.replay.catalog import Catalog
    from selfplay.rundir import RunDir

    rd = RunDir.open(args.run)
    if not rd.catalog.exists():
        rows = []
    else:
        cat = Catalog(rd.catalog, readonly=True)
        try:
            rows = cat.game_rows(args.last)
        finally:
            cat.close()
    out = sys.stdout
    if args.json:
        for r in rows:
            out.write(json.dumps(dataclasses.asdict(r)) + "\n")
        return 0
    if not rows:
        print(f"run {args.run} has no committed games yet")
        return 0
    head = ("game id", "worker", "snapshots", "moves", "result", "resigned", "finished at")
    table = [(r.game_id, r.worker, _snapshots(r.snapshot_min, r.snapshot_max), str(r.length),
              _result_text(r.result), "yes" if r.resigned else "no", fmt_time(r.finished_at)) for r in rows]
    widths = [max(len(h), *(len(row[i]) for row in table)) for i, h in enumerate(head)]
    right = {3}
    for row in (head, *table):
        cells = [c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(row, widths))]
        out.write("  ".join(cells).rstrip() + "\n")
    return 0
