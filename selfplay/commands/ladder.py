"""``selfplay ladder RUN [--json]``: Elo of every player with rated games in the run.

Ratings are the Bradley–Terry maximum-likelihood fit of every stored game (draws count half),
snapshot 1 anchored at 0, with 95% intervals (see docs/strength.md).
"""

from __future__ import annotations

import argparse
import json
import sys

from selfplay.errors import ConfigError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "ladder", help="print the Elo ladder of a run's rated players, with 95%% intervals",
        description="Fit Elo ratings (Bradley–Terry maximum likelihood, draws count half) to every rated game "
        "stored in RUN (by `selfplay match` and the run's evaluation), snapshot 1 at 0.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--json", action="store_true",
                   help="print one JSON object: anchor, games and the rows (player, elo, elo_low, elo_high, games, ...)")
    p.add_argument("--prior-draws", type=float, default=1.0, metavar="D",
                   help="virtual drawn games added to each pair that met, so a clean sweep stays finite "
                   "(default 1; 0 = plain maximum likelihood)")
    p.set_defaults(func=run)


def _fmt(x: float | None) -> str:
    return "-" if x is None else f"{x:+.0f}"


def run(args: argparse.Namespace) -> int:
    from selfplay.strength import ladder

    if not args.prior_draws >= 0:
        raise ConfigError(f"--prior-draws {args.prior_draws} must be 0 or more")
    table = ladder(args.run, prior_draws=args.prior_draws)
    if args.json:
        json.dump(table, sys.stdout, indent=1)
        sys.stdout.write("\n")
        return 0
    if not table["players"]:
        print(f"no rated games in {args.run} yet (play some with `selfplay match`)")
        return 0
    rows = table["players"]
    width = max(len("player"), *(len(r["player"]) for r in rows))
    print(f"{'player':<{width}}  {'elo':>6}  {'95% interval':>15}  {'games':>5}  {'W-D-L':>11}")
    for r in rows:
        interval = "-" if r["elo"] is None else f"[{_fmt(r['elo_low'])}, {_fmt(r['elo_high'])}]"
        wdl = f"{r['wins']}-{r['draws']}-{r['losses']}"
        print(f"{r['player']:<{width}}  {_fmt(r['elo']):>6}  {interval:>15}  {r['games']:>5}  {wdl:>11}")
    print(f"{table['games']} games; {table['anchor']} is anchored at 0; "
          f"{args.prior_draws:g} virtual draw(s) per pair that met")
    return 0
