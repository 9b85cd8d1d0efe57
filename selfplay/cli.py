"""The ``selfplay`` command.

Each subcommand lives in its own module under :mod:`selfplay.commands` and exposes
``register(subparsers)``, which adds its parser and sets ``func(args) -> int``. Other packages
add commands through the ``plyfoundry.commands`` entry-point group (the Ray layer adds ``run``
that way, so this library never imports Ray).
"""

from __future__ import annotations

import argparse
import importlib
import sqlite3
import sys
from importlib.metadata import entry_points
from typing import Sequence

from selfplay import __version__
from selfplay.errors import SelfplayError

#: built-in command modules, in the order ``--help`` lists them
COMMAND_MODULES = (
    "selfplay.commands.config_cmd",
    "selfplay.commands.bench",
    "selfplay.commands.export",
    "selfplay.commands.publish",
    "selfplay.commands.status",
    "selfplay.commands.watch",
    "selfplay.commands.report",
    "selfplay.commands.show",
    "selfplay.commands.sgf",
    "selfplay.commands.games",
    "selfplay.commands.snapshot",
    "selfplay.commands.match",
    "selfplay.commands.ladder",
    "selfplay.commands.gtp",
    "selfplay.commands.verify",
    "selfplay.commands.repair",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="selfplay",
        description="Generate self-play training data (positions, search visit distributions, "
        "outcomes) on CPUs, locally or on a Ray cluster, and hand it to a trainer.",
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for ep in sorted(entry_points(group="plyfoundry.commands"), key=lambda e: e.name):
        ep.load()(sub)
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:  # a command not built yet in this checkout
            if exc.name == name:
                continue
            raise
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except SelfplayError as exc:
        print(f"selfplay {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except sqlite3.DatabaseError as exc:  # a damaged catalog read by code that did not wrap it
        if isinstance(exc, sqlite3.OperationalError):  # locked or full: not damage
            raise
        print(f"selfplay {args.command}: error: a run's catalog.sqlite cannot be read ({exc}); "
              "rebuild it from the shards with `selfplay repair RUN`", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"selfplay {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
