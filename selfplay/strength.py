"""Rated matches inside a run: players named by snapshot version, ``latest`` or ``mcts``, games
stored in the run's catalog (:mod:`selfplay.replay.match_results`), and the ladder of Elo
ratings fitted from every stored game (:mod:`selfplay.ratings`).

Player names (the identity a rating belongs to): ``v12@48`` is snapshot 12 searching 48 PUCT
simulations per move with its network; ``mcts@200`` is plain Monte Carlo tree search with random
rollouts and 200 simulations; ``gtp:<engine> [<arguments>]`` is an outside GTP engine. The same
snapshot at another budget is another player. Every rated player searches without root noise and
plays its most visited move; games differ through seeded random openings, each played once with
either colour.
"""

from __future__ import annotations

import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from selfplay.errors import ConfigError, RunDirError, SnapshotError
from selfplay.rundir import RunDir

#: the player kinds of the rated-game tables
KINDS = ("snapshot", "mcts", "gtp")


@dataclass
class RatedPlayer:
    """A match player (:class:`selfplay.evaluation.Player`) with its stored identity."""

    player: Any
    name: str
    kind: str
    snapshot: int | None
    settings: dict[str, Any]

    def entry(self) -> Any:
        from selfplay.replay.match_results import PlayerEntry

        return PlayerEntry(self.name, self.kind, self.snapshot, self.settings)


def snapshot_player_name(version: int, simulations: int) -> str:
    return f"v{version}@{simulations}"


def mcts_player_name(simulations: int) -> str:
    return f"mcts@{simulations}"


class RunPlayers:
    """Builds rated players for one run directory (its game, network and search settings)."""

    def __init__(self, run_path: str | Path | RunDir, threads: int = 1) -> None:
        from selfplay.config import load_config
        from selfplay.games.registry import make_game
        from selfplay.snapshots import SnapshotStore

        self.run = run_path if isinstance(run_path, RunDir) else RunDir.open(run_path)
        if not self.run.config.exists():
            raise RunDirError(f"{self.run.root} has no run.toml, so its game and network are unknown")
        self.config = load_config(self.run.config)
        self.game = make_game(self.config.game.name, **self.config.game.options)
        self.store = SnapshotStore(self.run, source="match")
        if not isinstance(threads, int) or threads < 1:
            raise ConfigError(f"threads={threads!r} must be a positive integer")
        self.threads = threads

    # ---- naming ------------------------------------------------------------------------------
    def resolve(self, spec: str) -> int | str:
        """A player spec as a snapshot version, or ``"mcts"``. ConfigError/SnapshotError naming
        the spec when it is none of: a version (``12`` or ``v12``), ``latest``, ``mcts``."""
        from selfplay.snapshots import _same_options

        text = str(spec).strip().lower()
        if text == "mcts":
            return "mcts"
        if text == "latest":
            latest = self.store.latest()
            if latest is None:
                raise SnapshotError(f"player 'latest': run {self.run.root} has no snapshot yet")
            return latest.version
        digits = text[1:] if text.startswith("v") else text
        if not digits.isdigit():
            raise ConfigError(f"player {spec!r} is not a snapshot version (e.g. 12 or v12), 'latest' or 'mcts'")
        version = int(digits)
        info = self.store.info(version)  # SnapshotError naming the versions present
        if info.game != self.game.name or not _same_options(info.game_options, self.game.options()):
            raise SnapshotError(
                f"snapshot {version} is for {info.game} {info.game_options}, but run {self.run.root} plays "
                f"{self.game.name} {self.game.options()}")
        return version

    def check_same_game(self, versions: list[int]) -> None:
        """SnapshotError naming both when two snapshots are for different games or options."""
        from selfplay.snapshots import _same_options

        infos = [self.store.info(v) for v in versions]
        for a in infos:
            for b in infos:
                if a.game != b.game or not _same_options(a.game_options, b.game_options):
                    raise SnapshotError(
                        f"snapshots {a.version} ({a.game} {a.game_options}) and {b.version} "
                        f"({b.game} {b.game_options}) are for different games; they cannot play each other")

    # ---- players -----------------------------------------------------------------------------
    def player(self, spec: str | int, simulations: int | None = None) -> RatedPlayer:
        """The rated player for a spec (see :meth:`resolve`)."""
        sims = self.config.search.simulations if simulations is None else int(simulations)
        if sims < 1:
            raise ConfigError(f"simulations={sims} must be at least 1")
        target = spec if isinstance(spec, int) else self.resolve(spec)
        if target == "mcts":
            return self.mcts_player(sims)
        return self.snapshot_player(int(target), sims)

    def _search_settings(self, sims: int) -> dict[str, Any]:
        return {"simulations": sims, "c_puct": self.config.search.c_puct, "algorithm": "puct",
                "root_noise": False, "temperature": 0.0}

    def snapshot_player(self, version: int, simulations: int) -> RatedPlayer:
        from selfplay.evaluation import SearchPlayer
        from selfplay.evaluators import NetworkEvaluator
        from selfplay.network import build_network

        net = build_network(self.game, self.config.network)
        self.store.load_into(net, version)
        name = snapshot_player_name(version, simulations)
        player = SearchPlayer(NetworkEvaluator(net, threads=self.threads, game=self.game), simulations, name,
                              c_puct=self.config.search.c_puct)
        return RatedPlayer(player, name, "snapshot", version,
                           {**self._search_settings(simulations), "evaluator": "network"})

    def mcts_player(self, simulations: int) -> RatedPlayer:
        from selfplay.evaluation import SearchPlayer
        from selfplay.evaluators import RandomRolloutEvaluator

        name = mcts_player_name(simulations)
        player = SearchPlayer(RandomRolloutEvaluator(), simulations, name, c_puct=self.config.search.c_puct)
        return RatedPlayer(player, name, "mcts", None, {**self._search_settings(simulations), "evaluator": "random_rollouts"})

    def gtp_player(self, command: str, timeout: float, name: str | None = None) -> tuple[RatedPlayer, Any]:
        """An outside GTP engine as a player; returns it and its client (close it after use)."""
        from selfplay.games.go import GoGame
        from selfplay.gtp.client import GtpClient, GtpError, GtpPlayer

        if not isinstance(self.game, GoGame):
            raise GtpError(f"a GTP engine plays Go; run {self.run.root} plays {self.game.name}")
        client = GtpClient(command, timeout=timeout)
        try:
            gp = GtpPlayer(client, self.game, name=name)
        except BaseException:
            client.kill()
            raise
        return RatedPlayer(gp, gp.name, "gtp", None, gp.settings()), client


def default_opening_moves(game: Any) -> int:
    """Random opening moves per pair of games: 2 on boards up to 7x7-sized action sets, 4 on
    larger ones (enough distinct openings for a few hundred games)."""
    return 2 if game.num_actions <= 50 else 4


def play_rated_match(players: RunPlayers, a: RatedPlayer, b: RatedPlayer, games: int, *, seed: int = 0,
                     opening_moves: int | None = None, origin: str = "match", match_id: str | None = None) -> Any:
    """Play ``games`` games between ``a`` and ``b`` (colours alternating) and store them in the
    run's catalog; returns the :class:`selfplay.evaluation.MatchResult` from ``a``'s view."""
    from selfplay.evaluation import play_match
    from selfplay.replay.match_results import MatchResults, RatedGame

    if a.name == b.name:
        raise ConfigError(f"both players are {a.name}; a player cannot be rated against itself")
    if opening_moves is None:
        opening_moves = default_opening_moves(players.game)
    if not isinstance(opening_moves, int) or opening_moves < 0:
        raise ConfigError(f"opening moves {opening_moves!r} must be a whole number >= 0")
    result = play_match(players.game, a.player, b.player, games, seed=seed, opening_plies=opening_moves)
    match_id = match_id or f"{origin}-{time.strftime('%Y%m%dT%H%M%S')}-{uuid.uuid4().hex[:8]}"
    now = time.time()
    rows = []
    g = players.game
    for o in result.outcomes:
        first, second = (a.name, b.name) if o.player_first else (b.name, a.name)
        rows.append(RatedGame(match_id=match_id, game_index=o.index, first=first, second=second, result=o.result,
                              moves=o.moves, ended_by=o.ended_by,
                              opening=" ".join(g.action_to_text(m) for m in o.opening), origin=origin, played_at=now))
    with MatchResults(players.run.catalog) as table:
        table.add_match([a.entry(), b.entry()], rows)
    return result


# ---- the ladder ------------------------------------------------------------------------------

def choose_anchor(players: dict[str, Any], games_of: dict[str, int]) -> str:
    """The player fixed at Elo 0: snapshot 1 (at the budget with the most games), else the
    lowest snapshot version, else the player with the most games."""
    snaps = [(p.snapshot, -games_of.get(n, 0), n) for n, p in players.items()
             if p.kind == "snapshot" and p.snapshot is not None and games_of.get(n, 0) > 0]
    if snaps:
        return min(snaps)[2]
    ranked = sorted(games_of.items(), key=lambda kv: (-kv[1], kv[0]))
    if not ranked:
        raise ConfigError("no rated games")
    return ranked[0][0]


def ladder(run_path: str | Path | RunDir, prior_draws: float = 1.0) -> dict[str, Any]:
    """Elo of every player with stored games: ``{"anchor": name, "players": [row, ...]}``,
    rows best first, each with ``player``, ``kind``, ``snapshot``, ``simulations``, ``elo``,
    ``elo_low``, ``elo_high`` (95%), ``games``, ``wins``, ``draws``, ``losses``."""
    from selfplay.ratings import fit_ratings, tally
    from selfplay.replay.match_results import MatchResults

    run = run_path if isinstance(run_path, RunDir) else RunDir.open(run_path)
    with MatchResults(run.catalog, readonly=True) as table:
        triples = table.score_triples()
        entries = table.players()
    if not triples:
        return {"anchor": None, "players": [], "games": 0}
    pairs = tally(triples)
    games_of: dict[str, int] = {}
    for p, q, _ in triples:
        games_of[p] = games_of.get(p, 0) + 1
        games_of[q] = games_of.get(q, 0) + 1
    anchor = choose_anchor(entries, games_of)
    ratings = fit_ratings(pairs, anchor=anchor, prior_draws=prior_draws)
    rows = []
    for name, r in ratings.items():
        e = entries.get(name)
        row = r.to_dict()
        row.update(kind=e.kind if e else None, snapshot=e.snapshot if e else None,
                   simulations=(e.settings.get("simulations") if e else None))
        rows.append(row)
    rows.sort(key=lambda r: (r["elo"] is None, -(r["elo"] or 0.0), r["player"]))
    return {"anchor": anchor, "players": rows, "games": len(triples), "prior_draws": prior_draws}


__all__ = ["KINDS", "RatedPlayer", "RunPlayers", "choose_anchor", "default_opening_moves", "ladder",
           "mcts_player_name", "play_rated_match", "snapshot_player_name"]
