"""Go positions of a search tree kept in rows of shared arrays, one row per tree node.

The search (:class:`selfplay.search.tree.BatchedSearch`) creates a node per simulation. With
one :class:`~selfplay.games.go.GoState` object per node, every round spent Python time gathering
the parents' arrays into a batch and wrapping each child in an object again. Here a node's
position lives in row ``i`` of a few arrays — the same row number as the node in the tree — and
one compiled call (:func:`expand_rows`) plays every new edge of a round from its parent's row
into its child's row, writing the child's legal mask straight into the tree.

Per row: ``hist`` int8 (H, N) the board and the boards before it, ``grp`` the group table (see
:mod:`selfplay.games.go_kernel`), ``key`` / ``prev_key`` the board's Zobrist key and the one
before the last move, ``player`` to move (0 Black), ``passes`` consecutive passes, ``moves``
moves played, ``peak`` the most stones a board of the game so far held, and ``parent`` the row of
the node's parent (-1 at a root).

Positional superko needs every board key of the game so far. A node's keys are its root's keys
(``root_seen`` per game, sorted) plus the keys of the node and of its ancestors below the root,
found by walking ``parent`` (a few steps: the tree is shallow). No row holds a copy of the game's
key list, and expanding a node copies none: the root's keys are searched where they lie and the
path's few keys are scanned.

Results are those of :meth:`selfplay.games.go.GoGame.play_with_mask` move for move
(``tests/test_go_pool.py``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Iterator, Sequence

import numpy as np
from numba import njit

from selfplay.games import go_kernel as K

if TYPE_CHECKING:
    from selfplay.games.go import GoGame, GoState


#: columns of a row's scalars (``meta``), one cache line per row
KEY, PREV_KEY, PLAYER, PASSES, MOVES, PEAK, PARENT = range(7)
META_COLUMNS = 8


def _line_aligned_rows(rows: int) -> np.ndarray:
    """int64 (rows, META_COLUMNS) zeros starting on a 64-byte boundary, so that each row's
    scalars share one cache line (a node costs one memory access for them, not seven)."""
    raw = np.zeros(rows * META_COLUMNS + 8, dtype=np.int64)
    skip = (-raw.ctypes.data % 64) // 8
    return raw[skip:skip + rows * META_COLUMNS].reshape(rows, META_COLUMNS)


@njit(cache=True, inline="always")
def _add_key(keys, m, key):
    """Insert ``key`` into the sorted ``keys[:m]`` in place (nothing when present); new length."""
    lo = K.lower_bound(keys, m, key)
    if lo < m and keys[lo] == key:
        return m
    for j in range(m, lo, -1):
        keys[j] = keys[j - 1]
    keys[lo] = key
    return m + 1


@njit(cache=True)
def gather_seen(row, meta, root_seen, root_seen_len, capacity, out):
    """The sorted board keys of the game up to the node in ``row`` into ``out``: its root's keys
    and the keys of the node and its ancestors below the root. Returns their number."""
    slot = row // capacity
    m = root_seen_len[slot]
    out[:m] = root_seen[slot, :m]
    q = row
    while meta[q, PARENT] >= 0:
        m = _add_key(out, m, meta[q, KEY])
        q = meta[q, PARENT]
    return m


@njit(cache=True)
def expand_rows(hist, grp, meta, root_seen, root_seen_len, capacity, parents, actions, rows, allow_suicide,
                superko, nbr, zob, nwords, max_moves, legal, to_play, path_keys, status, ended):
    """Play ``actions[i]`` from the position in row ``parents[i]`` into row ``rows[i]`` (which
    becomes its child) for every ``i``; the child's legal mask goes to ``legal[rows[i]]`` (all
    False when the child ends the game: a second pass or the move cap) and ``ended[i]`` says
    so; the player to move there (0 Black) to ``to_play[rows[i]]``. ``status[i]``:
    :data:`~selfplay.games.go_kernel.OK` or why the move is illegal. Returns how many were
    illegal.

    The earlier boards of a child's game are its root's sorted keys, looked up where they lie,
    and the keys of the parent and its ancestors below the root, gathered into the scratch
    buffer ``path_keys`` (at least the tree's depth long): nothing is copied per child."""
    n = nbr.shape[0]
    no_mask = np.zeros(0, dtype=np.bool_)
    no_keys = path_keys[:0]
    refused = 0
    for i in range(rows.size):
        p = parents[i]
        c = rows[i]
        a = actions[i]
        ended[i] = False
        pm = meta[p]
        if pm[PASSES] >= 2 or pm[MOVES] >= max_moves:
            status[i] = K.OVER
            refused += 1
            continue
        if a < 0 or a > n:
            status[i] = K.OFF_BOARD
            refused += 1
            continue
        slot = p // capacity
        seen = root_seen[slot, :root_seen_len[slot]]
        depth = 0
        q = p
        while meta[q, PARENT] >= 0:
            path_keys[depth] = meta[q, KEY]
            depth += 1
            q = meta[q, PARENT]
        extra = path_keys[:depth]
        cm = meta[c]
        cm[PARENT] = p
        cm[PLAYER] = 1 - pm[PLAYER]
        to_play[c] = cm[PLAYER]
        cm[MOVES] = pm[MOVES] + 1
        cm[PREV_KEY] = pm[KEY]
        ends = cm[MOVES] >= max_moves
        if a == n:  # pass: the same board again, the same groups and keys
            hist[c, 1:] = hist[p, :-1]
            hist[c, 0] = hist[p, 0]
            grp[c] = grp[p]
            cm[KEY] = pm[KEY]
            cm[PEAK] = pm[PEAK]
            cm[PASSES] = pm[PASSES] + 1
            status[i] = K.OK
            if cm[PASSES] >= 2 or ends:
                legal[c, :] = False
                ended[i] = True
            else:
                board = hist[c, 0]
                K._legal_points(board, grp[c], seen, extra, cm[KEY], cm[KEY], cm[PLAYER] + 1, allow_suicide, superko,
                                nbr, zob, nwords, K._stone_count(board) >= cm[PEAK], legal[c])
                legal[c, n] = True
            continue
        mask = no_mask if ends else legal[c]
        st, nk, _, new_peak = K.play_history(hist[p], grp[p], seen, extra, pm[KEY], pm[PREV_KEY], pm[PLAYER] + 1, a,
                                             allow_suicide, superko, nbr, zob, nwords, pm[PEAK], hist[c], grp[c],
                                             no_keys, mask)
        status[i] = st
        refused += st != K.OK
        cm[KEY] = nk
        cm[PEAK] = new_peak
        cm[PASSES] = 0
        if ends:
            legal[c, :] = False
            ended[i] = True
    return refused


@njit(cache=True)
def move_rows(keep, base, hist, grp, meta):
    """Copy rows ``keep`` (ascending, the subtree's top first) to rows ``base, base + 1, ...``
    (a row is never overwritten before it is read: ``keep[i] >= base + i``), parent rows
    renumbered the same way; the top becomes a root (parent -1)."""
    total = keep.size
    remap = np.full(keep[total - 1] - base + 1, -1, dtype=np.int64)
    for i in range(total):
        remap[keep[i] - base] = base + i
    for i in range(total):
        src = keep[i]
        dst = base + i
        new_parent = -1 if i == 0 else remap[meta[src, PARENT] - base]
        if src != dst:
            hist[dst] = hist[src]
            grp[dst] = grp[src]
            meta[dst] = meta[src]
        meta[dst, PARENT] = new_parent


class GoStatePool:
    """The positions of ``slots`` games' search trees, ``capacity`` rows per game (row ``i``
    belongs to game ``i // capacity``); see the module docstring."""

    def __init__(self, game: GoGame, slots: int, capacity: int) -> None:
        self.game = game
        self.capacity = capacity
        rows = slots * capacity
        n, h = game.size * game.size, game.history
        group_cols = game._initial.groups.shape[1]
        # rows are always written before they are read: np.empty leaves unused pages uncommitted
        self.hist = np.empty((rows, h, n), dtype=np.int8)
        self.grp = np.empty((rows, n, group_cols), dtype=np.int64)
        self.meta = _line_aligned_rows(rows)
        self.meta[:, PARENT] = -1
        self._seen_room = game.max_moves + 2
        self.root_seen = np.zeros((slots, self._seen_room), dtype=np.int64)
        self.root_seen_len = np.zeros(slots, dtype=np.int64)
        self._alloc_scratch()

    @staticmethod
    def bytes_per_row(game: GoGame) -> int:
        """Memory one row takes (the per-game key lists not counted)."""
        n = game.size * game.size
        return game.history * n + n * game._initial.groups.shape[1] * 8 + META_COLUMNS * 8

    def _alloc_scratch(self) -> None:
        self._merged = np.empty(self._seen_room + self.capacity + 1, dtype=np.int64)
        self._path_keys = np.empty(self.capacity + 1, dtype=np.int64)
        self._status = np.empty(0, dtype=np.int64)
        self._ended = np.empty(0, dtype=np.bool_)

    # ---- roots -------------------------------------------------------------------------------
    def store_root(self, slot: int, row: int, state: GoState) -> None:
        """Make ``state`` the root position of ``slot``'s tree, in ``row``."""
        if state.seen.shape[0] > self._seen_room:  # a position from outside with a longer past
            self._seen_room = int(state.seen.shape[0]) + 2
            grown = np.zeros((self.root_seen.shape[0], self._seen_room), dtype=np.int64)
            grown[:, :self.root_seen.shape[1]] = self.root_seen
            self.root_seen = grown
            self._alloc_scratch()
        self.hist[row] = state.history
        self.grp[row] = state.groups
        m = self.meta[row]
        m[KEY], m[PREV_KEY], m[PLAYER], m[PASSES] = state.key, state.prev_key, state.player, state.passes
        m[MOVES], m[PEAK], m[PARENT] = state.moves, state.peak, -1
        self.root_seen[slot, :state.seen.shape[0]] = state.seen
        self.root_seen_len[slot] = state.seen.shape[0]

    def reroot(self, slot: int, keep: np.ndarray, base: int) -> None:
        """The subtree of rows ``keep`` (ascending, its top first) becomes the slot's tree in
        rows ``base, base + 1, ...``: its top the new root (its keys join the game's), parent
        rows renumbered like the tree's child ids."""
        top = int(keep[0])
        m = gather_seen(top, self.meta, self.root_seen, self.root_seen_len, self.capacity, self._merged)
        if m > self._seen_room:
            raise ValueError(f"go game history of {m} positions exceeds the search's room of {self._seen_room}")
        self.root_seen[slot, :m] = self._merged[:m]
        self.root_seen_len[slot] = m
        move_rows(np.ascontiguousarray(keep, dtype=np.int64), base, self.hist, self.grp, self.meta)

    # ---- expansion -----------------------------------------------------------------------------
    def expand(self, parents: np.ndarray, actions: np.ndarray, rows: np.ndarray, legal: np.ndarray,
               to_play: np.ndarray) -> np.ndarray:
        """Play each ``actions[i]`` from row ``parents[i]`` into row ``rows[i]``, the child's legal
        mask into ``legal[rows[i]]`` and the player to move there into ``to_play[rows[i]]``
        (int8, 0 Black); returns whether each child ends the game (bool, valid until the next
        call). An illegal move raises the rules' IllegalMoveError."""
        g = self.game
        k = rows.size
        if self._status.size < k:
            self._status = np.empty(k, dtype=np.int64)
            self._ended = np.empty(k, dtype=np.bool_)
        status, ended = self._status[:k], self._ended[:k]
        parents = np.ascontiguousarray(parents, dtype=np.int64)
        actions = np.ascontiguousarray(actions, dtype=np.int64)
        rows = np.ascontiguousarray(rows, dtype=np.int64)
        if expand_rows(self.hist, self.grp, self.meta, self.root_seen, self.root_seen_len, self.capacity, parents,
                       actions, rows, g.allow_suicide, g.superko, g._nbr, g._zob, g._nwords, g.max_moves, legal,
                       to_play, self._path_keys, status, ended):
            i = int(np.flatnonzero(status)[0])
            g.play(self.load(int(parents[i])), int(actions[i]))  # raises the rules' own message
            raise AssertionError(f"go pool: move {int(actions[i])} refused with status {int(status[i])}")  # pragma: no cover
        return ended

    # ---- reading -------------------------------------------------------------------------------
    def load(self, row: int) -> GoState:
        """The position in ``row`` as a GoState of its own (arrays copied)."""
        from selfplay.games.go import GoState

        m = gather_seen(row, self.meta, self.root_seen, self.root_seen_len, self.capacity, self._merged)
        key, prev_key, player, passes, moves, peak = (int(v) for v in self.meta[row, :PARENT])
        return GoState(self.hist[row].copy(), self.grp[row].copy(), self._merged[:m].copy(), key, prev_key, player,
                       passes, moves, peak)

    def histories(self, rows: np.ndarray) -> np.ndarray:
        """int8 (k, H, size, size): the network's compact input boards of ``rows``."""
        g = self.game
        return self.hist[rows].reshape(len(rows), g.history, g.size, g.size)

    def states(self, rows: np.ndarray) -> PooledStates:
        """``rows`` as a sequence of states, made on access (see :class:`PooledStates`)."""
        return PooledStates(self, np.asarray(rows, dtype=np.int64))


class PooledStates(Sequence["GoState"]):
    """Positions of pool rows as a read-only sequence: an evaluator that wants the network's
    input reads :meth:`histories` (one gather); one that wants states (rollouts) gets each made
    when asked for."""

    def __init__(self, pool: GoStatePool, rows: np.ndarray) -> None:
        self.pool = pool
        self.rows = rows

    def __len__(self) -> int:
        return int(self.rows.size)

    def __getitem__(self, i):  # type: ignore[override]
        if isinstance(i, slice):
            return [self.pool.load(int(r)) for r in self.rows[i]]
        return self.pool.load(int(self.rows[i]))

    def __iter__(self) -> Iterator[GoState]:
        return (self.pool.load(int(r)) for r in self.rows)

    def histories(self) -> np.ndarray:
        return self.pool.histories(self.rows)
