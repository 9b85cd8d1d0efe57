"""Search trees of many games at once, stored as flat numpy arrays, searched in lock-step rounds.

Layout. A :class:`BatchedSearch` serves ``slots`` games. Each slot owns a region of
``capacity`` node rows in shared arrays; node ``i`` has, over all ``A`` actions (illegal ones
masked):

- ``P[i]`` priors, ``N[i]`` edge visit counts, ``W[i]`` summed backed-up values of each edge from
  the view of the player to move at node ``i``, ``child[i]`` the child node id (-1 = not created),
  ``legal[i]`` the legal-move mask, ``Q[i]`` = W / N where visited, the first-play-urgency value
  where not and -inf where illegal (kept up to date, so PUCT needs no division), and for the
  Gumbel rule ``logP[i]`` the log priors;
- scalars ``visits[i]`` (the sum of ``N[i]``), ``to_play[i]``, ``terminal[i]``, ``value[i]``
  (network value, or the exact result for a terminal node, from the view of the player to move
  at ``i``), ``pending[i]`` (waiting for evaluation in the current round) and ``ready[i]``
  (False: the node's legal moves, priors and Q row are not worked out yet; with a network and
  a game with a state pool a node is made with its boards only, keeps its raw logits in
  ``P[i]`` once evaluated, and is opened when a descent first has to choose a move there —
  most nodes never are);
- the game state itself: in the game's state pool where it has one (Go:
  :class:`selfplay.games.go_pool.GoStatePool`, the position in row ``i`` of a few arrays), else
  in a Python list (states are immutable; ``game.play`` returns new ones).

Children are created lazily, when a simulation first takes their edge. Per slot (numpy arrays
over the slots): ``base`` (first row of its region), ``count`` (rows used), ``root``, and the
search state (``searching``, ``budget_left``, ...).

A round (:meth:`BatchedSearch.run_round`) has four steps, one method each:

1. ``_descend`` — one compiled call (:func:`selfplay.search.kernels.descend`) walks from the root
   of every slot that may simulate now, choosing with the root search's forced action at the
   root (Gumbel) and the below-root rule elsewhere, and stops at a new edge, a terminal node or a
   node already waiting for evaluation (a collision: it shares that evaluation), or at a node
   not ``ready`` (``_open`` works it out, then ``kernels.finish_blocked`` takes the path one
   edge on). With ``leaves_per_game > 1`` each finished path gets its virtual loss at once, and
   the step runs once per leaf;
2. ``_expand`` — the children at new edges are created, shallowest first: one compiled
   ``pool.expand`` call for all of them where the game has a state pool (Go), else one
   ``game.play_with_mask`` each;
3. ``_evaluate`` — every waiting leaf of every slot goes to the evaluator in ONE batched call
   (a network evaluator hands back raw logits: the softmax over each leaf's legal moves is
   computed as its priors are stored, :func:`selfplay.search.kernels.store_evaluations`, or
   when the leaf is opened);
4. ``_backup`` — one compiled call (:func:`selfplay.search.kernels.backup`) adds each leaf's value
   along its path, negated wherever the player to move differs from the leaf's, and removes the
   virtual losses.

What happens at the root — noise, forced actions, when a search is complete, the policy target —
belongs to the root search (:class:`selfplay.search.root.RootSearch`; PUCT in
:mod:`selfplay.search.puct`, Gumbel in :mod:`selfplay.search.gumbel`).

Reuse. After a move the chosen child's subtree becomes the tree: where the region still has
room for a full search after the rows in use, the child simply becomes the root (the rest of
the old tree stays behind as dead rows); otherwise the subtree is copied to the front of the
region (compiled: in ascending node order, child ids remapped), which frees the dead rows. A
subtree that would not leave room for a full search even then is dropped.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from selfplay.arrays import RowItems, resident_zeros
from selfplay.errors import ConfigError, SnapshotError
from selfplay.evaluators import Evaluator, LeafBatch
from selfplay.games.base import Game
from selfplay.search import kernels
from selfplay.search.config import SearchConfig
from selfplay.search.root import RULE_GUMBEL, RootSearch, make_root_search


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


@dataclass
class _Round:
    """Work list of one round: the nodes waiting for evaluation and their slots (int64 arrays,
    one pair per step that found some) and the paths walked, in the edge buffers up to
    ``edges``; ``groups`` marks where each descent's paths start (one descent per leaf per game)."""

    node_parts: list[np.ndarray] = field(default_factory=list)
    slot_parts: list[np.ndarray] = field(default_factory=list)
    paths: int = 0
    edges: int = 0
    groups: list[int] = field(default_factory=lambda: [0])
    rules_seconds: float = 0.0

    def waiting(self, nodes: np.ndarray, slots: np.ndarray) -> None:
        """``nodes`` (of games ``slots``) wait for this round's evaluation (arrays kept as given)."""
        if nodes.size:
            self.node_parts.append(nodes)
            self.slot_parts.append(slots)

    def evaluation_list(self) -> tuple[np.ndarray, np.ndarray]:
        """All waiting nodes and their slots, in the order they were added."""
        if len(self.node_parts) == 1:
            return self.node_parts[0], self.slot_parts[0]
        return np.concatenate(self.node_parts), np.concatenate(self.slot_parts)


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
        self.P = resident_zeros((total, A), np.float32)
        self.N = resident_zeros((total, A), np.float32)
        self.W = resident_zeros((total, A), np.float32)
        # Q = W / N where visited; the first-play-urgency value where not; -inf where illegal
        # (kept up to date at evaluation and backup so that PUCT selection needs no division)
        self.Q = resident_zeros((total, A), np.float32)
        self.visits = np.zeros(total, dtype=np.float32)  # sum over the node's edges of N
        self.legal = resident_zeros((total, A), bool)
        self.child = np.full((total, A), -1, dtype=np.int32)
        self.to_play = np.zeros(total, dtype=np.int8)
        self.terminal = np.zeros(total, dtype=bool)
        self.value = np.zeros(total, dtype=np.float32)
        self.pending = np.zeros(total, dtype=bool)
        # False: the node's legal moves, priors and Q row are not worked out yet (see _open)
        self.ready = np.ones(total, dtype=bool)
        # the positions: rows of the game's state pool (node i in row i), else a list of states
        self.pool = game.state_pool(slots, C)
        self.states: list[Any] = [None] * total if self.pool is None else []
        # per slot: region start, nodes used, root node, search state
        self.base = np.arange(slots, dtype=np.int64) * C
        self.count = np.zeros(slots, dtype=np.int64)
        self.root = self.base.copy()
        self.searching = np.zeros(slots, dtype=bool)
        self.root_needs_eval = np.zeros(slots, dtype=bool)
        self.budget = np.zeros(slots, dtype=np.int64)
        self.budget_left = np.zeros(slots, dtype=np.int64)
        self.full = np.ones(slots, dtype=bool)
        self.rngs: list[np.random.Generator | None] = [None] * slots
        self.root_prior = np.zeros((slots, A), dtype=np.float32)  # the root's priors before noise
        self.variant: RootSearch = make_root_search(config, game, slots)
        self._rule = self.variant.below_root
        # log priors for the Gumbel rule below the root (numpy's float32 log, as the formula's)
        self.logP = resident_zeros((total, A) if self._rule == RULE_GUMBEL else (1, 1), np.float32)
        self.times = SearchTimes()
        self._leaves = config.leaves_per_game
        self._vl = float(config.virtual_loss) if config.leaves_per_game > 1 else 0.0
        self._max_moves = game.max_moves
        # edge and path buffers of one round: a path never has more edges than its tree has nodes
        paths = self._leaves * slots
        self._edge_node = np.zeros(paths * C, dtype=np.int64)
        self._edge_act = np.zeros(paths * C, dtype=np.int64)
        self._path_start = np.zeros(paths, dtype=np.int64)
        self._path_len = np.zeros(paths, dtype=np.int64)
        self._path_leaf = np.zeros(paths, dtype=np.int64)
        self._path_slot = np.zeros(paths, dtype=np.int64)
        self._no_force = np.full(slots, -1, dtype=np.int64)
        # the new children of one descent step (kernels.new_children)
        self._new_path, self._new_parent, self._new_action, self._new_slot, self._new_node, self._blocked = (
            np.zeros(paths, dtype=np.int64) for _ in range(6))
        # whether this round's new children wait for their legal moves until a descent first
        # chooses at them (a game with a state pool, an evaluator that hands back logits)
        self._defer = False

    # ---- node helpers ----------------------------------------------------------------------
    def _terminal_value(self, state: Any, mover: int) -> float | None:
        """None when ``state`` needs evaluation; else its exact value for ``mover``: the game's
        result, or 0 (a draw) at the move cap when the rules do not end the game there."""
        if not self._ends(state):
            return None
        g = self.game
        return g.value_for_mover(state, mover) if g.is_terminal(state) else 0.0

    def _ends(self, state: Any) -> bool:
        """True when the search stops at ``state``: the rules ended the game, or the move cap."""
        return self.game.is_terminal(state) or self.game.move_count(state) >= self._max_moves

    def _state(self, node: int) -> Any:
        """The position at ``node`` (made from the pool's row where the game has a pool)."""
        return self.pool.load(node) if self.pool is not None else self.states[node]

    def _describe_state(self, node: int, state: Any) -> np.ndarray | None:
        """Fill a node's scalars from its state; return its legal mask if it needs evaluation."""
        tp = self.game.to_play(state)
        self.to_play[node] = tp
        exact = self._terminal_value(state, tp)
        self.terminal[node] = exact is not None
        if exact is not None:
            self.value[node] = exact
            return None
        self.pending[node] = True
        return self.game.legal_mask(state)

    def _clear_rows(self, nodes: np.ndarray) -> None:
        self.N[nodes] = 0.0
        self.W[nodes] = 0.0
        self.visits[nodes] = 0.0
        self.P[nodes] = 0.0
        self.child[nodes] = -1
        self.legal[nodes] = False
        self.ready[nodes] = True

    def set_root(self, slot: int, state: Any) -> None:
        """Start a fresh tree at ``slot`` whose root is ``state`` (evaluated at the next round)."""
        old = int(self.count[slot])
        node = int(self.base[slot])
        if old and self.pool is None:
            self.states[node:node + old] = [None] * old
        self._clear_rows(np.array([node]))
        t0 = time.perf_counter()
        if self.pool is not None:
            self.pool.store_root(slot, node, state)
        else:
            self.states[node] = state
        mask = self._describe_state(node, state)
        self.times.rules += time.perf_counter() - t0
        self.pending[node] = False  # the round that evaluates the root marks it
        if mask is not None:
            self.legal[node] = mask
        self.count[slot] = 1
        self.root[slot] = node
        self.root_needs_eval[slot] = mask is not None
        self.searching[slot] = False

    def root_state(self, slot: int) -> Any:
        return self._state(int(self.root[slot]))

    def root_is_terminal(self, slot: int) -> bool:
        return bool(self.terminal[self.root[slot]])

    def root_legal(self, slot: int) -> np.ndarray:
        return self.legal[self.root[slot]].copy()

    # ---- starting a search -----------------------------------------------------------------
    def begin(self, slot: int, budget: int, full: bool, rng: np.random.Generator) -> None:
        """Start a search of ``budget`` simulations at the slot's root. ``full`` enables root
        noise (PUCT); ``rng`` is the game's generator (noise, Gumbel samples, rollouts)."""
        root = self.root[slot]
        if self.terminal[root]:
            raise ValueError("cannot search a terminal position")
        if self.count[slot] + budget + 1 > self.capacity:
            self.set_root(slot, self._state(int(root)))
        self.budget[slot] = self.budget_left[slot] = int(budget)
        self.full[slot] = bool(full)
        self.rngs[slot] = rng
        self.searching[slot] = True
        if not self.root_needs_eval[slot]:
            self._start_variant(slot)

    def _start_variant(self, slot: int) -> None:
        """The root is evaluated: keep its priors, then let the root search set itself up."""
        self.root_prior[slot] = self.P[self.root[slot]]
        self.variant.start(self, slot)

    def searching_slots(self) -> list[int]:
        return np.flatnonzero(self.searching).tolist()

    # ---- one round -------------------------------------------------------------------------
    def run_round(self, evaluator: Evaluator) -> list[int]:
        """One simulation round over every searching slot; one batched evaluator call.
        Returns the slots whose search finished in this round."""
        t_start = time.perf_counter()
        rnd = _Round()
        self._defer = self.pool is not None and getattr(evaluator, "evaluate_logits", None) is not None
        root_evals = np.flatnonzero(self.searching & self.root_needs_eval)
        if root_evals.size:
            nodes = self.root[root_evals]
            self.pending[nodes] = True
            rnd.waiting(nodes, root_evals)
        walkers = np.flatnonzero(self.searching & ~self.root_needs_eval)
        for _ in range(self._leaves):
            if not self._descend(walkers, rnd):
                break
        t_net = self._evaluate(evaluator, rnd)
        self._backup(rnd)
        for s in root_evals.tolist():
            self.root_needs_eval[s] = False
            self._start_variant(s)
        finished = self.variant.finished(self, walkers)
        self.searching[finished] = False
        elapsed = time.perf_counter() - t_start
        self.times.rules += rnd.rules_seconds
        self.times.network += t_net
        self.times.tree += elapsed - rnd.rules_seconds - t_net
        self.times.rounds += 1
        return finished

    def _descend(self, walkers: np.ndarray, rnd: _Round) -> bool:
        """One descent from the root of every walker that may simulate now (compiled), then
        the new children it reached are created. False when no game could start one."""
        slots = walkers[self.budget_left[walkers] > 0]
        ready = self.variant.ready(self, slots)
        if ready is not None:
            slots = slots[ready]
        k = slots.size
        if not k:
            return False
        forced = self.variant.forced_actions(self, slots)
        if forced is None:
            forced = self._no_force[:k]
        self.budget_left[slots] -= 1
        lo, hi = rnd.paths, rnd.paths + k
        cfg = self.config
        end, collisions, blocked = kernels.descend(
            self.root[slots], forced, self._rule, self.P, self.N, self.W, self.Q, self.logP, self.visits,
            self.legal, self.value, self.child, self.terminal, self.pending, self.ready, cfg.c_puct,
            cfg.gumbel_c_visit, cfg.gumbel_c_scale, self._vl, self._edge_node,
            self._edge_act, rnd.edges, self._path_start[lo:hi], self._path_len[lo:hi], self._path_leaf[lo:hi])
        if blocked:
            # paths that reached a node whose legal moves wait: work those out, then go on
            k = kernels.blocked_nodes(self._path_leaf[lo:hi], self._path_start[lo:hi], self._path_len[lo:hi],
                                      self._edge_node, self._edge_act, self.child, self._blocked)
            rnd.rules_seconds += self._open(self._blocked[:k])
            kernels.finish_blocked(self._rule, self.P, self.N, self.W, self.Q, self.logP, self.visits, self.legal,
                                   self.value, self.child, cfg.c_puct, cfg.gumbel_c_visit, cfg.gumbel_c_scale,
                                   self._vl, self._edge_node, self._edge_act, self._path_start[lo:hi],
                                   self._path_len[lo:hi], self._path_leaf[lo:hi])
        self.times.collisions += collisions
        self._path_slot[lo:hi] = slots
        rnd.edges = end
        rnd.paths = hi
        rnd.groups.append(hi)
        self._expand(lo, hi, rnd)
        return True

    def _expand(self, lo: int, hi: int, rnd: _Round) -> None:
        """Create the children at the ends of paths ``lo:hi`` that stopped at a new edge (one
        ``game.play`` each), shallowest first; those not terminal wait for evaluation."""
        k = kernels.new_children(lo, hi, self._path_leaf, self._path_len, self._path_start, self._path_slot,
                                 self._edge_node, self._edge_act, self.base, self.count, self.N, self.W,
                                 self.visits, self.child, self.terminal, self.pending, self.ready,
                                 not self._defer, self._new_path,
                                 self._new_parent, self._new_action, self._new_slot, self._new_node)
        if not k:
            return
        parents, actions = self._new_parent[:k], self._new_action[:k]
        slots, created = self._new_slot[:k].copy(), self._new_node[:k].copy()  # the buffers serve the next step
        legal = self.legal
        t0 = time.perf_counter()
        if self.pool is not None:
            # one compiled call plays every new edge from its parent's row into its child's and
            # writes the children's players to move, and their legal masks unless those wait
            # for the children's first descent; it says which ended the game
            ended = self.pool.expand(parents, actions, created, legal, self.to_play, build=not self._defer)
        else:
            states = self.states
            play, to_play = self.game.play_with_mask, self.game.to_play
            children = [play(states[par], act, legal[node])[0]
                        for node, par, act in zip(created.tolist(), parents.tolist(), actions.tolist())]
            self.to_play[created] = [to_play(c) for c in children]
            ended = np.array([self._ends(c) for c in children], dtype=bool)
            for node, child in zip(created.tolist(), children):
                states[node] = child
        if not ended.any():
            rnd.waiting(created, slots)
            rnd.rules_seconds += time.perf_counter() - t0
            return
        waiting = ~ended
        rnd.waiting(created[waiting], slots[waiting])
        done = created[ended]
        exact = [self._terminal_value(self._state(node), int(self.to_play[node])) for node in done.tolist()]
        rnd.rules_seconds += time.perf_counter() - t0
        self.terminal[done] = True
        self.pending[done] = False
        self.ready[done] = True
        self.value[done] = exact
        legal[done] = False

    def _open(self, nodes: np.ndarray) -> float:
        """Work out the legal moves of ``nodes`` (evaluated before anything needed them: their
        raw logits wait in ``P``), then their priors and Q rows; returns the seconds the rules
        took. Only a game with a state pool defers them (see ``_defer``)."""
        t0 = time.perf_counter()
        self.pool.build(nodes, self.legal)
        t_rules = time.perf_counter() - t0
        kernels.open_nodes(nodes, self.config.unvisited_value_penalty, self.P, self.value, self.Q, self.legal,
                           self.ready)
        self._store_log_priors(nodes)
        return t_rules

    def _store_log_priors(self, nodes: np.ndarray) -> None:
        """The Gumbel rule's log priors of ``nodes`` (ready ones), in numpy's float32 log as the
        formula's reference computes it; nothing under PUCT."""
        if self._rule == RULE_GUMBEL:
            self.logP[nodes] = np.log(np.maximum(self.P[nodes], np.float32(1e-30)))

    def _evaluate(self, evaluator: Evaluator, rnd: _Round) -> float:
        """Evaluate every waiting leaf in one call; returns the seconds the evaluator took."""
        if not rnd.node_parts:
            return 0.0
        nodes, slots = rnd.evaluation_list()
        states = (self.pool.states(nodes) if self.pool is not None else [self.states[i] for i in nodes.tolist()])
        # with deferred legal moves the leaves have none yet: an evaluator with logits needs none;
        # the games' generators are looked up only if the evaluator asks (a network never does)
        batch = LeafBatch(self.game, states, self.to_play[nodes], None if self._defer else self.legal[nodes],
                          RowItems(slots, self.rngs.__getitem__))
        # an evaluator with raw logits (a network) leaves the softmax over each leaf's legal moves
        # to the compiled store, which computes it as it writes the priors
        logits_of = getattr(evaluator, "evaluate_logits", None)
        t0 = time.perf_counter()
        policy, values = logits_of(batch) if logits_of is not None else evaluator.evaluate(batch)
        t_net = time.perf_counter() - t0
        _check_shapes(evaluator, policy, values, nodes.size, self.A)
        # the evaluator's contract is float32; anything else is rounded to it here
        if not kernels.store_evaluations(nodes, np.ascontiguousarray(policy, dtype=np.float32),
                                         np.ascontiguousarray(values, dtype=np.float32),
                                         self.config.unvisited_value_penalty, self.P, self.value, self.Q, self.legal,
                                         self.pending, self.ready, logits_of is not None):
            raise SnapshotError(f"evaluator {type(evaluator).__name__} returned non-finite priors or values (a "
                                "corrupt or diverged network?); the search stops rather than fill its trees with them")
        if self._rule == RULE_GUMBEL:  # nodes not ready get theirs when they are opened
            self._store_log_priors(nodes[self.ready[nodes]])
        self.times.evals += nodes.size
        self.times.batches += 1
        return t_net

    def _backup(self, rnd: _Round) -> None:
        if rnd.paths:
            kernels.backup(self._edge_node, self._edge_act, self._path_start[:rnd.paths],
                           self._path_len[:rnd.paths], self._path_leaf[:rnd.paths],
                           np.array(rnd.groups, dtype=np.int64), self.value, self.to_play, self.N, self.W,
                           self.Q, self.visits, self._vl)

    # ---- results and reuse -----------------------------------------------------------------
    def root_value(self, slot: int) -> float:
        """Mean of the root's own evaluation and every value backed up through it (mover's view)."""
        root = self.root[slot]
        return float((self.value[root] + self.W[root].sum()) / (1.0 + self.N[root].sum()))

    def result(self, slot: int) -> SearchResult:
        """Root statistics of the slot's finished search."""
        root = self.root[slot]
        visits = self.N[root].copy()
        q = np.full(self.A, np.nan, dtype=np.float32)
        np.divide(self.W[root], visits, out=q, where=visits > 0)
        target = self.variant.target(self, slot)
        return SearchResult(visits=visits, q=q, prior=self.root_prior[slot].copy(), root_value=target.root_value,
                            policy_actions=target.policy_actions.astype(np.int16),
                            policy_weights=target.policy_weights, chosen=target.chosen,
                            full=bool(self.full[slot]), simulations=int(self.budget[slot]))

    def advance(self, slot: int, action: int) -> Any:
        """Play ``action`` at the slot's root, keep its subtree (if reuse is on and it fits) as
        the new tree (in place, or compacted to the region's front when the region is full), and
        return the new root state."""
        root = self.root[slot]
        c = int(self.child[root, action])
        if c < 0 or not self.config.reuse_tree or self.terminal[c] or self.pending[c]:
            t0 = time.perf_counter()
            state = self._state(c) if c >= 0 else self.game.play(self._state(int(root)), int(action))
            self.times.rules += time.perf_counter() - t0
            self.set_root(slot, state)
            return state
        if not self.ready[c]:  # a root needs its legal moves and priors
            self.times.rules += self._open(np.array([c], dtype=np.int64))
        t0 = time.perf_counter()
        state = self._state(c)
        if self.count[slot] + self.config.simulations + 1 <= self.capacity:
            # room for a full search after the rows in use: the subtree stays where it is (the
            # rest of the region is dead until a later move compacts it)
            if self.pool is not None:
                self.pool.make_root(slot, c)
            self.root[slot] = c
            self.root_needs_eval[slot] = False
            self.searching[slot] = False
            self.times.tree += time.perf_counter() - t0
            return state
        base = int(self.base[slot])
        keep = np.empty(self.count[slot], dtype=np.int64)
        total = kernels.subtree_order(self.child, c, keep)
        keep = keep[:total]
        if total + self.config.simulations + 1 > self.capacity:
            self.times.tree += time.perf_counter() - t0
            self.set_root(slot, state)
            return state
        kernels.move_rows(keep, base, self.P, self.N, self.W, self.Q, self.legal, self.child, self.to_play,
                          self.terminal, self.value, self.pending, self.ready, self.visits, self.logP)
        old = int(self.count[slot])
        if self.pool is not None:
            self.pool.reroot(slot, keep, base)
        else:
            kept_states = [self.states[i] for i in keep.tolist()]
            self.states[base:base + old] = kept_states + [None] * (old - total)
        self.count[slot] = total
        self.root[slot] = base
        self.root_needs_eval[slot] = False
        self.searching[slot] = False
        self.times.tree += time.perf_counter() - t0
        return state


def _check_shapes(evaluator: Evaluator, priors: np.ndarray, values: np.ndarray, n: int, A: int) -> None:
    """Refuse an evaluation of the wrong shape before it enters a tree (non-finite numbers are
    refused by the store itself, before it writes anything)."""
    if getattr(priors, "shape", None) != (n, A) or getattr(values, "shape", None) != (n,):
        raise ConfigError(f"evaluator {type(evaluator).__name__} returned priors of shape "
                          f"{getattr(priors, 'shape', None)} and values of shape {getattr(values, 'shape', None)} "
                          f"for {n} leaves; expected ({n}, {A}) and ({n},)")


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
