"""PUCT search on tic-tac-toe against exact minimax.

Checks: with uniform priors and exact terminal values (value 0 at every non-terminal leaf), a
search of a few thousand simulations picks a minimax-optimal move in the reachable non-terminal
positions; self-play between two such searches is always a draw.

Sources: minimax (von Neumann's game-tree value) is computed here over the whole game; the
count of reachable positions, 5,478 of which 958 are terminal (so 4,520 non-terminal), and the
fact that perfect play draws are well-known results, recalled from memory.
"""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.evaluators import UniformEvaluator
from selfplay.games.mnk import MNKState, tictactoe
from selfplay.search import SearchConfig, search_states
from selfplay.worker import SelfPlayWorker

GAME = tictactoe()
SOLVER = SearchConfig(simulations=2000, c_puct=1.0, dirichlet_epsilon=0.0, temperature=0.0,
                      final_temperature=0.0, temperature_moves=0)


def _key(s: MNKState) -> tuple[bytes, int]:
    return s.cells.tobytes(), s.player


def _reachable() -> dict[tuple[bytes, int], MNKState]:
    seen: dict[tuple[bytes, int], MNKState] = {}
    stack = [GAME.initial_state()]
    while stack:
        s = stack.pop()
        k = _key(s)
        if k in seen:
            continue
        seen[k] = s
        if not GAME.is_terminal(s):
            stack.extend(GAME.play(s, int(a)) for a in GAME.legal_actions(s))
    return seen


_MEMO: dict[tuple[bytes, int], float] = {}


def minimax(s: MNKState) -> float:
    """Exact game value from the view of the player to move."""
    k = _key(s)
    if k not in _MEMO:
        if GAME.is_terminal(s):
            _MEMO[k] = GAME.value_for_mover(s, s.player)
        else:
            _MEMO[k] = max(-minimax(GAME.play(s, int(a))) for a in GAME.legal_actions(s))
    return _MEMO[k]


POSITIONS = _reachable()
NON_TERMINAL = [s for s in POSITIONS.values() if not GAME.is_terminal(s)]


def test_position_counts_match_the_known_values():
    # 5,478 reachable positions, 958 terminal (well known, from memory).
    assert len(POSITIONS) == 5478
    assert len(NON_TERMINAL) == 4520
    # Tic-tac-toe is a draw under perfect play (well known, from memory).
    assert minimax(GAME.initial_state()) == 0


def _wrong_moves(states: list[MNKState]) -> list[str]:
    results = search_states(GAME, states, UniformEvaluator(), SOLVER, seed=7)
    wrong = []
    for s, r in zip(states, results):
        assert r.visits.sum() == SOLVER.simulations
        a = int(np.argmax(r.visits))
        if -minimax(GAME.play(s, a)) != minimax(s):
            wrong.append(f"{GAME.render(s)} to move {s.player}: chose {GAME.action_to_text(a)}")
    return wrong


def test_search_is_minimax_optimal_on_a_sample():
    # Every position with at most two stones (the hardest: deep forced lines) plus a seeded sample.
    early = [s for s in NON_TERMINAL if s.moves <= 2]
    rng = np.random.default_rng(2024)
    later = [s for s in NON_TERMINAL if s.moves > 2]
    sample = early + [later[i] for i in rng.choice(len(later), size=150, replace=False)]
    assert _wrong_moves(sample) == []


@pytest.mark.slow
def test_search_is_minimax_optimal_everywhere():
    assert _wrong_moves(NON_TERMINAL) == []


@pytest.mark.slow
def test_selfplay_between_solver_searches_always_draws():
    worker = SelfPlayWorker(GAME, UniformEvaluator(), SOLVER, games_in_parallel=6, worker_id="draws", seed=3)
    records = worker.play_games(6)
    assert [r.result for r in records] == [0] * 6
    assert all(r.num_positions == 9 for r in records)
