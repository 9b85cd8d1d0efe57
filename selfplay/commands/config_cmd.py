"""``selfplay config show PRESET`` and ``selfplay config check FILE``.

``show`` prints a preset as a complete config — every field written out, each with its
description and default as a comment — to copy and edit. ``check`` validates a config file and
reports the first bad field with its value and the reason (exit 2), or prints a short summary.
"""

from __future__ import annotations

import argparse
import sys

from selfplay.errors import ConfigError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("config", help="show a preset as a full config, or check a config file",
                       description="Show a preset as a complete, commented TOML config, or check a config file.")
    csub = p.add_subparsers(dest="config_action", metavar="ACTION", required=True)

    show = csub.add_parser("show", help="print a preset with every field and its description",
                           description="Print PRESET as a complete TOML config with every default written out.")
    show.add_argument("preset", nargs="?", help="preset name (omit to list the presets)")
    show.add_argument("--bare", action="store_true", help="leave out the comments")
    show.add_argument("--out", metavar="FILE", help="write to this file instead of the terminal")
    show.add_argument("--overwrite", action="store_true", help="replace FILE if it exists")
    show.set_defaults(func=_show)

    check = csub.add_parser("check", help="validate a TOML config file",
                            description="Validate FILE; report the first bad field, its value and why.")
    check.add_argument("file", help="TOML config file")
    check.set_defaults(func=_check)


def _show(args: argparse.Namespace) -> int:
    from selfplay.config import dump_config, load_preset, preset_names

    if not args.preset:
        print("presets: " + ", ".join(preset_names()))
        return 0
    if args.out:
        from selfplay.overwrite import check_output

        check_output(args.out, args.overwrite)
    config = load_preset(args.preset)
    text = dump_config(
        config,
        comments=not args.bare,
        header=None if args.bare else (
            f"selfplay run config from preset {args.preset!r}; every field is written out.\n"
            "Edit, then run it with:   selfplay run --config FILE --out RUN"
        ),
    )
    if args.out:
        from pathlib import Path

        from selfplay.rundir import atomic_write_bytes

        try:
            atomic_write_bytes(Path(args.out), text.encode("utf-8"))
        except OSError as exc:
            raise ConfigError(f"--out {args.out!r} cannot be written: {exc.strerror or exc}") from None
        print(f"wrote {args.out}", file=sys.stderr)
    else:
        sys.stdout.write(text)
    return 0


def _check(args: argparse.Namespace) -> int:
    from selfplay.config import load_config

    config = load_config(args.file)
    workers = config.run.workers or "one per CPU"
    stops = [f"{k} {v}" for k, v in (("games", config.run.games), ("positions", config.run.positions),
                                      ("minutes", config.run.minutes)) if v]
    print(f"{args.file}: ok — game {config.game.name} {config.game.options}, workers {workers}, "
          f"{config.worker.games_in_parallel} games each, stop at {', '.join(stops) or 'Ctrl-C'}")
    return 0
