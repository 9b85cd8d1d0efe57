"""``selfplay show RUN --game ID --move K --out FILE.png``: one position with prior, visits and Q."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "show", help="draw one position of a recorded game: network prior, visit share and Q",
        description="Draw position K of game ID (K = moves played before it, 0 = the initial "
        "position) as three boards side by side: the network's prior (snapshot that played the "
        "move), the search's visit share (from the record) and Q per move (a fresh search with the "
        "record's settings), with the move played marked.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--game", required=True, metavar="ID", help="game id (`selfplay games RUN` lists them)")
    p.add_argument("--move", required=True, type=int, metavar="K", help="position index, 0 = before the first move")
    p.add_argument("--out", required=True, metavar="FILE.png", help="PNG file to write")
    p.add_argument("--overwrite", action="store_true", help="replace FILE.png if it exists")
    p.add_argument("--simulations", type=int, default=None, metavar="N",
                   help="simulations of the recomputing search (default: the record's own setting)")
    p.set_defaults(func=run)


def check_out_path(out: str) -> None:
    """Refuse an output path that is not a writable ``.png`` file name (ConfigError, one line)."""
    from pathlib import Path

    from selfplay.errors import ConfigError

    path = Path(out)
    if path.suffix.lower() != ".png":
        raise ConfigError(f"--out {out!r}: the picture is a PNG, so the file name must end in .png")
    if path.is_dir():
        raise ConfigError(f"--out {out!r} is a directory; give a file name ending in .png")
    if not path.parent.is_dir():
        raise ConfigError(f"--out {out!r}: the folder {str(path.parent)!r} does not exist")


def run(args: argparse.Namespace) -> int:
    from selfplay.errors import ConfigError
    from selfplay.monitor.show import show_position

    from selfplay.overwrite import check_output

    if args.simulations is not None and args.simulations < 1:
        raise ConfigError(f"--simulations {args.simulations} must be at least 1")
    check_out_path(args.out)
    check_output(args.out, args.overwrite)
    path = show_position(args.run, args.game, args.move, args.out, simulations=args.simulations)
    print(f"wrote {path}")
    return 0
