"""``selfplay repair RUN``: rebuild a damaged (or lost) catalog from the run's shards.

The shards are the source of truth; the catalog only indexes them. A catalog that SQLite cannot
read is moved aside (``catalog.sqlite.damaged-TIME``, with its ``-wal``/``-shm`` files) and a new
one is built by reading every shard and journal. A sound catalog is left as it is. Refused while
a writer of the run is running.
"""

from __future__ import annotations

import argparse
import os
import sqlite3
import time
from pathlib import Path

from selfplay.errors import RunDirError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "repair", help="rebuild a run's damaged catalog from its shards",
        description="Check RUN/catalog.sqlite; if SQLite cannot read it, move it aside and build "
        "a new one from the shards (and unsealed journals), saying how many games it found.")
    p.add_argument("run", metavar="RUN", help="run directory (no writer may be running)")
    p.set_defaults(func=run)


def catalog_problem(path: Path) -> str | None:
    """None if the catalog at ``path`` reads as sound (SQLite's integrity check), else why not."""
    if not path.exists():
        return "it is missing"
    try:
        con = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)
        try:
            rows = con.execute("PRAGMA integrity_check").fetchall()
            con.execute("SELECT count(*) FROM games").fetchone()
        finally:
            con.close()
    except sqlite3.DatabaseError as exc:
        return str(exc)
    if rows != [("ok",)]:
        return "; ".join(r[0] for r in rows[:3])
    return None


def repair_run(run_path: str) -> dict:
    """Rebuild the catalog of ``run_path`` if it is damaged or missing; returns what was done."""
    from selfplay.replay.store import RecordStore, running_writers
    from selfplay.rundir import RunDir, fsync_dir

    run = RunDir.open(run_path)
    live = running_writers(run)
    if live:
        raise RunDirError(f"run {str(run.root)!r} has running writer(s) {', '.join(live)}; stop the "
                          "run before repairing its catalog")
    problem = catalog_problem(run.catalog)
    moved = None
    if problem is not None and run.catalog.exists():
        stamp = time.strftime("%Y%m%d-%H%M%S")
        moved = run.root / f"catalog.sqlite.damaged-{stamp}"
        for suffix in ("", "-wal", "-shm"):
            src = run.root / f"catalog.sqlite{suffix}"
            if src.exists():
                os.replace(src, run.root / f"{moved.name}{suffix}")
        fsync_dir(run.root)
    with RecordStore(run, writer="repair", verify="size") as store:
        totals = store.totals()
        rep = store.recovery
    return {"run": str(run.root), "problem": problem, "moved_to": str(moved) if moved else None,
            "games": totals.games, "positions": totals.positions, "shards": totals.shards,
            "notes": rep.lines()}


def run(args: argparse.Namespace) -> int:
    result = repair_run(args.run)
    if result["problem"] is None:
        print(f"catalog is sound: {result['games']} games, {result['positions']} positions in "
              f"{result['shards']} shard(s); nothing to rebuild")
        return 0
    where = f"; the damaged file is kept as {result['moved_to']}" if result["moved_to"] else ""
    print(f"catalog {result['problem']}: rebuilt it from the shards — found {result['games']} games, "
          f"{result['positions']} positions in {result['shards']} shard(s){where}")
    return 0
