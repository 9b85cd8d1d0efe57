"""``selfplay export RUN --format npz --out FILE [--last N]``: a run's positions as plain arrays.

Arrays and their meaning: :mod:`selfplay.replay.export` (and docs/record-format.md).
"""

from __future__ import annotations

import argparse

from selfplay.commands.argtypes import positive_int
from selfplay.errors import ConfigError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "export", help="write a run's positions as arrays for any trainer",
        description="Write the positions of RUN (planes, policy, policy_weight, value, mask, "
        "action, root_value, snapshot, ...) to one .npz file readable with numpy.load (no "
        "pickle). The arrays are listed in docs/record-format.md.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--format", choices=["npz"], default="npz", help="output format (npz)")
    p.add_argument("--out", required=True, metavar="FILE", help="output file, ending in .npz")
    p.add_argument("--last", type=positive_int, metavar="N", help="only the newest N positions")
    p.add_argument("--compress", action="store_true", help="deflate the arrays inside the .npz")
    p.add_argument("--overwrite", action="store_true", help="replace FILE if it exists")
    p.add_argument("--reduced-policies", action="store_true",
                   help="keep the visit distributions of reduced-search positions in 'policy' "
                   "(default: their rows are zero; 'policy_weight' marks the targets either way)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from selfplay.replay.export import export_npz

    if args.format != "npz":
        raise ConfigError(f"--format {args.format!r} is not supported (npz)")
    s = export_npz(args.run, args.out, last=args.last, compress=args.compress,
                   overwrite=args.overwrite, reduced_policies=args.reduced_policies)
    print(f"wrote {s.positions} positions of {s.games} {s.game} game(s) to {s.path} "
          f"({s.bytes / 1e6:.1f} MB)")
    if s.games_skipped:
        print(f"left out {s.games_skipped} game(s) (damaged frames or another game); run "
              f"`selfplay verify {args.run}` to quarantine them. First: {s.problems[0]}")
    return 0
