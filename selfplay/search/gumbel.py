"""Gumbel root search with sequential halving and the improved-policy target.

Danihelka, Guez, Schrittwieser and Silver (2022), "Policy improvement by planning with Gumbel"
(ICLR 2022):

- Root: sample ``g(a) ~ Gumbel(0, 1)`` for each legal action and keep the top
  ``m = min(gumbel_sampled_moves, legal)`` actions by ``g + logits`` (sampling without
  replacement). Sequential halving spends the budget ``n`` over ``ceil(log2 m)`` phases; in each
  phase every remaining action is visited ``floor(n / (ceil(log2 m) * |remaining|))`` times (at
  least once), then the better half (rounded up) by ``g + logits + sigma(q)`` stays. Simulations
  the schedule leaves over are given to the actions of the last phase, round robin. The move
  played is the survivor: ``argmax g + logits + sigma(q)`` over the last phase's actions.
- ``sigma(q) = (c_visit + max_b N(b)) * c_scale * q`` (paper, Eq. 8) with ``q`` the value in
  [-1, 1] mapped linearly onto [0, 1] (the paper asks for q in [0, 1]; our values are bounded by
  [-1, 1], so the fixed map is used instead of a min-max over the tree).
- Improved policy (policy target): ``softmax(logits + sigma(completedQ))`` over the legal moves,
  where ``completedQ(a)`` is ``q(a)`` for visited actions and, for unvisited ones, the mixed value
  approximation ``v_mix = (v + (sum_b N(b) / sum_{b visited} pi(b)) * sum_{b visited} pi(b) q(b))
  / (1 + sum_b N(b))`` (paper, Appendix D, Eq. 33) with ``v`` the network value of the node.
- Non-root nodes use the paper's deterministic selection (Section 5):
  ``argmax_a pi'(a) - N(a) / (1 + sum_b N(b))`` with ``pi'`` the improved policy of that node.

Functions below work on k rows (nodes) at once; the tree's compiled descent
(:mod:`selfplay.search.kernels`) computes the non-root selection node by node and is tested
against :func:`gumbel_nonroot_select`. :class:`GumbelRoot` is the root search built from them.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from selfplay.search.root import RULE_GUMBEL, RootSearch, RootTarget

if TYPE_CHECKING:
    from selfplay.games.base import Game
    from selfplay.search.config import SearchConfig
    from selfplay.search.tree import BatchedSearch

_LOG_FLOOR = 1e-30


def halving_schedule(budget: int, considered: int) -> list[tuple[int, int]]:
    """Sequential-halving plan: a list of phases ``(number of actions, visits per action)``.

    ``floor(n / (ceil(log2 m) * |remaining|))`` visits per action (at least one) per phase, the
    remaining set halved (rounded up) after each phase; phases stop when the budget is spent.
    Leftover simulations are added to the last phase by :func:`phase_queue`."""
    if budget < 1 or considered < 1:
        raise ValueError("budget and considered actions must be positive")
    phases = max(1, math.ceil(math.log2(considered))) if considered > 1 else 1
    plan: list[tuple[int, int]] = []
    remaining = considered
    used = 0
    for _ in range(phases):
        per = max(1, budget // (phases * remaining))
        per = min(per, (budget - used) // remaining) if budget - used >= remaining else 0
        if per <= 0:
            break
        plan.append((remaining, per))
        used += per * remaining
        if remaining == 1:
            break
        remaining = (remaining + 1) // 2
    return plan


def phase_queue(actions: np.ndarray, visits_per_action: int, extra: int = 0) -> list[int]:
    """Round-robin visit order for one phase: each action ``visits_per_action`` times, then
    ``extra`` more visits continuing the round robin."""
    acts = [int(a) for a in actions]
    queue = acts * visits_per_action
    queue += [acts[i % len(acts)] for i in range(extra)]
    return queue


def sigma(q01: np.ndarray, max_visits: np.ndarray | float, c_visit: float, c_scale: float) -> np.ndarray:
    """``(c_visit + max_b N(b)) * c_scale * q`` for q already in [0, 1] (paper, Eq. 8)."""
    mv = np.asarray(max_visits, dtype=np.float64)
    if mv.ndim == 1:
        mv = mv[:, None]
    return (c_visit + mv) * c_scale * q01


def to_unit(q: np.ndarray) -> np.ndarray:
    """Map a value in [-1, 1] onto [0, 1]."""
    return (q + 1.0) * 0.5


def completed_q(P: np.ndarray, N: np.ndarray, W: np.ndarray, node_value: np.ndarray) -> np.ndarray:
    """Completed Q (k, A), mover's view in [-1, 1]: ``q(a)`` where visited, the mixed value
    approximation ``v_mix`` elsewhere (paper, Appendix D)."""
    visited = N > 0
    q = np.zeros_like(W, dtype=np.float64)
    np.divide(W, N, out=q, where=visited)
    total = N.sum(axis=1)
    p_vis = np.where(visited, P, 0.0).sum(axis=1)
    pq = np.where(visited, P * q, 0.0).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        weighted = np.where(p_vis > 0, pq / np.maximum(p_vis, _LOG_FLOOR), 0.0)
    v_mix = (node_value + total * weighted) / (1.0 + total)
    return np.where(visited, q, v_mix[:, None])


def improved_policy(P: np.ndarray, N: np.ndarray, W: np.ndarray, legal: np.ndarray, node_value: np.ndarray,
                    c_visit: float, c_scale: float) -> np.ndarray:
    """``softmax(logits + sigma(completedQ))`` over legal moves: float64 (k, A), zero where illegal."""
    cq = completed_q(P, N, W, node_value)
    logits = np.log(np.maximum(P, _LOG_FLOOR))
    z = logits + sigma(to_unit(cq), N.max(axis=1), c_visit, c_scale)
    z = np.where(legal, z, -np.inf)
    z -= z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)


def gumbel_nonroot_select(P: np.ndarray, N: np.ndarray, W: np.ndarray, legal: np.ndarray, node_value: np.ndarray,
                          c_visit: float, c_scale: float) -> np.ndarray:
    """Deterministic non-root selection ``argmax pi'(a) - N(a) / (1 + sum_b N(b))`` (paper, Sec. 5)."""
    pi = improved_policy(P, N, W, legal, node_value, c_visit, c_scale)
    score = pi - N / (1.0 + N.sum(axis=1, keepdims=True))
    score = np.where(legal, score, -np.inf)
    return score.argmax(axis=1)


def root_scores(gumbel: np.ndarray, logits: np.ndarray, N: np.ndarray, W: np.ndarray,
                c_visit: float, c_scale: float) -> np.ndarray:
    """``g + logits + sigma(q)`` for every root action (q from visits; unvisited actions count q=0
    in [-1, 1] terms but are never compared with visited ones by sequential halving)."""
    q = np.zeros_like(W, dtype=np.float64)
    np.divide(W, N, out=q, where=N > 0)
    return gumbel + logits + sigma(to_unit(q), float(N.max()), c_visit, c_scale)


def top_m(gumbel: np.ndarray, logits: np.ndarray, legal: np.ndarray, m: int) -> np.ndarray:
    """Indices of the ``m`` legal actions with the largest ``g + logits`` (best first)."""
    score = np.where(legal, gumbel + logits, -np.inf)
    m = min(m, int(legal.sum()))
    order = np.argsort(-score, kind="stable")
    return order[:m]


class GumbelRoot(RootSearch):
    """Gumbel root search: top-m sampling, sequential halving over a queue of forced root
    actions, the halving winner as the move and the improved policy as the target."""

    below_root = RULE_GUMBEL

    def __init__(self, config: SearchConfig, game: Game, slots: int) -> None:
        super().__init__(config, game, slots)
        A = game.num_actions
        self.gumbel = np.zeros((slots, A))
        self.logits = np.zeros((slots, A))
        self.plan: list[list[tuple[int, int]]] = [[] for _ in range(slots)]
        self.phase = np.zeros(slots, dtype=np.int64)
        self.phase_actions: list[np.ndarray] = [np.zeros(0, dtype=np.int64)] * slots
        self.leftover = np.zeros(slots, dtype=np.int64)
        self.chosen = np.full(slots, -1, dtype=np.int64)
        #: simulations given to each phase of the slot's current search (for tests and reports)
        self.phase_visits: list[list[int]] = [[] for _ in range(slots)]
        # root actions still to visit in this phase, in order: queue[s, qpos[s]:qlen[s]]
        self.queue = np.zeros((slots, config.simulations), dtype=np.int64)
        self.qpos = np.zeros(slots, dtype=np.int64)
        self.qlen = np.zeros(slots, dtype=np.int64)

    def start(self, tree: BatchedSearch, slot: int) -> None:
        cfg = self.config
        legal = tree.legal[tree.root[slot]]
        budget = int(tree.budget[slot])
        self.gumbel[slot] = g = tree.rngs[slot].gumbel(size=self.game.num_actions)
        self.logits[slot] = logits = np.log(np.maximum(tree.root_prior[slot].astype(np.float64), 1e-30))
        m = min(cfg.gumbel_sampled_moves, int(legal.sum()), budget)
        considered = top_m(g, logits, legal, m)
        self.plan[slot] = plan = halving_schedule(budget, len(considered))
        self.leftover[slot] = budget - sum(c * p for c, p in plan)
        self.phase[slot] = 0
        self.phase_actions[slot] = considered
        self.chosen[slot] = -1
        self.phase_visits[slot] = []
        self._fill_queue(slot)

    def _fill_queue(self, slot: int) -> None:
        plan = self.plan[slot]
        phase = int(self.phase[slot])
        count, per = plan[phase]
        extra = int(self.leftover[slot]) if phase == len(plan) - 1 else 0
        queue = phase_queue(self.phase_actions[slot][:count], per, extra)
        self.queue[slot, :len(queue)] = queue
        self.qpos[slot] = 0
        self.qlen[slot] = len(queue)
        self.phase_visits[slot].append(len(queue))

    def ready(self, tree: BatchedSearch, slots: np.ndarray) -> np.ndarray:
        return self.qpos[slots] < self.qlen[slots]

    def forced_actions(self, tree: BatchedSearch, slots: np.ndarray) -> np.ndarray:
        actions = self.queue[slots, self.qpos[slots]]
        self.qpos[slots] += 1
        return actions

    def _end_phase(self, tree: BatchedSearch, slot: int) -> bool:
        """Sequential halving: keep the better half of this phase's actions (True: the search
        is complete and ``chosen`` holds the winner)."""
        plan = self.plan[slot]
        phase = int(self.phase[slot])
        count, _ = plan[phase]
        actions = self.phase_actions[slot][:count]
        root = tree.root[slot]
        scores = root_scores(self.gumbel[slot], self.logits[slot], tree.N[root].astype(np.float64),
                             tree.W[root].astype(np.float64), self.config.gumbel_c_visit,
                             self.config.gumbel_c_scale)[actions]
        order = np.argsort(-scores, kind="stable")
        if phase == len(plan) - 1:
            self.chosen[slot] = int(actions[order[0]])
            return True
        self.phase[slot] = phase + 1
        self.phase_actions[slot] = actions[order]
        self._fill_queue(slot)
        return False

    def finished(self, tree: BatchedSearch, slots: np.ndarray) -> list[int]:
        done = []
        for s in slots[self.qpos[slots] >= self.qlen[slots]].tolist():
            while self.qpos[s] >= self.qlen[s]:
                if self._end_phase(tree, s):
                    done.append(s)
                    break
        return done

    def target(self, tree: BatchedSearch, slot: int) -> RootTarget:
        root = tree.root[slot]
        prior = tree.root_prior[slot][None].astype(np.float64)
        visits = tree.N[root][None].astype(np.float64)
        W = tree.W[root][None].astype(np.float64)
        value = np.array([tree.value[root]], dtype=np.float64)
        legal = tree.legal[root]
        pi = improved_policy(prior, visits, W, legal[None], value, self.config.gumbel_c_visit,
                             self.config.gumbel_c_scale)[0]
        acts = np.flatnonzero(pi > 0)
        cq = completed_q(prior, visits, W, value)[0]
        root_value = float(np.sum(pi * np.where(legal, cq, 0.0)))
        return RootTarget(acts, pi[acts].astype(np.float32), root_value, int(self.chosen[slot]))
