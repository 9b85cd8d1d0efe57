"""``selfplay verify RUN``: check every record of a run and quarantine exactly the damaged ones.

Every shard is read frame by frame (length, CRC32, decoding, the game against run.toml's); a
shard with a damaged frame or a foreign game is replaced by a new shard holding its sound games
(temporary name, fsync, rename) and the original is moved to ``RUN/quarantine/`` with a reason
file. Journals of stopped writers are replayed and sealed, stale temporary files removed, and
shards missing from the catalog indexed — the same recovery a writer runs when it opens, with
the full check.
"""

from __future__ import annotations

import argparse
import json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "verify", help="check every record of a run; quarantine exactly the damaged ones",
        description="Read every shard of RUN frame by frame (CRC32, decoding, game against "
        "run.toml). A shard with damaged frames or another game's records is re-written with "
        "its sound games and the original moved to RUN/quarantine/ with the reason.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")
    p.set_defaults(func=run)


def verify_run(run_path: str) -> dict:
    """Run the full check on ``run_path``; returns what it found (see the keys below)."""
    from selfplay.replay.store import RecordStore
    from selfplay.rundir import RunDir

    run = RunDir.open(run_path)
    with RecordStore(run, writer="verify", verify="full") as store:
        rep = store.recovery
        totals = store.totals()
    return {"run": str(run.root), "games": totals.games, "positions": totals.positions,
            "shards": totals.shards, "shards_quarantined": rep.shards_quarantined,
            "reasons": rep.reasons, "games_salvaged": rep.games_salvaged,
            "games_lost": rep.games_lost, "journals_replayed": rep.journals_replayed,
            "journal_tails_cut": rep.journal_tails_cut, "shards_indexed": rep.shards_indexed,
            "temp_files_removed": rep.temp_files_removed, "clean": rep.clean,
            "notes": rep.lines()}


def run(args: argparse.Namespace) -> int:
    result = verify_run(args.run)
    if args.json:
        print(json.dumps(result, indent=2))
        return 0
    for line in result["notes"]:
        print(line)
    state = "sound" if result["clean"] else "repaired"
    print(f"{state}: {result['games']} games, {result['positions']} positions in "
          f"{result['shards']} shard(s)")
    return 0
