"""``selfplay match RUN A [B] --games N``: a rated match between two players of a run.

A and B are snapshot versions (``12`` or ``v12``), ``latest`` or ``mcts`` (search with random
rollouts, no network); ``--opponent-gtp "COMMAND"`` makes an outside GTP v2 engine the opponent
instead of B (Go runs). Colours alternate exactly (each seeded random opening is played once with
either player first), no root noise, the most visited move. The games are stored in the run's
catalog with both players' identities and settings; ``selfplay ladder RUN`` rates them.
Games are played in this process, in lockstep (one batched search step for all games where a
player is to move); they are not spread over Ray workers.
"""

from __future__ import annotations

import argparse
import json
import sys

from selfplay.errors import ConfigError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "match", help="play a rated match between two snapshots, 'latest', 'mcts' or a GTP engine",
        description="Play N games between players A and B of RUN (snapshot versions, 'latest' or 'mcts'), "
        "colours alternating, and store the results in the run's catalog for `selfplay ladder`.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("a", metavar="A", help="first player: a snapshot version (12 or v12), 'latest' or 'mcts'")
    p.add_argument("b", metavar="B", nargs="?", default=None,
                   help="second player (same forms as A); leave out with --opponent-gtp")
    p.add_argument("--games", type=int, required=True, metavar="N",
                   help="games to play: an even number, each opening once with either colour")
    p.add_argument("--simulations", type=int, default=None, metavar="S",
                   help="search simulations per move of both players (default: the run's [search] simulations)")
    p.add_argument("--opponent-simulations", type=int, default=None, metavar="S",
                   help="simulations of B when they differ from A's")
    p.add_argument("--opening-moves", type=int, default=None, metavar="K",
                   help="seeded random moves that open each pair of games (default 2, or 4 on boards "
                   "with more than 50 moves)")
    p.add_argument("--seed", type=int, default=0, help="seed of the openings and tie-breaks (default 0)")
    p.add_argument("--opponent-gtp", default=None, metavar="COMMAND",
                   help="an outside GTP v2 engine as the opponent, e.g. "
                   "\"/usr/games/gnugo --mode gtp --level 0 --chinese-rules --positional-superko\"")
    p.add_argument("--gtp-timeout", type=float, default=60.0, metavar="SECONDS",
                   help="seconds to wait for each reply of the GTP engine (default 60)")
    p.add_argument("--threads", type=int, default=1, help="torch threads (default 1)")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from selfplay.strength import RunPlayers, play_rated_match

    if args.games is None or args.games <= 0:
        raise ConfigError(f"--games {args.games} must be a positive even number")
    if args.games % 2:
        raise ConfigError(f"--games {args.games} must be even, so each player moves first in half the games")
    for flag, value in (("--simulations", args.simulations), ("--opponent-simulations", args.opponent_simulations)):
        if value is not None and value < 1:
            raise ConfigError(f"{flag} {value} must be at least 1")
    if args.opening_moves is not None and args.opening_moves < 0:
        raise ConfigError(f"--opening-moves {args.opening_moves} must be 0 or more")
    if (args.b is None) == (args.opponent_gtp is None):
        raise ConfigError("name the opponent either as B or with --opponent-gtp, not both or neither")
    players = RunPlayers(args.run, threads=args.threads)
    specs = [players.resolve(args.a)] + ([players.resolve(args.b)] if args.b is not None else [])
    versions = [s for s in specs if isinstance(s, int)]
    if len(versions) == 2:
        players.check_same_game(versions)
    a = players.player(specs[0], args.simulations)
    client = None
    try:
        if args.opponent_gtp is not None:
            b, client = players.gtp_player(args.opponent_gtp, timeout=args.gtp_timeout)
        else:
            b = players.player(specs[1], args.opponent_simulations or args.simulations)
        result = play_rated_match(players, a, b, args.games, seed=args.seed, opening_moves=args.opening_moves)
    finally:
        if client is not None:
            client.close()
    summary = result.to_dict()
    summary["ended_by"] = {k: sum(o.ended_by == k for o in result.outcomes) for k in ("rules", "resign", "move_cap")}
    if args.json:
        json.dump(summary, sys.stdout)
        sys.stdout.write("\n")
    else:
        print(f"{a.name} vs {b.name}: {result.wins} wins, {result.draws} draws, {result.losses} losses "
              f"in {result.games} games (score {result.score:.3f}, {result.elo:+.0f} Elo), "
              f"{result.seconds:.1f} s; stored in {players.run.catalog}")
    return 0
