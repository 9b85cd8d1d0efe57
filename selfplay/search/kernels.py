"""Compiled per-round tree work: descent with selection and virtual loss, backup, subtree reuse.

Every function here is a numba kernel over the flat node arrays of
:class:`selfplay.search.tree.BatchedSearch` (see its module docstring for the layout), so that a
round's tree work for all the games of a worker is one call per step instead of a few numpy
operations per tree level. Compiled with ``cache=True``: a worker process loads the machine code
from numba's cache instead of compiling at every start.

Arithmetic follows the numpy formulas it replaces operation by operation (float32 where those
ran in float32, float64 where they ran in float64), so PUCT searches choose the same moves as the
numpy version did. The Gumbel rule below the root sums in plain order where numpy summed
pairwise and calls the C library's ``exp``: its scores may differ from the numpy ones in the last
bits (``tests/test_search_kernels.py`` checks the selections agree on fixed inputs).

Selection rules below the root (``rule``): :data:`RULE_PUCT` and :data:`RULE_GUMBEL`.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from selfplay.search.root import RULE_GUMBEL, RULE_PUCT

__all__ = ["BLOCKED", "RULE_GUMBEL", "RULE_PUCT", "backup", "blocked_nodes", "descend", "finish_blocked",
           "gumbel_pick_rows", "move_rows", "new_children", "open_nodes", "puct_pick_rows", "store_evaluations",
           "subtree_order"]

_ONE = np.float32(1.0)
#: ``leaf`` of a descent that stopped at a node not yet ready (see :func:`descend`)
BLOCKED = -2


@njit(cache=True, inline="always")
def _puct_pick(P, N, Q, visits, node, c_puct):
    """PUCT: ``argmax_a Q + P * (c sqrt(max(1, sum N)) / (1 + N))`` in float32 (first maximum)."""
    v = visits[node]
    if v < _ONE:
        v = _ONE
    scale = c_puct * np.float32(np.sqrt(v))
    best = -np.inf
    pick = 0
    for a in range(P.shape[1]):
        s = Q[node, a] + P[node, a] * (scale / (_ONE + N[node, a]))
        if s > best:
            best = s
            pick = a
    return pick


@njit(cache=True, inline="always")
def _gumbel_pick(P, N, W, logP, legal, value, node, c_visit, c_scale, work):
    """Gumbel non-root rule ``argmax pi'(a) - N(a) / (1 + sum N)`` with ``pi'`` the improved policy
    ``softmax(log P + sigma(completedQ))`` (Danihelka et al. 2022, Sec. 5 and Appendix D)."""
    A = P.shape[1]
    total = np.float32(0.0)
    max_n = np.float32(0.0)
    p_vis = np.float32(0.0)
    pq = 0.0
    for a in range(A):
        n = N[node, a]
        total += n
        if n > max_n:
            max_n = n
        if n > 0:
            q = np.float64(W[node, a] / n)
            p_vis += P[node, a]
            pq += np.float64(P[node, a]) * q
    weighted = 0.0
    if p_vis > 0:
        floor = np.float32(1e-30)
        weighted = pq / np.float64(p_vis if p_vis > floor else floor)
    v_mix = (np.float64(value[node]) + np.float64(total) * weighted) / np.float64(_ONE + total)
    coef = (c_visit + np.float64(max_n)) * c_scale
    z_max = -np.inf
    for a in range(A):
        if legal[node, a]:
            n = N[node, a]
            cq = np.float64(W[node, a] / n) if n > 0 else v_mix
            z = np.float64(logP[node, a]) + coef * ((cq + 1.0) * 0.5)
            if z > z_max:
                z_max = z
        else:
            z = -np.inf
        work[a] = z
    e_sum = 0.0
    for a in range(A):
        if legal[node, a]:
            work[a] = np.exp(work[a] - z_max)
            e_sum += work[a]
    denom = _ONE + total
    best = -np.inf
    pick = 0
    for a in range(A):
        if legal[node, a]:
            s = work[a] / e_sum - np.float64(N[node, a] / denom)
            if s > best:
                best = s
                pick = a
    return pick


@njit(cache=True, inline="always")
def _pick(rule, P, N, W, Q, logP, visits, legal, value, node, c32, c_visit, c_scale, work):
    """The below-root selection ``rule``'s action at ``node``."""
    if rule == RULE_PUCT:
        return _puct_pick(P, N, Q, visits, node, c32)
    return _gumbel_pick(P, N, W, logP, legal, value, node, c_visit, c_scale, work)


@njit(cache=True, inline="always")
def _add_virtual_loss(edge_node, edge_act, lo, hi, N, W, Q, visits, vl):
    for e in range(lo, hi):
        n = edge_node[e]
        a = edge_act[e]
        N[n, a] += vl
        W[n, a] -= vl
        Q[n, a] = W[n, a] / N[n, a]
        visits[n] += vl


@njit(cache=True)
def descend(roots, forced, rule, P, N, W, Q, logP, visits, legal, value, child, terminal, pending, ready,
            c_puct, c_visit, c_scale, virtual_loss, edge_node, edge_act, offset, path_start, path_len,
            leaf):
    """One descent per entry of ``roots`` (each from a different game's tree).

    The first action is ``forced[j]`` where that is >= 0 (a root strategy's choice), else the
    selection ``rule``. A descent stops at an edge without a child (``leaf[j] = -1``: the caller
    creates the child), a terminal child or a child already waiting for evaluation (``leaf[j]``
    = that child), or at a child whose legal moves and priors are not worked out yet (not
    ``ready``: ``leaf[j] = BLOCKED``, the path ends with the edge into it and one edge slot after
    it is kept free; the caller works the child out and :func:`finish_blocked` takes the path on).
    The edges taken go to ``edge_node`` / ``edge_act`` from ``offset`` on, path ``j`` at
    ``path_start[j] : path_start[j] + path_len[j]`` (root first). With a non-zero
    ``virtual_loss`` each finished path's edges get visit +vl and value -vl at once.
    Returns (end offset, number of descents that stopped at a waiting child, number blocked)."""
    pos = offset
    collisions = 0
    blocked = 0
    c32 = np.float32(c_puct)
    vl = np.float32(virtual_loss)
    work = np.empty(P.shape[1], dtype=np.float64)
    for j in range(roots.size):
        node = roots[j]
        path_start[j] = pos
        depth = 0
        while True:
            if depth == 0 and forced[j] >= 0:
                a = forced[j]
            else:
                a = _pick(rule, P, N, W, Q, logP, visits, legal, value, node, c32, c_visit, c_scale, work)
            edge_node[pos] = node
            edge_act[pos] = a
            pos += 1
            depth += 1
            c = child[node, a]
            if c < 0:
                leaf[j] = -1
                break
            if terminal[c] or pending[c]:
                leaf[j] = c
                if pending[c]:
                    collisions += 1
                break
            if not ready[c]:
                leaf[j] = BLOCKED
                blocked += 1
                break
            node = c
        path_len[j] = depth
        if leaf[j] == BLOCKED:
            pos += 1  # the slot finish_blocked writes the path's last edge into
        elif vl != 0:
            _add_virtual_loss(edge_node, edge_act, path_start[j], pos, N, W, Q, visits, vl)
    return pos, collisions, blocked


@njit(cache=True)
def blocked_nodes(path_leaf, path_start, path_len, edge_node, edge_act, child, out):
    """The nodes the blocked paths (``path_leaf == BLOCKED``) stopped at, into ``out``; returns
    how many."""
    k = 0
    for j in range(path_leaf.size):
        if path_leaf[j] == BLOCKED:
            e = path_start[j] + path_len[j] - 1
            out[k] = child[edge_node[e], edge_act[e]]
            k += 1
    return k


@njit(cache=True)
def finish_blocked(rule, P, N, W, Q, logP, visits, legal, value, child, c_puct, c_visit, c_scale, virtual_loss,
                   edge_node, edge_act, path_start, path_len, leaf):
    """Take every blocked path (``leaf[j] == BLOCKED``, its node now worked out) one edge on:
    the selection ``rule``'s action at that node, into the slot :func:`descend` kept free. Such a
    node never has children (a move is chosen at a node only once it is ready), so the path
    ends at a new edge (``leaf[j] = -1``). Then the virtual loss, as :func:`descend` adds it."""
    c32 = np.float32(c_puct)
    vl = np.float32(virtual_loss)
    work = np.empty(P.shape[1], dtype=np.float64)
    for j in range(leaf.size):
        if leaf[j] != BLOCKED:
            continue
        e = path_start[j] + path_len[j]
        node = child[edge_node[e - 1], edge_act[e - 1]]
        a = _pick(rule, P, N, W, Q, logP, visits, legal, value, node, c32, c_visit, c_scale, work)
        if child[node, a] >= 0:
            raise AssertionError("a node that was not ready has a child")
        edge_node[e] = node
        edge_act[e] = a
        path_len[j] += 1
        leaf[j] = -1
        if vl != 0:
            _add_virtual_loss(edge_node, edge_act, path_start[j], e + 1, N, W, Q, visits, vl)


@njit(cache=True)
def backup(edge_node, edge_act, path_start, path_len, leaves, group_bounds, value, to_play, N, W, Q,
           visits, virtual_loss):
    """Add every path's leaf value to its edges (negated where the mover differs from the leaf's)
    and remove the virtual loss. Paths come in groups (one per descent of the round); within a
    group the edges are visited depth by depth, in path order, so float32 sums accumulate in a
    fixed order. Visit counts are rounded back to whole numbers when a virtual loss was used
    (float32 cannot hold 0.7, say, exactly); then Q = W / N on every touched edge."""
    vl = np.float32(virtual_loss)
    one = np.float32(1.0 - virtual_loss)
    for g in range(group_bounds.size - 1):
        lo = group_bounds[g]
        hi = group_bounds[g + 1]
        deepest = 0
        for j in range(lo, hi):
            if path_len[j] > deepest:
                deepest = path_len[j]
        for d in range(deepest):
            for j in range(lo, hi):
                if d < path_len[j]:
                    e = path_start[j] + d
                    node = edge_node[e]
                    a = edge_act[e]
                    lf = leaves[j]
                    v = value[lf]
                    if to_play[node] != to_play[lf]:
                        v = -v
                    N[node, a] += one
                    W[node, a] += v + vl
                    visits[node] += one
    for j in range(path_start.size):
        for e in range(path_start[j], path_start[j] + path_len[j]):
            node = edge_node[e]
            a = edge_act[e]
            if vl != 0:
                N[node, a] = np.rint(N[node, a])
                visits[node] = np.rint(visits[node])
            Q[node, a] = W[node, a] / N[node, a]


@njit(cache=True)
def new_children(lo, hi, path_leaf, path_len, path_start, path_slot, edge_node, edge_act, base, count, N, W,
                 visits, child, terminal, pending, ready, now_ready, new, parents, actions, slots, created):
    """The paths ``lo:hi`` that stopped at an edge with no child, shallowest first (ties in path
    order), each given its child: the next free node of its slot's region (``count`` grows),
    its visits, values and children cleared, not terminal and waiting for evaluation (the
    caller marks those that end the game), ``ready`` = ``now_ready``, linked under its parent and
    recorded as the path's leaf. Its legal moves are written by the caller (the rules: now, or
    when the node is first opened), its priors and Q row when it is evaluated (or opened); a
    node that ends the game is never evaluated and its priors are never read. Writes the paths,
    the parents, actions, slots and new nodes into the first entries of ``new``, ``parents``,
    ``actions``, ``slots`` and ``created``; returns how many."""
    k = 0
    for j in range(lo, hi):
        if path_leaf[j] < 0:
            d = path_len[j]
            i = k
            while i > 0 and path_len[new[i - 1]] > d:
                new[i] = new[i - 1]
                i -= 1
            new[i] = j
            k += 1
    for i in range(k):
        j = new[i]
        e = path_start[j] + path_len[j] - 1
        s = path_slot[j]
        node = base[s] + count[s]
        count[s] += 1
        parents[i] = edge_node[e]
        actions[i] = edge_act[e]
        slots[i] = s
        created[i] = node
        path_leaf[j] = node
        for a in range(N.shape[1]):
            N[node, a] = 0.0
            W[node, a] = 0.0
            child[node, a] = -1
        visits[node] = 0.0
        terminal[node] = False
        pending[node] = True
        ready[node] = now_ready
        child[edge_node[e], edge_act[e]] = node
    return k


@njit(cache=True, inline="always")
def _all_finite(policy, values):
    """Whether every number of an evaluation (policy rows and values) is finite."""
    for i in range(values.size):
        if not np.isfinite(values[i]):
            return False
        for a in range(policy.shape[1]):
            if not np.isfinite(policy[i, a]):
                return False
    return True


@njit(cache=True, inline="always")
def _softmax_over_legal(logits, P, node, legal):
    """``P[node]`` = the softmax of ``logits`` (which may be ``P[node]`` itself) over the node's
    legal moves, 0 on the others, in float32."""
    A = P.shape[1]
    top = np.float32(-np.inf)
    for a in range(A):
        if legal[node, a] and logits[a] > top:
            top = logits[a]
    total = np.float32(0.0)
    for a in range(A):
        e = np.exp(logits[a] - top) if legal[node, a] else np.float32(0.0)
        P[node, a] = e
        total += e
    scale = np.float32(1.0) / total
    for a in range(A):
        P[node, a] *= scale


@njit(cache=True, inline="always")
def _first_play_q(Q, node, legal, q):
    """Q = ``q`` (first-play urgency) on the node's legal edges, -inf on the others."""
    for a in range(Q.shape[1]):
        Q[node, a] = q if legal[node, a] else -np.inf


@njit(cache=True)
def store_evaluations(nodes, policy, values, unvisited_value_penalty, P, value, Q, legal, pending, ready,
                      from_logits):
    """Write an evaluation into the tree: priors and value of each node; Q = value - penalty
    (float32, first-play urgency) on legal edges and -inf on illegal ones; no longer pending.
    ``policy`` holds the priors, or with ``from_logits`` raw policy logits, whose softmax over
    the node's legal moves (0 on the others) is computed in float32 as the row is written instead
    of in a separate pass over the batch (the numpy form,
    :func:`selfplay.evaluators.softmax_over_legal`, agrees to float32 rounding). A node not
    ``ready`` (its legal moves not known yet; only with ``from_logits``) keeps its raw logits in
    ``P`` and gets no Q row: :func:`open_nodes` finishes it. Returns False, writing nothing,
    when a number of ``policy`` or ``values`` is not finite."""
    if not _all_finite(policy, values):
        return False
    penalty = np.float32(unvisited_value_penalty)
    A = P.shape[1]
    for i in range(nodes.size):
        node = nodes[i]
        v = values[i]
        value[node] = v
        pending[node] = False
        if not ready[node]:
            for a in range(A):
                P[node, a] = policy[i, a]
            continue
        _first_play_q(Q, node, legal, v - penalty)
        if not from_logits:
            for a in range(A):
                P[node, a] = policy[i, a]
        else:
            _softmax_over_legal(policy[i], P, node, legal)
    return True


@njit(cache=True)
def open_nodes(nodes, unvisited_value_penalty, P, value, Q, legal, ready):
    """Finish nodes evaluated before their legal moves were known, now that ``legal`` holds
    them: the raw logits kept in ``P`` become priors (softmax over the legal moves, as
    :func:`store_evaluations` computes them), the Q row its first-play values; ready."""
    penalty = np.float32(unvisited_value_penalty)
    for i in range(nodes.size):
        node = nodes[i]
        _first_play_q(Q, node, legal, value[node] - penalty)
        _softmax_over_legal(P[node], P, node, legal)
        ready[node] = True


@njit(cache=True)
def subtree_order(child, top, out):
    """Nodes of the subtree under ``top`` (``top`` included) in ascending id order into ``out``;
    returns their number. A child's id is always larger than its parent's, so ``out[0] == top``,
    and copying row ``out[i]`` to the ``i``-th row of the region, in increasing ``i``, never
    overwrites a row still to be read."""
    out[0] = top
    count = 1
    head = 0
    while head < count:
        node = out[head]
        head += 1
        for a in range(child.shape[1]):
            c = child[node, a]
            if c >= 0:
                out[count] = c
                count += 1
    out[:count].sort()
    return count


@njit(cache=True)
def move_rows(keep, base, P, N, W, Q, legal, child, to_play, terminal, value, pending, ready, visits, logP):
    """Copy the rows of nodes ``keep`` (ascending ids, from :func:`subtree_order`) to rows
    ``base, base + 1, ...`` and renumber their child ids the same way. ``logP`` is moved too when
    it has a row per node."""
    total = keep.size
    span = keep[total - 1] - base + 1
    remap = np.full(span, -1, dtype=np.int64)
    for i in range(total):
        remap[keep[i] - base] = base + i
    with_log = logP.shape[0] == P.shape[0]
    for i in range(total):
        src = keep[i]
        dst = base + i
        for a in range(P.shape[1]):
            c = child[src, a]
            child[dst, a] = -1 if c < 0 else remap[c - base]
            if src != dst:
                P[dst, a] = P[src, a]
                N[dst, a] = N[src, a]
                W[dst, a] = W[src, a]
                Q[dst, a] = Q[src, a]
                legal[dst, a] = legal[src, a]
                if with_log:
                    logP[dst, a] = logP[src, a]
        to_play[dst] = to_play[src]
        terminal[dst] = terminal[src]
        value[dst] = value[src]
        pending[dst] = pending[src]
        ready[dst] = ready[src]
        visits[dst] = visits[src]


# ---- row-wise forms for tests and one-off use ---------------------------------------------------

@njit(cache=True)
def puct_pick_rows(P, N, Q, visits, c_puct):
    """The kernel's PUCT choice for every row (int64 (k,))."""
    out = np.empty(P.shape[0], dtype=np.int64)
    c32 = np.float32(c_puct)
    for i in range(P.shape[0]):
        out[i] = _puct_pick(P, N, Q, visits, i, c32)
    return out


@njit(cache=True)
def gumbel_pick_rows(P, N, W, logP, legal, value, c_visit, c_scale):
    """The kernel's Gumbel non-root choice for every row (int64 (k,))."""
    out = np.empty(P.shape[0], dtype=np.int64)
    work = np.empty(P.shape[1], dtype=np.float64)
    for i in range(P.shape[0]):
        out[i] = _gumbel_pick(P, N, W, logP, legal, value, i, c_visit, c_scale, work)
    return out
