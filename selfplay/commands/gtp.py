"""``selfplay gtp RUN [--snapshot V] [--simulations S]``: a snapshot as a GTP v2 engine.

Reads GTP commands on standard input and answers on standard output (protocol_version, name,
version, known_command, list_commands, quit, boardsize, clear_board, komi, play, genmove, undo,
showboard, final_score), so a GTP board program or tournament tool can play the snapshot. Go runs
only; the rules are the run's (see docs/strength.md and docs/go-rules.md).
"""

from __future__ import annotations

import argparse
import sys

from selfplay.errors import ConfigError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "gtp", help="play a Go run's snapshot as a GTP v2 engine on stdin/stdout",
        description="Serve snapshot V of RUN (default: the newest) as a GTP v2 engine on standard input "
        "and output. Moves are chosen by S simulations of guided search, no root noise.")
    p.add_argument("run", metavar="RUN", help="run directory of a Go run")
    p.add_argument("--snapshot", default="latest", metavar="V",
                   help="snapshot version, 'latest' (default) or 'mcts' (random-rollout search, no network)")
    p.add_argument("--simulations", type=int, default=None, metavar="S",
                   help="simulations per move (default: the run's [search] simulations)")
    p.add_argument("--seed", type=int, default=0, help="seed of tie-breaks between equally visited moves")
    p.add_argument("--threads", type=int, default=1, help="torch threads (default 1)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from selfplay.games.go import GoGame
    from selfplay.games.registry import make_game
    from selfplay.gtp.engine import GtpEngine, search_chooser
    from selfplay.strength import RunPlayers

    if args.simulations is not None and args.simulations < 1:
        raise ConfigError(f"--simulations {args.simulations} must be at least 1")
    players = RunPlayers(args.run, threads=args.threads)
    if not isinstance(players.game, GoGame):
        raise ConfigError(f"GTP speaks Go; run {args.run} plays {players.game.name}")
    rated = players.player(args.snapshot, args.simulations)
    evaluator = rated.player.evaluator
    options = dict(players.game.options())

    def make(komi: float) -> GoGame:
        return make_game("go", **{**options, "komi": komi})  # type: ignore[return-value]

    chooser = search_chooser(evaluator, rated.settings["simulations"], rated.settings["c_puct"], seed=args.seed)
    engine = GtpEngine(make, chooser, komi=players.game.komi, version=f"{_version()} {rated.name}")
    engine.serve(sys.stdin.buffer, sys.stdout.buffer)
    return 0


def _version() -> str:
    from selfplay import __version__

    return __version__
