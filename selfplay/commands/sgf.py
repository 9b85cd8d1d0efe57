"""``selfplay sgf export RUN --out DIR [--game ID ...]`` and ``selfplay sgf import FILES... --out RUN``.

Export writes a run's Go games as SGF FF[4] files. Import turns expert Go games into supervised
records (one-hot policy target of the move played, value target from the RE result) stored in
RUN like self-play games, so a learner can start from them (:mod:`selfplay.replay.sgf_records`).
"""

from __future__ import annotations

import argparse
import sys


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("sgf", help="Go games to and from SGF files",
                       description="Export a run's Go games as SGF, or import SGF games as "
                       "supervised training records.")
    ssub = p.add_subparsers(dest="sgf_command", metavar="ACTION", required=True)

    e = ssub.add_parser("export", help="write a run's Go games as SGF files",
                        description="Write each Go game of RUN as DIR/GAME_ID.sgf (ids: "
                        "selfplay games RUN). A game that cannot be written is skipped with a "
                        "warning; imported games keep their recorded result.")
    e.add_argument("run", metavar="RUN", help="run directory")
    e.add_argument("--out", required=True, metavar="DIR", help="output directory (created)")
    e.add_argument("--game", action="append", metavar="ID", dest="game_ids",
                   help="only this game id (repeatable)")
    e.add_argument("--overwrite", action="store_true", help="replace existing .sgf files")
    e.set_defaults(func=run_export)

    i = ssub.add_parser("import", help="store SGF Go games as supervised records",
                        description="Read SGF game records (first game of each file) and store "
                        "them in RUN as records whose policy target is the move played and "
                        "whose value target is the RE result. Games without a result, "
                        "malformed files and illegal moves are skipped with a message.")
    i.add_argument("files", nargs="+", metavar="FILE", help="SGF files")
    i.add_argument("--out", required=True, metavar="RUN", help="run directory (created if missing)")
    i.add_argument("--komi", type=float, help="label every game with this komi (default: the file's KM)")
    i.add_argument("--default-komi", type=float, default=7.5, help="komi for files without KM (7.5)")
    i.add_argument("--history", type=int, default=4, help="Go option history (boards in the input; 4). "
                   "When RUN has a run.toml, its Go options are used instead (komi too, unless --komi)")
    i.add_argument("--max-moves", type=int, help="Go option max_moves (default 2 x points)")
    i.add_argument("--allow-suicide", action="store_true", help="Go option allow_suicide")
    i.add_argument("--no-superko", action="store_true", help="simple ko instead of positional superko")
    i.add_argument("--strict", action="store_true", help="fail on the first bad file instead of skipping it")
    i.set_defaults(func=run_import)


def _run_go_options(run_path: str) -> dict | None:
    """The Go options RUN/run.toml declares (None without a run.toml or for another game)."""
    from pathlib import Path

    from selfplay.errors import RunDirError
    from selfplay.games.registry import make_game
    from selfplay.replay.reader import run_toml_game
    from selfplay.rundir import RunDir

    if not (Path(run_path) / "run.toml").exists():
        return None
    declared = run_toml_game(RunDir(Path(run_path)))
    if declared is None:
        return None
    if declared[0] != "go":
        raise RunDirError(f"run {run_path!r} plays {declared[0]}, not go; SGF games cannot go there")
    return make_game("go", **declared[1]).options()


def run_export(args: argparse.Namespace) -> int:
    from selfplay.replay.sgf_records import export_sgf

    rep = export_sgf(args.run, args.out, game_ids=args.game_ids, overwrite=args.overwrite)
    for gid, reason in rep.skipped:
        print(f"selfplay sgf export: warning: skipped {gid}: {reason}", file=sys.stderr)
    print(f"wrote {len(rep.written)} SGF file(s) to {args.out}"
          + (f"; skipped {len(rep.skipped)} game(s) that could not be written" if rep.skipped else ""))
    return 0


def run_import(args: argparse.Namespace) -> int:
    from selfplay.errors import FormatError
    from selfplay.replay.sgf_records import import_sgf_files
    from selfplay.replay.store import RecordStore

    run_options = _run_go_options(args.out)
    if run_options is not None:
        print(f"selfplay sgf import: labelling games with the run's Go options {run_options}"
              + (f" (komi {args.komi:g})" if args.komi is not None else ""))
    rep = import_sgf_files(args.files, komi=args.komi, default_komi=args.default_komi,
                           history=args.history, max_moves=args.max_moves,
                           allow_suicide=args.allow_suicide, superko=not args.no_superko,
                           run_options=run_options)
    for _, reason in rep.skipped:
        print(f"selfplay sgf import: skipped {reason}", file=sys.stderr)
    if args.strict and rep.skipped:
        raise FormatError(f"{len(rep.skipped)} file(s) could not be imported (--strict); nothing stored")
    if not rep.records:
        raise FormatError(f"none of the {len(args.files)} file(s) gave a game with a result")
    with RecordStore(args.out, writer="sgfimport") as store:
        added, dups = store.add_games(rep.records)
    print(f"imported {len(added)} game(s), {sum(r.num_positions for r in rep.records if r.game_id in set(added))} "
          f"positions into {args.out}; {len(dups)} already there, {len(rep.skipped)} skipped")
    return 0
