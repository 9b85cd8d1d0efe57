"""PUCT selection, root Dirichlet noise and temperature move choice (AlphaGo Zero / AlphaZero).

Selection (Silver et al. 2017, "Mastering the game of Go without human knowledge", Methods,
"Select"): at node s pick ``argmax_a Q(s, a) + U(s, a)`` with

    U(s, a) = c_puct * P(s, a) * sqrt(sum_b N(s, b)) / (1 + N(s, a))

where Q is the mean backed-up value from the view of the player to move at s. We take
``sqrt(max(1, sum_b N))`` so that the first visit of a fresh node follows the prior rather than
the lowest index. Unvisited moves get the first-play-urgency value ``v(s) - unvisited_value_penalty``.

The functions work on a batch of k nodes at once (rows). The tree's compiled descent
(:mod:`selfplay.search.kernels`) computes the same selection node by node; these numpy forms are
the reference it is tested against. :class:`PuctRoot` is the PUCT root search: noise on the root
priors of full searches, the visit counts as policy target, the move chosen by the worker.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numba import njit

from selfplay.search.root import RULE_PUCT, RootSearch, RootTarget

if TYPE_CHECKING:
    from selfplay.search.tree import BatchedSearch


def puct_select(P: np.ndarray, N: np.ndarray, W: np.ndarray, legal: np.ndarray, node_value: np.ndarray,
                c_puct: float, unvisited_value_penalty: float = 0.0) -> np.ndarray:
    """Chosen action per row. P, N, W float32 (k, A); legal bool (k, A); node_value (k,) the
    node's own value estimate from its mover's view. Returns int64 (k,)."""
    total = N.sum(axis=1)
    q = np.empty_like(W)
    q[:] = (node_value - unvisited_value_penalty)[:, None]
    visited = N > 0
    np.divide(W, N, out=q, where=visited)
    scale = c_puct * np.sqrt(np.maximum(total, 1.0))
    score = q + P * (scale[:, None] / (1.0 + N))
    score[~legal] = -np.inf
    return score.argmax(axis=1)


def puct_select_q(P: np.ndarray, N: np.ndarray, Q: np.ndarray, visits: np.ndarray, c_puct: float) -> np.ndarray:
    """The same choice as :func:`puct_select` from precomputed rows: ``Q`` (k, A) holding the
    mean value where visited, the first-play-urgency value where not and -inf where illegal;
    ``visits`` (k,) the nodes' total visit counts. Returns int64 (k,)."""
    scale = c_puct * np.sqrt(np.maximum(visits, 1.0))
    return (Q + P * (scale[:, None] / (1.0 + N))).argmax(axis=1)


#: numpy's ``Generator.dirichlet`` normalises gamma draws when the largest alpha is at least
#: this, and breaks a stick with beta draws below it
_GAMMA_DRAWS_FROM = 0.1


def add_dirichlet_noise(priors: np.ndarray, legal: np.ndarray, epsilon: float, alpha: float,
                        rng: np.random.Generator) -> np.ndarray:
    """Root priors ``(1 - eps) P + eps * eta`` with ``eta ~ Dir(alpha)`` over the legal moves
    (AlphaGo Zero, Methods: "Self-play"). Returns a new float32 (A,) array.

    ``eta`` is the vector numpy's ``Generator.dirichlet`` draws from ``rng``, bit for bit: for
    alpha >= 0.1 its own gamma draws (``standard_gamma``), summed in order and multiplied by the
    sum's reciprocal as numpy does, in a third of the time its argument checks take; below
    that, ``dirichlet`` itself (``tests/test_search_kernels.py`` compares both)."""
    out = priors.astype(np.float32, copy=True)
    k = int(np.count_nonzero(legal))
    if epsilon <= 0 or k == 0:
        return out
    if alpha >= _GAMMA_DRAWS_FROM:
        _mix_noise(out, legal, rng.standard_gamma(alpha, size=k), epsilon, True)
    else:
        _mix_noise(out, legal, rng.dirichlet(np.full(k, alpha)), epsilon, False)
    return out


@njit(cache=True)
def _mix_noise(out, legal, draws, epsilon, from_gammas):
    """``out[legal] = (1 - eps) out[legal] + eps eta`` in numpy's precisions (the float32 row
    scaled in float32, the sum in float64, rounded to float32), ``eta`` = ``draws``, or with
    ``from_gammas`` the gamma draws normalised as ``Generator.dirichlet`` normalises them."""
    scale = 1.0
    if from_gammas:
        total = 0.0
        for i in range(draws.shape[0]):
            total += draws[i]
        scale = 1.0 / total
    keep = np.float32(1.0 - epsilon)
    j = 0
    for a in range(out.shape[0]):
        if legal[a]:
            eta = draws[j] * scale if from_gammas else draws[j]
            out[a] = np.float32(np.float64(keep * out[a]) + epsilon * eta)
            j += 1


def choose_by_visits(visits: np.ndarray, temperature: float, rng: np.random.Generator) -> int:
    """Move from root visit counts: with probability proportional to ``N^(1/T)``; for T = 0 the
    most visited move, ties broken uniformly at random (AlphaGo Zero, Methods: "Play")."""
    visits = np.asarray(visits, dtype=np.float64)
    if visits.sum() <= 0:
        raise ValueError("no root move was visited")
    if temperature <= 1e-3:
        best = np.flatnonzero(visits == visits.max())
        return int(best[rng.integers(best.size)]) if best.size > 1 else int(best[0])
    # what rng.choice(visits.size, p=w) draws: one uniform, the first cumulative share above it
    return int(draw_by_visits(visits, 1.0 / temperature, rng.random()))


@njit(cache=True)
def draw_by_visits(visits: np.ndarray, inverse_temperature: float, u: float) -> int:
    """The move ``Generator.choice(len(visits), p=w / w.sum())`` picks with ``w = visits **
    inverse_temperature`` for the uniform draw ``u`` in [0, 1): its cumulative sums, scaled so the
    last is 1, searched for the first above ``u`` (compiled: numpy's choice spends three times the
    draw checking its arguments; ``tests/test_search_kernels.py`` compares the two draw for draw).
    The counts are divided by the largest first, so that low temperatures cannot overflow."""
    n = visits.shape[0]
    top = 0.0
    for i in range(n):
        top = max(top, np.float64(visits[i]))
    w = np.empty(n, dtype=np.float64)
    total = 0.0
    for i in range(n):
        v = np.float64(visits[i])
        w[i] = (v / top) ** inverse_temperature if v > 0 else 0.0
        total += w[i]
    acc = 0.0
    for i in range(n):
        w[i] = acc = acc + w[i] / total
    last = w[n - 1]
    for i in range(n):
        if w[i] / last > u:
            return i
    return n - 1


class PuctRoot(RootSearch):
    """AlphaZero's root: PUCT at the root as below it, Dirichlet noise on the root priors of full
    searches, policy target = root visit counts, root value = mean of the root's evaluation and
    every value backed up through it; the worker picks the move by temperature."""

    below_root = RULE_PUCT

    def start(self, tree: BatchedSearch, slot: int) -> None:
        cfg = self.config
        if tree.full[slot] and cfg.dirichlet_epsilon > 0:
            root = tree.root[slot]
            tree.P[root] = add_dirichlet_noise(tree.P[root], tree.legal[root], cfg.dirichlet_epsilon,
                                               cfg.alpha_for(self.game), tree.rngs[slot])

    def target(self, tree: BatchedSearch, slot: int) -> RootTarget:
        root = tree.root[slot]
        visits = tree.N[root]
        acts = np.flatnonzero(visits > 0)
        return RootTarget(acts, visits[acts].astype(np.float32), tree.root_value(slot))
