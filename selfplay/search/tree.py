"""Search trees of many games at once, stored as flat numpy arrays, searched in lock-step rounds.

Layout. A :class:`BatchedSearch` serves ``slots`` games. Each slot owns a region of
``capacity`` node rows in shared arrays; node ``i`` has, over all ``A`` actions (illegal ones
masked):

- ``P[i]`` priors, ``N[i]`` edge visit counts, ``W[i]`` summed backed-up values of each edge from
  the view of the player to move at node ``i``, ``child[i]`` the child node id (-1 = not created),
  ``legal[i]`` the legal-move mask;
- scalars ``to_play[i]``, ``terminal[i]``, ``value[i]`` (network value, or the exact result for a
  terminal node, from the view of the player to move at ``i``) and ``pending[i]`` (waiting for
  evaluation in the current round);
- the game state itself, in a Python list (states are immutable; ``game.play`` returns new ones).

Children are created lazily, when a simulation first takes their edge.

A round. Every searching slot descends from its root ``leaves_per_game`` times. Descent is
vectorised across slots: at each depth one PUCT (or Gumbel non-root) selection over the rows of
all the nodes the slots are at. A descent stops at a new edge (the child is created: one
``game.play``), a terminal node or a node already waiting for evaluation (a collision: it gets
the same evaluation). With several leaves per slot, each finished descent puts a virtual loss on
its edges so the next descent of the same slot looks elsewhere. All waiting leaves of all slots
go to the evaluator in ONE batched call, then every path is backed up at once (``np.add.at``),
the value negated on the way up wherever the player to move differs from the leaf's.

Reuse. After a move the chosen child's subtree is copied to the front of the slot's region
(breadth first, child ids remapped) and becomes the new root; the rest is dropped. A subtree that
would not leave room for a full search is dropped too.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from selfplay.errors import ConfigError, SnapshotError
from selfplay.evaluators import Evaluator, LeafBatch
from selfplay.games.base import Game
from selfplay.search import gumbel as gb
from selfplay.search.config import SearchConfig
from selfplay.search.puct import add_dirichlet_noise, puct_select_q


@dataclass
class SearchResult:
    """The outcome of one move's search at a slot's root.

    visits: float32 (A,) root edge visit counts (including visits kept from a reused subtree);
    q: float32 (A,) mean value of each root edge from the mover's view (NaN where unvisited);
    prior: float32 (A,) the evaluator's root priors (before any noise);
    root_value: mover's view; PUCT: mean of the root's own evaluation and all backed-up values;
    Gumbel: the improved policy's expected completed Q (forced visits to weak candidates would
    drag a plain mean down);
    policy_actions / policy_weights: sparse policy target (PUCT: visit counts of the visited moves;
    Gumbel: improved-policy probabilities of the legal moves);
    chosen: the move sequential halving selected (Gumbel), -1 for PUCT (the caller picks by
    temperature); full: True for a full-budget search; simulations: budget spent."""

    visits: np.ndarray
    q: np.ndarray
    prior: np.ndarray
    root_value: float
    policy_actions: np.ndarray
    policy_weights: np.ndarray
    chosen: int
    full: bool
    simulations: int


@dataclass
class _Slot:
    """Per-slot search bookkeeping."""

    base: int
    count: int = 0
    root: int = -1
    searching: bool = False
    root_needs_eval: bool = False
    budget: int = 0
    budget_left: int = 0
    full: bool = True
    rng: np.random.Generator | None = None
    root_prior: np.ndarray | None = None
    # Gumbel root state
    gumbel: np.ndarray | None = None
    logits: np.ndarray | None = None
    plan: list[tuple[int, int]] = field(default_factory=list)
    phase: int = 0
    phase_actions: np.ndarray | None = None
    queue: list[int] = field(default_factory=list)
    leftover: int = 0
    chosen: int = -1
    phase_visits: list[int] = field(default_factory=list)


@dataclass
class SearchTimes:
    """Seconds spent, cumulative: rules calls (play, legality, terminal tests), tree work
    (selection, backup, bookkeeping) and the evaluator."""

    rules: float = 0.0
    tree: float = 0.0
    network: float = 0.0
    rounds: int = 0
    evals: int = 0
    batches: int = 0
    collisions: int = 0


class BatchedSearch:
    """Trees of ``slots`` games searched together; see the module docstring."""

    def __init__(self, game: Game, config: SearchConfig, slots: int, capacity: int | None = None) -> None:
        if slots < 1:
            raise ValueError("slots must be positive")
        self.game = game
        self.config = config
        self.num_slots = slots
        self.A = A = game.num_actions
        if capacity is None:
            capacity = int(math.ceil(config.node_capacity_factor * config.simulations)) + 2
        if capacity < config.simulations + 2:
            raise ValueError(f"capacity {capacity} cannot hold a search of {config.simulations} simulations")
        self.capacity = C = int(capacity)
        total = slots * C
        self.P = np.zeros((total, A), dtype=np.float32)
        self.N = np.zeros((total, A), dtype=np.float32)
        self.W = np.zeros((total, A), dtype=np.float32)
        # Q = W / N where visited; the first-play-urgency value where not; -inf where illegal
        # (kept up to date at evaluation and backup so that PUCT selection needs no division)
        self.Q = np.zeros((total, A), dtype=np.float32)
        self.visits = np.zeros(total, dtype=np.float32)  # sum over the node's edges of N
        self.legal = np.zeros((total, A), dtype=bool)
        self.child = np.full((total, A), -1, dtype=np.int32)
        self.to_play = np.zeros(total, dtype=np.int8)
        self.terminal = np.zeros(total, dtype=bool)
        self.value = np.zeros(total, dtype=np.float32)
        self.pending = np.zeros(total, dtype=bool)
        self.states: list[Any] = [None] * total
        self._Nf = self.N.reshape(-1)
        self._Wf = self.W.reshape(-1)
        self._Qf = self.Q.reshape(-1)
        self.slots = [_Slot(base=s * C) for s in range(slots)]
        self.times = SearchTimes()
        self._is_gumbel = config.algorithm == "gumbel"
        self._leaves = config.leaves_per_game
        self._vl = float(config.virtual_loss) if config.leaves_per_game > 1 else 0.0

    # ---- node helpers ----------------------------------------------------------------------
    def _describe_state(self, node: int, state: Any) -> np.ndarray | None:
        """Fill a node's scalars from its state; return its legal mask if it needs evaluation."""
        g = self.game
        self.states[node] = state
        tp = g.to_play(state)
        self.to_play[node] = tp
        if g.is_terminal(state):
            self.terminal[node] = True
            self.value[node] = g.value_for_mover(state, tp)
            return None
        if g.move_count(state) >= g.max_moves:
            self.terminal[node] = True
            self.value[node] = 0.0
            return None
        self.terminal[node] = False
        self.pending[node] = True
        return g.legal_mask(state)

    def _clear_rows(self, nodes: np.ndarray) -> None:
        self.N[nodes] = 0.0
        self.W[nodes] = 0.0
        self.visits[nodes] = 0.0
        self.P[nodes] = 0.0
        self.child[nodes] = -1
        self.legal[nodes] = False

    def set_root(self, slot: int, state: Any) -> None:
        """Start a fresh tree at ``slot`` whose root is ``state`` (evaluated at the next round)."""
        sl = self.slots[slot]
        old = sl.count
        if old:
            self.states[sl.base:sl.base + old] = [None] * old
        node = sl.base
        self._clear_rows(np.array([node]))
        t0 = time.perf_counter()
        mask = self._describe_state(node, state)
        self.times.rules += time.perf_counter() - t0
        self.pending[node] = False  # the round that evaluates the root marks it
        if mask is not None:
            self.legal[node] = mask
        sl.count = 1
        sl.root = node
        sl.root_needs_eval = mask is not None
        sl.searching = False

    def root_state(self, slot: int) -> Any:
        return self.states[self.slots[slot].root]

    def root_is_terminal(self, slot: int) -> bool:
        return bool(self.terminal[self.slots[slot].root])

    def root_legal(self, slot: int) -> np.ndarray:
        return self.legal[self.slots[slot].root].copy()

    # ---- starting a search -----------------------------------------------------------------
    def begin(self, slot: int, budget: int, full: bool, rng: np.random.Generator) -> None:
        """Start a search of ``budget`` simulations at the slot's root. ``full`` enables root
        noise (PUCT); ``rng`` is the game's generator (noise, Gumbel samples, rollouts)."""
        sl = self.slots[slot]
        if self.terminal[sl.root]:
            raise ValueError("cannot search a terminal position")
        if sl.count + budget + 1 > self.capacity:
            self.set_root(slot, self.states[sl.root])
        sl.budget = sl.budget_left = int(budget)
        sl.full = bool(full)
        sl.rng = rng
        sl.searching = True
        sl.chosen = -1
        sl.phase_visits = []
        if not sl.root_needs_eval:
            self._prepare_root(slot)

    def _prepare_root(self, slot: int) -> None:
        """Root noise (PUCT) or the Gumbel sample and halving plan, once the root is evaluated."""
        sl = self.slots[slot]
        cfg = self.config
        root = sl.root
        sl.root_prior = self.P[root].copy()
        legal = self.legal[root]
        if not self._is_gumbel:
            if sl.full and cfg.dirichlet_epsilon > 0:
                self.P[root] = add_dirichlet_noise(self.P[root], legal, cfg.dirichlet_epsilon,
                                                   cfg.alpha_for(self.game), sl.rng)
            return
        sl.gumbel = sl.rng.gumbel(size=self.A)
        sl.logits = np.log(np.maximum(sl.root_prior.astype(np.float64), 1e-30))
        m = min(cfg.gumbel_sampled_moves, int(legal.sum()), sl.budget)
        considered = gb.top_m(sl.gumbel, sl.logits, legal, m)
        sl.plan = gb.halving_schedule(sl.budget, len(considered))
        used = sum(c * p for c, p in sl.plan)
        sl.leftover = sl.budget - used
        sl.phase = 0
        sl.phase_actions = considered
        self._fill_queue(sl)

    def _fill_queue(self, sl: _Slot) -> None:
        count, per = sl.plan[sl.phase]
        extra = sl.leftover if sl.phase == len(sl.plan) - 1 else 0
        sl.queue = gb.phase_queue(sl.phase_actions[:count], per, extra)
        sl.queue.reverse()  # pop() from the end takes them in order
        sl.phase_visits.append(len(sl.queue))

    def _gumbel_root_scores(self, sl: _Slot, actions: np.ndarray) -> np.ndarray:
        root = sl.root
        scores = gb.root_scores(sl.gumbel, sl.logits, self.N[root].astype(np.float64),
                                self.W[root].astype(np.float64), self.config.gumbel_c_visit,
                                self.config.gumbel_c_scale)
        return scores[actions]

    def _end_phase(self, sl: _Slot) -> None:
        """Sequential halving: keep the better half of this phase's actions, or finish."""
        count, _ = sl.plan[sl.phase]
        actions = sl.phase_actions[:count]
        scores = self._gumbel_root_scores(sl, actions)
        order = np.argsort(-scores, kind="stable")
        if sl.phase == len(sl.plan) - 1:
            sl.chosen = int(actions[order[0]])
            sl.searching = False
            return
        sl.phase += 1
        sl.phase_actions = actions[order]
        self._fill_queue(sl)

    # ---- one round -------------------------------------------------------------------------
    def _select(self, ids: np.ndarray) -> np.ndarray:
        cfg = self.config
        if self._is_gumbel:
            return gb.gumbel_nonroot_select(self.P[ids], self.N[ids], self.W[ids], self.legal[ids],
                                            self.value[ids], cfg.gumbel_c_visit, cfg.gumbel_c_scale)
        return puct_select_q(self.P[ids], self.N[ids], self.Q[ids], self.visits[ids], cfg.c_puct)

    def searching_slots(self) -> list[int]:
        return [s for s, sl in enumerate(self.slots) if sl.searching]

    def run_round(self, evaluator: Evaluator) -> list[int]:
        """One simulation round over every searching slot; one batched evaluator call.
        Returns the slots whose search finished in this round."""
        t_start = time.perf_counter()
        rules = 0.0
        game = self.game
        slots = self.slots
        eval_nodes: list[int] = []
        eval_slots: list[int] = []
        for s, sl in enumerate(slots):
            if sl.searching and sl.root_needs_eval:
                self.pending[sl.root] = True
                eval_nodes.append(sl.root)
                eval_slots.append(s)
        root_evals = list(eval_slots)
        walkers = [s for s, sl in enumerate(slots) if sl.searching and not sl.root_needs_eval]

        edge_paths: list[np.ndarray] = []
        edge_nodes: list[np.ndarray] = []
        edge_acts: list[np.ndarray] = []
        path_leaves: list[np.ndarray] = []
        n_paths = 0
        for r in range(self._leaves):
            if self._is_gumbel:
                batch_slots = [s for s in walkers if slots[s].budget_left > 0 and slots[s].queue]
            else:
                batch_slots = [s for s in walkers if slots[s].budget_left > 0]
            if not batch_slots:
                break
            k = len(batch_slots)
            cur = np.array([slots[s].root for s in batch_slots], dtype=np.int64)
            forced = None
            if self._is_gumbel:
                forced = np.array([slots[s].queue.pop() for s in batch_slots], dtype=np.int64)
            for s in batch_slots:
                slots[s].budget_left -= 1
            leaf = np.full(k, -1, dtype=np.int64)
            alive = np.arange(k)
            depth = 0
            r_nodes: list[np.ndarray] = []
            r_acts: list[np.ndarray] = []
            new_p: list[np.ndarray] = []
            new_par: list[np.ndarray] = []
            new_act: list[np.ndarray] = []
            while alive.size:
                ids = cur[alive]
                if depth == 0 and forced is not None:
                    a = forced[alive]
                else:
                    a = self._select(ids)
                edge_paths.append(alive + n_paths)
                r_nodes.append(ids)
                r_acts.append(a)
                ch = self.child[ids, a]
                is_new = ch < 0
                if is_new.any():
                    new_p.append(alive[is_new])
                    new_par.append(ids[is_new])
                    new_act.append(a[is_new])
                    old = ~is_new
                    alive_old = alive[old]
                    ch_old = ch[old].astype(np.int64)
                else:
                    alive_old = alive
                    ch_old = ch.astype(np.int64)
                stop = self.terminal[ch_old] | self.pending[ch_old]
                if stop.any():
                    leaf[alive_old[stop]] = ch_old[stop]
                    self.times.collisions += int(self.pending[ch_old[stop]].sum())
                    keep = ~stop
                    alive = alive_old[keep]
                    cur[alive] = ch_old[keep]
                else:
                    alive = alive_old
                    cur[alive] = ch_old
                depth += 1
            # create the new children (rules calls)
            if new_p:
                t0 = time.perf_counter()
                ps = np.concatenate(new_p)
                pars = np.concatenate(new_par)
                acts = np.concatenate(new_act)
                created = np.empty(ps.size, dtype=np.int64)
                mask_nodes: list[int] = []
                masks: list[np.ndarray] = []
                states = self.states
                for j, (p_idx, par, act) in enumerate(zip(ps.tolist(), pars.tolist(), acts.tolist())):
                    s = batch_slots[p_idx]
                    sl = slots[s]
                    node = sl.base + sl.count
                    sl.count += 1
                    created[j] = node
                    st = game.play(states[par], act)
                    mask = self._describe_state(node, st)
                    if mask is not None:
                        mask_nodes.append(node)
                        masks.append(mask)
                        eval_nodes.append(node)
                        eval_slots.append(s)
                rules += time.perf_counter() - t0
                self._clear_rows(created)
                self.child[pars, acts] = created
                if masks:
                    self.legal[mask_nodes] = np.stack(masks)
                leaf[ps] = created
            nodes_cat = np.concatenate(r_nodes)
            acts_cat = np.concatenate(r_acts)
            edge_nodes.append(nodes_cat)
            edge_acts.append(acts_cat)
            if self._vl:
                flat = nodes_cat * self.A + acts_cat
                self._Nf[flat] += self._vl
                self._Wf[flat] -= self._vl
                self._Qf[flat] = self._Wf[flat] / self._Nf[flat]
                self.visits[nodes_cat] += self._vl
            path_leaves.append(leaf)
            n_paths += k

        # evaluate every waiting leaf in one call
        t_net = 0.0
        if eval_nodes:
            nodes = np.array(eval_nodes, dtype=np.int64)
            batch = LeafBatch(game, [self.states[i] for i in eval_nodes], self.to_play[nodes],
                              self.legal[nodes], [slots[s].rng for s in eval_slots])
            t0 = time.perf_counter()
            priors, values = evaluator.evaluate(batch)
            t_net = time.perf_counter() - t0
            _check_evaluation(evaluator, priors, values, len(eval_nodes), self.A)
            self.P[nodes] = priors
            self.value[nodes] = values
            self.Q[nodes] = np.where(self.legal[nodes], (values - self.config.unvisited_value_penalty)[:, None],
                                     -np.inf).astype(np.float32)
            self.pending[nodes] = False
            self.times.evals += len(eval_nodes)
            self.times.batches += 1

        # back up every path
        if n_paths:
            leaves = np.concatenate(path_leaves)
            e_path = np.concatenate(edge_paths)
            e_node = np.concatenate(edge_nodes)
            e_act = np.concatenate(edge_acts)
            v_leaf = self.value[leaves][e_path]
            same = self.to_play[e_node] == self.to_play[leaves][e_path]
            v = np.where(same, v_leaf, -v_leaf).astype(np.float32)
            flat = e_node * self.A + e_act
            np.add.at(self._Nf, flat, 1.0 - self._vl)
            np.add.at(self._Wf, flat, v + self._vl)
            np.add.at(self.visits, e_node, 1.0 - self._vl)
            if self._vl:
                # real visit counts are whole numbers: drop the rounding left by adding and
                # removing a virtual loss that float32 cannot hold exactly (0.7, say)
                self._Nf[flat] = np.rint(self._Nf[flat])
                self.visits[e_node] = np.rint(self.visits[e_node])
            self._Qf[flat] = self._Wf[flat] / self._Nf[flat]

        finished: list[int] = []
        for s in root_evals:
            sl = slots[s]
            sl.root_needs_eval = False
            self._prepare_root(s)
        for s in walkers:
            sl = slots[s]
            if self._is_gumbel:
                while sl.searching and not sl.queue:
                    self._end_phase(sl)
                if not sl.searching:
                    finished.append(s)
            elif sl.budget_left <= 0:
                sl.searching = False
                finished.append(s)
        elapsed = time.perf_counter() - t_start
        self.times.rules += rules
        self.times.network += t_net
        self.times.tree += elapsed - rules - t_net
        self.times.rounds += 1
        return finished

    # ---- results and reuse -----------------------------------------------------------------
    def root_value(self, slot: int) -> float:
        root = self.slots[slot].root
        return float((self.value[root] + self.W[root].sum()) / (1.0 + self.N[root].sum()))

    def result(self, slot: int) -> SearchResult:
        """Root statistics of the slot's finished search."""
        sl = self.slots[slot]
        root = sl.root
        visits = self.N[root].copy()
        W = self.W[root]
        q = np.full(self.A, np.nan, dtype=np.float32)
        np.divide(W, visits, out=q, where=visits > 0)
        prior = sl.root_prior if sl.root_prior is not None else self.P[root].copy()
        if self._is_gumbel:
            pi = gb.improved_policy(prior[None].astype(np.float64), visits[None].astype(np.float64),
                                    W[None].astype(np.float64), self.legal[root][None],
                                    np.array([self.value[root]], dtype=np.float64),
                                    self.config.gumbel_c_visit, self.config.gumbel_c_scale)[0]
            acts = np.flatnonzero(pi > 0)
            weights = pi[acts].astype(np.float32)
            chosen = sl.chosen
            cq = gb.completed_q(prior[None].astype(np.float64), visits[None].astype(np.float64),
                                W[None].astype(np.float64), np.array([self.value[root]], dtype=np.float64))[0]
            root_value = float(np.sum(pi * np.where(self.legal[root], cq, 0.0)))
        else:
            acts = np.flatnonzero(visits > 0)
            weights = visits[acts].astype(np.float32)
            chosen = -1
            root_value = self.root_value(slot)
        return SearchResult(visits=visits, q=q, prior=prior.astype(np.float32, copy=False),
                            root_value=root_value, policy_actions=acts.astype(np.int16),
                            policy_weights=weights, chosen=chosen, full=sl.full, simulations=sl.budget)

    def advance(self, slot: int, action: int) -> Any:
        """Play ``action`` at the slot's root, keep its subtree (if reuse is on and it fits) as
        the new tree, and return the new root state."""
        sl = self.slots[slot]
        root = sl.root
        c = int(self.child[root, action])
        if c < 0 or not self.config.reuse_tree or self.terminal[c] or self.pending[c]:
            t0 = time.perf_counter()
            state = self.states[c] if c >= 0 else self.game.play(self.states[root], int(action))
            self.times.rules += time.perf_counter() - t0
            self.set_root(slot, state)
            return state
        t0 = time.perf_counter()
        order = [np.array([c], dtype=np.int64)]
        frontier = order[0]
        total = 1
        while frontier.size:
            kids = self.child[frontier].ravel()
            kids = kids[kids >= 0].astype(np.int64)
            if kids.size:
                order.append(kids)
                total += kids.size
            frontier = kids
        keep = np.concatenate(order)
        state = self.states[c]
        if total + self.config.simulations + 1 > self.capacity:
            self.times.tree += time.perf_counter() - t0
            self.set_root(slot, state)
            return state
        base = sl.base
        dst = base + np.arange(total)
        remap = np.full(self.capacity, -1, dtype=np.int64)
        remap[keep - base] = dst
        ch = self.child[keep]
        ch = np.where(ch >= 0, remap[np.maximum(ch, base) - base], -1).astype(np.int32)
        for arr in (self.P, self.N, self.W, self.Q, self.legal):
            arr[dst] = arr[keep]
        self.child[dst] = ch
        for arr in (self.to_play, self.terminal, self.value, self.pending, self.visits):
            arr[dst] = arr[keep]
        kept_states = [self.states[i] for i in keep.tolist()]
        old = sl.count
        self.states[base:base + old] = kept_states + [None] * (old - total)
        sl.count = total
        sl.root = base
        sl.root_needs_eval = False
        sl.searching = False
        self.times.tree += time.perf_counter() - t0
        return state


def _check_evaluation(evaluator: Evaluator, priors: np.ndarray, values: np.ndarray, n: int, A: int) -> None:
    """Refuse an evaluation of the wrong shape or with non-finite numbers before it enters a tree."""
    name = type(evaluator).__name__
    if getattr(priors, "shape", None) != (n, A) or getattr(values, "shape", None) != (n,):
        raise ConfigError(f"evaluator {name} returned priors of shape {getattr(priors, 'shape', None)} and values "
                          f"of shape {getattr(values, 'shape', None)} for {n} leaves; expected ({n}, {A}) and ({n},)")
    if not (np.isfinite(values.sum()) and np.isfinite(priors.sum())):
        raise SnapshotError(f"evaluator {name} returned non-finite priors or values (a corrupt or diverged "
                            "network?); the search stops rather than fill its trees with them")


def search_states(game: Game, states: Sequence[Any], evaluator: Evaluator, config: SearchConfig, *,
                  seed: int = 0, full: bool = True, chunk: int = 256) -> list[SearchResult]:
    """Search each of ``states`` once (fresh trees, ``config.simulations`` each), many at a time,
    and return their root results in order. The generator of state ``i`` is seeded from
    ``(seed, i)``."""
    evaluator.check_game(game)
    results: list[SearchResult] = []
    for lo in range(0, len(states), chunk):
        part = list(states[lo:lo + chunk])
        # fresh trees, no reuse: a search never holds more than its budget plus the root
        bs = BatchedSearch(game, config, len(part), capacity=config.simulations + 2)
        for i, st in enumerate(part):
            bs.set_root(i, st)
            bs.begin(i, config.simulations, full, np.random.default_rng([seed, lo + i]))
        while bs.searching_slots():
            bs.run_round(evaluator)
        results.extend(bs.result(i) for i in range(len(part)))
    return results
