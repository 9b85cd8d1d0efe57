"""Gumbel root search (Danihelka et al. 2022, "Policy improvement by planning with Gumbel").

A one-move game whose moves end the game with given outcomes gives exactly known Q values, so the
paper's rules can be recomputed here independently: top-m of g + logits, sequential halving with
floor(n / (ceil(log2 m) * |remaining|)) visits per action per phase, the better half kept by
g + logits + sigma(q), sigma(q) = (c_visit + max_b N(b)) * c_scale * q with q in [0, 1], and the
improved policy softmax(logits + sigma(completedQ)) with the mixed value for unvisited actions.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from selfplay.evaluators import LeafBatch
from selfplay.games.base import Game
from selfplay.search import gumbel as gb
from selfplay.search import BatchedSearch, SearchConfig


class OneMoveGame(Game[int]):
    """Player 0 picks one of K actions; action a ends the game with outcome[a] (player 0's view)."""

    name = "onemove"

    def __init__(self, outcomes: list[float]) -> None:
        self.outcomes = list(outcomes)

    num_actions = property(lambda self: len(self.outcomes))
    board_shape = property(lambda self: (1, len(self.outcomes)))
    input_shape = property(lambda self: (1, 1, len(self.outcomes)))
    max_moves = property(lambda self: 1)
    typical_legal_moves = property(lambda self: float(len(self.outcomes)))

    def initial_state(self) -> int:
        return -1

    def to_play(self, state: int) -> int:
        return 0 if state < 0 else 1

    def legal_mask(self, state: int) -> np.ndarray:
        return np.full(self.num_actions, state < 0)

    def play(self, state: int, action: int) -> int:
        return int(action)

    def is_terminal(self, state: int) -> bool:
        return state >= 0

    def outcome(self, state: int) -> float:
        return float(self.outcomes[state])

    def move_count(self, state: int) -> int:
        return 0 if state < 0 else 1

    def zobrist(self, state: int) -> int:
        return state + 2

    def compact(self, state: int) -> np.ndarray:
        out = np.zeros((1, self.num_actions), dtype=np.int8)
        if state >= 0:
            out[0, state] = 1
        return out

    def planes_from_compact(self, boards: np.ndarray, to_play: np.ndarray) -> np.ndarray:
        return boards[:, :1].astype(np.float32)

    def action_to_text(self, action: int) -> str:
        return str(action)

    def text_to_action(self, text: str) -> int:
        return int(text)


class FixedEvaluator:
    """Given priors and a given value for every leaf."""

    def __init__(self, priors: np.ndarray, value: float) -> None:
        self.priors = np.asarray(priors, dtype=np.float32)
        self.value = value

    def check_game(self, game: Any) -> None:
        return None

    def evaluate(self, batch: LeafBatch):
        n = len(batch)
        return np.tile(self.priors, (n, 1)), np.full(n, self.value, dtype=np.float32)


def paper_sequential_halving(g, logits, q, n, m, c_visit, c_scale):
    """Sequential halving written out from the paper, scalar by scalar: returns the chosen
    action, the final visit counts and the visits spent in each phase."""
    K = len(logits)
    considered = sorted(range(K), key=lambda a: -(g[a] + logits[a]))[:m]
    phases = max(1, math.ceil(math.log2(m))) if m > 1 else 1
    N = [0] * K
    remaining = considered
    spent = []
    used = 0
    plan = []
    r = m
    for _ in range(phases):
        per = max(1, n // (phases * r))
        plan.append((r, per))
        used += r * per
        if r == 1:
            break
        r = (r + 1) // 2
    leftover = n - used
    for i, (count, per) in enumerate(plan):
        assert len(remaining) == count
        visits = per * count + (leftover if i == len(plan) - 1 else 0)
        order = [remaining[j % count] for j in range(visits)]
        for a in order:
            N[a] += 1
        spent.append(visits)
        maxn = max(N)

        def score(a):
            return g[a] + logits[a] + (c_visit + maxn) * c_scale * (q[a] + 1) / 2

        remaining = sorted(remaining, key=lambda a: -score(a))
        if i == len(plan) - 1:
            return remaining[0], N, spent
        remaining = remaining[: (count + 1) // 2]
    raise AssertionError("unreachable")


def _run_root(outcomes, priors, value, n, m, seed, c_scale=1.0, leaves=1):
    game = OneMoveGame(outcomes)
    cfg = SearchConfig(algorithm="gumbel", simulations=n, gumbel_sampled_moves=m,
                       gumbel_c_scale=c_scale, leaves_per_game=leaves, reduced_simulations=1)
    bs = BatchedSearch(game, cfg, 1)
    bs.set_root(0, game.initial_state())
    bs.begin(0, n, True, np.random.default_rng(seed))
    ev = FixedEvaluator(priors, value)
    while bs.searching_slots():
        bs.run_round(ev)
    return bs, bs.result(0)


CASES = [
    # outcomes (player 0's view), budget n, considered m
    ([-1.0, 0.0, 1.0, 0.0, -1.0, 1.0, 0.0, -1.0], 50, 8),
    ([-1.0, 0.0, 1.0, 0.0, -1.0, 1.0, 0.0, -1.0, 0.0, 1.0, -1.0, 0.0], 64, 5),
    ([0.0, 1.0, -1.0, 0.0, 0.0, 1.0], 200, 16),
    ([1.0, -1.0, 0.0], 7, 3),
]


@pytest.mark.parametrize("outcomes,n,m", CASES)
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_sequential_halving_matches_the_paper(outcomes, n, m, seed):
    K = len(outcomes)
    rng = np.random.default_rng(100 + seed)
    priors = rng.dirichlet(np.ones(K)).astype(np.float32)
    bs, res = _run_root(outcomes, priors, 0.1, n, m, seed)
    # The search draws its Gumbel sample first from the game's generator; redraw it here.
    g = np.random.default_rng(seed).gumbel(size=K)
    logits = np.log(priors.astype(np.float64))
    m_eff = min(m, K, n)
    chosen, N, spent = paper_sequential_halving(g, logits, outcomes, n, m_eff, 50.0, 1.0)
    assert res.chosen == chosen
    np.testing.assert_array_equal(res.visits, np.array(N, dtype=np.float32))
    assert bs.variant.phase_visits[0] == spent
    assert sum(spent) == n == res.visits.sum()


def test_selection_is_argmax_of_gumbel_plus_logits_plus_sigma():
    # With two candidates left and exact Q values, the move is argmax g + logits + sigma(q).
    outcomes = [1.0, -1.0, 0.0, 0.0]
    priors = np.array([0.1, 0.6, 0.2, 0.1], dtype=np.float32)
    for seed in range(10):
        bs, res = _run_root(outcomes, priors, 0.0, 16, 2, seed)
        g = np.random.default_rng(seed).gumbel(size=4)
        logits = np.log(priors.astype(np.float64))
        cand = np.argsort(-(g + logits), kind="stable")[:2]
        maxn = res.visits.max()
        score = g + logits + (50 + maxn) * 1.0 * (np.array(outcomes) + 1) / 2
        assert res.chosen == int(cand[np.argmax(score[cand])])
        # sigma dominates: with visits this large the exact best candidate wins
        assert outcomes[res.chosen] == max(outcomes[c] for c in cand)


def test_improved_policy_uses_completed_q_with_the_mixed_value():
    outcomes = [1.0, -1.0, 0.0, 0.5, -0.5, 0.0]
    priors = np.array([0.05, 0.4, 0.2, 0.1, 0.15, 0.1], dtype=np.float32)
    v_root = 0.3
    bs, res = _run_root(outcomes, priors, v_root, 12, 2, seed=5)
    N = res.visits.astype(np.float64)
    visited = N > 0
    assert 0 < visited.sum() < len(outcomes)  # some actions unvisited: the mixed value is used
    q = np.where(visited, np.array(outcomes), 0.0)
    p = priors.astype(np.float64)
    # v_mix (paper, Appendix D): (v + sum N / sum_{visited} pi * sum_{visited} pi q) / (1 + sum N)
    v_mix = (v_root + N.sum() / p[visited].sum() * (p[visited] * q[visited]).sum()) / (1 + N.sum())
    completed = np.where(visited, q, v_mix)
    z = np.log(p) + (50 + N.max()) * 1.0 * (completed + 1) / 2
    expected = np.exp(z - z.max())
    expected /= expected.sum()
    got = np.zeros(len(outcomes))
    got[res.policy_actions] = res.policy_weights
    np.testing.assert_allclose(got, expected, rtol=1e-5, atol=1e-7)


def test_schedule_function_spends_the_budget_of_the_formula():
    for n, m in [(200, 16), (50, 8), (64, 5), (32, 16), (16, 16), (100, 1), (7, 3)]:
        plan = gb.halving_schedule(n, m)
        phases = max(1, math.ceil(math.log2(m))) if m > 1 else 1
        r = m
        for count, per in plan:
            assert count == r
            assert per == max(1, n // (phases * r))
            r = (r + 1) // 2
        assert sum(c * p for c, p in plan) <= n


def test_several_leaves_per_round_keep_the_schedule():
    outcomes = [-1.0, 0.0, 1.0, 0.0, -1.0, 1.0, 0.0, -1.0]
    priors = np.full(8, 1 / 8, dtype=np.float32)
    _, one = _run_root(outcomes, priors, 0.0, 48, 8, seed=3, leaves=1)
    _, four = _run_root(outcomes, priors, 0.0, 48, 8, seed=3, leaves=4)
    np.testing.assert_array_equal(one.visits, four.visits)
    assert one.chosen == four.chosen
