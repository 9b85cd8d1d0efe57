"""Matches between two players, and Elo from their score.

Players choose moves for a batch of positions at once (:meth:`Player.choose`), so a match plays
many games in lockstep and a network player makes one forward pass (or one batched search step)
per ply for all games where it is to move.

Players:

- :class:`MinimaxPlayer` — perfect play by exhaustive negamax with memoisation (von Neumann's
  minimax; Knuth & Moore 1975 for the negamax form), a random choice among the optimal moves.
  Feasible for small games such as tic-tac-toe (5,478 positions).
- :class:`PolicyPlayer` — a network's raw policy: the legal move of highest prior (no search).
- :class:`SearchPlayer` — guided search with an evaluator (a snapshot's network, or random
  rollouts for the pure-MCTS baseline), no root noise, temperature 0.
- :class:`RandomPlayer` — a uniformly random legal move.
- :class:`selfplay.gtp.client.GtpPlayer` — an outside engine over GTP v2 (it is told each
  game's moves: ``needs_moves``).

:func:`play_match` returns every game's :class:`GameOutcome` too; a player may resign a game by
choosing :data:`RESIGN`. Rated matches stored in a run and the Elo ladder fitted over all of them
are in :mod:`selfplay.strength` and :mod:`selfplay.ratings`.

Elo (Elo's rating system): a rating difference D gives the expected score
``E = 1 / (1 + 10^(-D / 400))``; conversely a measured score s gives ``D = -400 log10(1/s - 1)``.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, field
from typing import Any, Protocol, Sequence

import numpy as np
import torch

from selfplay.errors import ConfigError
from selfplay.games.base import Game


# ---- Elo -------------------------------------------------------------------------------------

def elo_expected_score(rating_difference: float) -> float:
    """Expected score of a player rated ``rating_difference`` points above its opponent."""
    return 1.0 / (1.0 + 10.0 ** (-rating_difference / 400.0))


def elo_difference(score: float, games: int | None = None) -> float:
    """Rating difference whose expected score is ``score`` (the inverse of
    :func:`elo_expected_score`). A score of 0 or 1 has no finite inverse: with ``games`` given it
    is clamped to half a game from the edge (1/(2n) or 1 - 1/(2n)), otherwise +-inf."""
    if not 0.0 <= score <= 1.0:
        raise ConfigError(f"score {score} must be in [0, 1]")
    if games:
        lo = 0.5 / games
        score = min(max(score, lo), 1.0 - lo)
    if score <= 0.0:
        return -math.inf
    if score >= 1.0:
        return math.inf
    return -400.0 * math.log10(1.0 / score - 1.0) + 0.0  # + 0.0: no "-0.0" at an even score


# ---- players ---------------------------------------------------------------------------------

class Player(Protocol):
    name: str

    def choose(self, game: Game, states: Sequence[Any], rngs: Sequence[np.random.Generator]) -> list[int]:
        """One action for each of ``states`` (all non-terminal)."""


class RandomPlayer:
    """A uniformly random legal move."""

    name = "random"

    def choose(self, game: Game, states: Sequence[Any], rngs: Sequence[np.random.Generator]) -> list[int]:
        out = []
        for s, rng in zip(states, rngs):
            legal = np.flatnonzero(game.legal_mask(s))
            out.append(int(legal[rng.integers(legal.size)]))
        return out


class MinimaxSolver:
    """Exact negamax values of every position reachable from a state, memoised.

    ``value(state)`` is the game-theoretic result from the view of the player to move, in
    {-1, 0, +1}. Positions are keyed by their compact history, side to move and move count,
    so there are no hash collisions. ``prune`` stops at the first winning move (same values,
    fewer positions visited)."""

    def __init__(self, game: Game, max_positions: int = 2_000_000, prune: bool = True) -> None:
        self.game = game
        self.prune = prune
        self.max_positions = max_positions
        self.table: dict[bytes, float] = {}

    def _key(self, state: Any) -> bytes:
        g = self.game
        return g.compact_history(state).tobytes() + bytes([g.to_play(state), g.move_count(state) % 256])

    def value(self, state: Any) -> float:
        key = self._key(state)
        hit = self.table.get(key)
        if hit is not None:
            return hit
        g = self.game
        if g.is_terminal(state):
            v = float(g.value_for_mover(state, g.to_play(state)))
        else:
            if len(self.table) >= self.max_positions:
                raise ConfigError(f"minimax: {g.name} has more than {self.max_positions} positions; too big to solve")
            v = -math.inf
            for a in g.legal_actions(state):
                v = max(v, -self.value(g.play(state, int(a))))
                if v >= 1.0 and self.prune:
                    break  # cannot do better than a win
        self.table[key] = v
        return v

    def optimal_actions(self, state: Any) -> list[int]:
        """Every legal action that keeps the game-theoretic value of ``state``."""
        best = self.value(state)
        g = self.game
        return [int(a) for a in g.legal_actions(state) if -self.value(g.play(state, int(a))) == best]


class MinimaxPlayer:
    """Perfect play: a uniformly random choice among the minimax-optimal moves."""

    name = "minimax"

    def __init__(self, game: Game) -> None:
        self.solver = MinimaxSolver(game)

    def choose(self, game: Game, states: Sequence[Any], rngs: Sequence[np.random.Generator]) -> list[int]:
        out = []
        for s, rng in zip(states, rngs):
            best = self.solver.optimal_actions(s)
            out.append(best[int(rng.integers(len(best)))])
        return out


class PolicyPlayer:
    """The network's raw policy: the legal move with the highest logit (ties: lowest index)."""

    def __init__(self, net: torch.nn.Module, name: str = "policy") -> None:
        self.net = net
        self.name = name

    def choose(self, game: Game, states: Sequence[Any], rngs: Sequence[np.random.Generator]) -> list[int]:
        boards = np.stack([game.compact_history(s) for s in states])
        to_play = np.array([game.to_play(s) for s in states], dtype=np.int8)
        planes = game.planes_from_compact(boards, to_play)
        legal = np.stack([game.legal_mask(s) for s in states])
        self.net.eval()
        with torch.inference_mode():
            logits, _ = self.net(torch.from_numpy(planes))
        logits = logits.numpy().astype(np.float64)
        logits[~legal] = -np.inf
        return [int(a) for a in logits.argmax(axis=1)]


class SearchPlayer:
    """Guided search from each position with ``evaluator``: ``simulations`` PUCT simulations, no
    root noise, temperature 0 (the most visited move; ties at random). With a
    :class:`~selfplay.evaluators.RandomRolloutEvaluator` this is the pure-MCTS baseline."""

    def __init__(self, evaluator: Any, simulations: int, name: str = "search", c_puct: float = 1.5) -> None:
        from selfplay.search.config import SearchConfig

        self.evaluator = evaluator
        self.name = name
        self.config = SearchConfig(simulations=simulations, reduced_simulations=min(32, simulations),
                                   c_puct=c_puct, dirichlet_epsilon=0.0, temperature=0.0,
                                   temperature_moves=0, final_temperature=0.0, full_search_share=1.0,
                                   resign_threshold=None, reuse_tree=False)

    def choose(self, game: Game, states: Sequence[Any], rngs: Sequence[np.random.Generator]) -> list[int]:
        from selfplay.search.puct import choose_by_visits
        from selfplay.search.tree import search_states

        seed = int(rngs[0].integers(2**31)) if rngs else 0
        results = search_states(game, list(states), self.evaluator, self.config, seed=seed, full=True)
        return [choose_by_visits(r.visits, 0.0, rng) for r, rng in zip(results, rngs)]


# ---- matches ---------------------------------------------------------------------------------

@dataclass
class MatchResult:
    """Result of a match from ``player``'s view against ``opponent``."""

    player: str
    opponent: str
    games: int
    wins: int
    draws: int
    losses: int
    wins_as_first: int = 0
    losses_as_first: int = 0
    wins_as_second: int = 0
    losses_as_second: int = 0
    seconds: float = 0.0
    lengths: list[int] = field(default_factory=list)
    outcomes: list["GameOutcome"] = field(default_factory=list)

    @property
    def score(self) -> float:
        """(wins + draws / 2) / games."""
        return (self.wins + 0.5 * self.draws) / self.games if self.games else 0.0

    @property
    def win_rate(self) -> float:
        return self.wins / self.games if self.games else 0.0

    @property
    def elo(self) -> float:
        """Rating difference to the opponent implied by the score (clamped at half a game)."""
        return elo_difference(self.score, self.games)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d.pop("lengths")
        d.pop("outcomes")
        d.update(score=self.score, win_rate=self.win_rate, elo=self.elo)
        return d


def random_openings(game: Game, count: int, plies: int, seed: int) -> list[list[int]]:
    """``count`` distinct-as-possible openings of ``plies`` uniformly random legal moves that do
    not end the game (so a match between deterministic players still plays varied games)."""
    rng = np.random.default_rng(seed)
    out: list[list[int]] = []
    seen: set[tuple[int, ...]] = set()
    tries = 0
    while len(out) < count:
        tries += 1
        s = game.initial_state()
        moves: list[int] = []
        for _ in range(plies):
            legal = game.legal_actions(s)
            a = int(legal[rng.integers(legal.size)])
            s2 = game.play(s, a)
            if game.is_terminal(s2):
                break
            moves.append(a)
            s = s2
        key = tuple(moves)
        if key in seen and tries < 50 * count:
            continue
        seen.add(key)
        out.append(moves)
    return out


#: what a player's ``choose`` returns to resign the game (it loses at once)
RESIGN = -1


@dataclass
class GameOutcome:
    """One finished game of a match: ``index`` in the match, whether ``player`` moved first,
    ``result`` from the first mover's view (+1, 0, -1), moves played (opening included),
    ``ended_by`` ("rules", "resign" or "move_cap") and the move list."""

    index: int
    player_first: bool
    result: int
    moves: int
    ended_by: str
    opening: list[int]
    actions: list[int]


def play_match(game: Game, player: Player, opponent: Player, games: int, *, seed: int = 0,
               opening_plies: int = 0, metrics_log: Any = None) -> MatchResult:
    """Play ``games`` games (an even number: each opening once with ``player`` first and once
    second) in lockstep; return the result from ``player``'s view, with every game's
    :class:`GameOutcome` in ``outcomes``.

    ``opening_plies`` random legal moves start every pair of games (0: from the empty board).
    A player whose ``needs_moves`` attribute is true (an engine behind a protocol that has to be
    told the game so far) gets ``moves=`` (each game's move list) in :meth:`Player.choose`.
    A player may answer :data:`RESIGN` for a game: it loses that game at once. Any other move
    that is not legal raises IllegalMoveError naming the player."""
    from selfplay.errors import IllegalMoveError

    if not isinstance(games, int) or games < 2 or games % 2:
        raise ConfigError(f"a match needs an even number of games >= 2 (each side moves first equally "
                          f"often), got {games}")
    t0 = time.perf_counter()
    openings = random_openings(game, games // 2, opening_plies, seed) if opening_plies else [[] for _ in range(games // 2)]
    states, first, rngs, moves = [], [], [], []
    for i in range(games):
        states.append(game.play_sequence(openings[i // 2]))
        first.append(i % 2 == 0)  # player moves first (is player 0) in even-numbered games
        rngs.append(np.random.default_rng([seed, i]))
        moves.append(list(openings[i // 2]))
    seat_of_player = [0 if f else 1 for f in first]
    resigned: dict[int, int] = {}  # game -> seat that resigned
    active = [i for i in range(games) if not game.is_terminal(states[i])]
    while active:
        movers: dict[int, list[int]] = {0: [], 1: []}  # 0: player to move, 1: opponent to move
        for i in active:
            movers[0 if game.to_play(states[i]) == seat_of_player[i] else 1].append(i)
        for who, idx in movers.items():
            if not idx:
                continue
            chooser = player if who == 0 else opponent
            picked = [states[i] for i in idx]
            if getattr(chooser, "needs_moves", False):
                actions = chooser.choose(game, picked, [rngs[i] for i in idx], moves=[moves[i] for i in idx])
            else:
                actions = chooser.choose(game, picked, [rngs[i] for i in idx])
            for i, a in zip(idx, actions):
                a = int(a)
                if a == RESIGN:
                    resigned[i] = game.to_play(states[i])
                    continue
                if not (0 <= a < game.num_actions and game.legal_mask(states[i])[a]):
                    shown = game.action_to_text(a) if 0 <= a < game.num_actions else str(a)
                    raise IllegalMoveError(f"{chooser.name} chose the illegal move {shown} in game {i} "
                                           f"after {len(moves[i])} moves")
                states[i] = game.play(states[i], a)
                moves[i].append(a)
        active = [i for i in active if i not in resigned and not game.is_terminal(states[i])]
    res = MatchResult(player=player.name, opponent=opponent.name, games=games, wins=0, draws=0, losses=0)
    for i, s in enumerate(states):
        if i in resigned:
            z = -1.0 if resigned[i] == seat_of_player[i] else 1.0
            ended_by = "resign"
        else:
            z = game.value_for_mover(s, seat_of_player[i])
            ended_by = "rules" if not _at_move_cap(game, s) else "move_cap"
        res.lengths.append(len(moves[i]))
        first_view = int(z if first[i] else -z)
        res.outcomes.append(GameOutcome(index=i, player_first=first[i], result=first_view, moves=len(moves[i]),
                                        ended_by=ended_by, opening=list(openings[i // 2]), actions=moves[i]))
        if z > 0:
            res.wins += 1
            res.wins_as_first += first[i]
            res.wins_as_second += not first[i]
        elif z < 0:
            res.losses += 1
            res.losses_as_first += first[i]
            res.losses_as_second += not first[i]
        else:
            res.draws += 1
    res.seconds = time.perf_counter() - t0
    if metrics_log is not None:
        metrics_log.write(opponent=opponent.name, player=player.name, games=res.games, wins=res.wins,
                          draws=res.draws, losses=res.losses, elo=res.elo)
    return res


def _at_move_cap(game: Game, state: Any) -> bool:
    """True when a game ended only because it reached the move cap (Go: not by two passes)."""
    passes = getattr(state, "passes", None)
    return passes is not None and passes < 2 and game.move_count(state) >= game.max_moves
