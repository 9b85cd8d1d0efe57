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
moves played, ``peak`` the most stones a board of the game so far held, ``parent`` the row of
the node's parent (-1 at a root) and ``action`` the move that led there from the parent.

Deferred group tables. A search creates a node for every simulation, but most nodes stay
leaves: only the few it later chooses a move at need their groups and legal moves. So
:meth:`GoStatePool.expand` can make a child's boards and key alone (reading the parent's groups,
writing none: about a sixth of the bytes of a full row) and leave the group table and the mask to
:meth:`GoStatePool.build`, run when the search first needs them; ``built`` says which rows have
their table. :meth:`GoStatePool.load` builds a row before reading it.

Positional superko needs every board key of the game so far. A node's keys are its root's keys
(``root_seen`` per game, sorted) plus the keys of the node and of its ancestors below the root,
found by walking ``parent`` (a few steps: the tree is shallow). No row holds a copy of the game's
key list, and expanding a node copies none: the root's keys are searched where they lie and the
path's few keys are scanned.

Results are those of :meth:`selfplay.games.go.GoGame.play_with_mask` move for move
(``tests/test_go_pool.py``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numba import njit

from selfplay.arrays import RowItems, resident_zeros
from selfplay.games import go_kernel as K

if TYPE_CHECKING:
    from selfplay.games.go import GoGame, GoState


#: columns of a row's scalars (``meta``), one cache line per row
KEY, PREV_KEY, PLAYER, PASSES, MOVES, PEAK, PARENT, ACTION = range(8)
META_COLUMNS = 8


def _line_aligned_rows(rows: int) -> np.ndarray:
    """int64 (rows, META_COLUMNS) zeros starting on a 64-byte boundary, so that each row's
    scalars share one cache line (a node costs one memory access for them, not seven)."""
    raw = resident_zeros(rows * META_COLUMNS + 8, np.int64)
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


@njit(cache=True, inline="always")
def _path_keys(meta, p, path_keys):
    """The keys of row ``p`` and its ancestors below the root (the root's own keys are in the
    game's list), gathered into the scratch buffer ``path_keys``."""
    depth = 0
    q = p
    while meta[q, PARENT] >= 0:
        path_keys[depth] = meta[q, KEY]
        depth += 1
        q = meta[q, PARENT]
    return path_keys[:depth]


@njit(cache=True)
def _build_row(hist, grp, meta, built, root_seen, root_seen_len, capacity, c, allow_suicide, superko, nbr, zob,
               nwords, max_moves, path_keys, mask):
    """Play row ``c``'s move (column ``ACTION``; its parent, player, moves and passes already
    in ``meta``, and for a pass its key and peak) in full from its built parent's row: its
    boards, its group table, and with a non-empty ``mask`` its legal mask (all False when the
    position ends the game). Returns (the rules' status, the new board's key, the game's peak
    stone count after the move); only on OK does the row count as built."""
    n = nbr.shape[0]
    p = meta[c, PARENT]
    a = meta[c, ACTION]
    pm = meta[p]
    cm = meta[c]
    slot = p // capacity
    seen = root_seen[slot, :root_seen_len[slot]]
    extra = _path_keys(meta, p, path_keys)
    over = cm[PASSES] >= 2 or cm[MOVES] >= max_moves
    if a == n:  # pass: the same board again, the same groups and keys
        hist[c, 1:] = hist[p, :-1]
        hist[c, 0] = hist[p, 0]
        grp[c] = grp[p]
        if mask.shape[0] > 0 and not over:
            board = hist[c, 0]
            K._legal_points(board, grp[c], seen, extra, cm[KEY], cm[KEY], cm[PLAYER] + 1, allow_suicide,
                            superko, nbr, zob, nwords, K._stone_count(board) >= cm[PEAK], mask)
            mask[n] = True
        st, nk, peak = K.OK, pm[KEY], pm[PEAK]
    else:
        st, nk, _, peak = K.play_history(hist[p], grp[p], seen, extra, pm[KEY], pm[PREV_KEY], pm[PLAYER] + 1, a,
                                         allow_suicide, superko, nbr, zob, nwords, pm[PEAK], hist[c], grp[c],
                                         path_keys[:0], mask[:0] if over else mask)
    if st == K.OK:
        if over and mask.shape[0] > 0:
            mask[:] = False
        built[c] = True
    return st, nk, peak


@njit(cache=True)
def _rebuild_row(hist, grp, meta, built, root_seen, root_seen_len, capacity, c, allow_suicide, superko, nbr, zob,
                 nwords, max_moves, path_keys, mask):
    """:func:`_build_row` for a row :func:`expand_rows` made without its table: the rules'
    status, or ``OVER`` when the full move's key disagrees with the one the row was given."""
    st, nk, _ = _build_row(hist, grp, meta, built, root_seen, root_seen_len, capacity, c, allow_suicide, superko, nbr,
                           zob, nwords, max_moves, path_keys, mask)
    if st == K.OK and nk != meta[c, KEY]:
        built[c] = False
        return K.OVER
    return st


@njit(cache=True)
def _build_chain(hist, grp, meta, built, root_seen, root_seen_len, capacity, row, allow_suicide, superko, nbr, zob,
                 nwords, max_moves, path_keys, stack):
    """Build the group tables of ``row`` and of its ancestors that have none, top down (no
    masks). Returns the rules' status."""
    depth = 0
    q = row
    while not built[q]:
        if meta[q, PARENT] < 0:
            return K.OVER  # a root always has its table: never reached
        stack[depth] = q
        depth += 1
        q = meta[q, PARENT]
    no_mask = np.zeros(0, dtype=np.bool_)
    for i in range(depth - 1, -1, -1):
        st = _rebuild_row(hist, grp, meta, built, root_seen, root_seen_len, capacity, stack[i], allow_suicide,
                          superko, nbr, zob, nwords, max_moves, path_keys, no_mask)
        if st != K.OK:
            return st
    return K.OK


@njit(cache=True)
def build_rows(hist, grp, meta, built, root_seen, root_seen_len, capacity, rows, allow_suicide, superko, nbr, zob,
               nwords, max_moves, legal, with_masks, path_keys, stack):
    """Give each of ``rows`` its group table (and its ancestors theirs, where missing); with
    ``with_masks`` also its legal mask into ``legal[row]`` (a row that has its table gets it
    built again with the mask). Returns the index of the first row whose move the rules
    refuse, or -1."""
    no_mask = np.zeros(0, dtype=np.bool_)
    for i in range(rows.size):
        c = rows[i]
        if built[c] and not with_masks:
            continue
        p = meta[c, PARENT]
        if p < 0:  # a root: its table came with it; its mask is the caller's
            continue
        if not built[p]:
            if _build_chain(hist, grp, meta, built, root_seen, root_seen_len, capacity, p, allow_suicide, superko, nbr,
                            zob, nwords, max_moves, path_keys, stack) != K.OK:
                return i
        if _rebuild_row(hist, grp, meta, built, root_seen, root_seen_len, capacity, c, allow_suicide, superko, nbr,
                        zob, nwords, max_moves, path_keys, legal[c] if with_masks else no_mask) != K.OK:
            return i
    return -1


@njit(cache=True)
def expand_rows(hist, grp, meta, built, root_seen, root_seen_len, capacity, parents, actions, rows, allow_suicide,
                superko, nbr, zob, nwords, max_moves, legal, to_play, path_keys, stack, status, ended, build):
    """Play ``actions[i]`` from the position in row ``parents[i]`` into row ``rows[i]`` (which
    becomes its child) for every ``i``; the player to move there (0 Black) goes to
    ``to_play[rows[i]]``, and ``ended[i]`` says whether the child ends the game (a second pass
    or the move cap; its mask is then all False). ``status[i]``:
    :data:`~selfplay.games.go_kernel.OK` or why the move is illegal. Returns how many were
    illegal.

    With ``build`` each child gets its group table and its legal mask in ``legal[rows[i]]``.
    Without, only its boards, key and scalars (:func:`~selfplay.games.go_kernel.play_board`):
    the table and the mask wait for :func:`build_rows`, and a move into a repeated position is
    caught only then (the caller plays moves the parent's mask allows). A parent without its
    table gets it first.

    The earlier boards of a child's game are its root's sorted keys, looked up where they lie,
    and the keys of the parent and its ancestors below the root, gathered into the scratch
    buffer ``path_keys`` (at least the tree's depth long): nothing is copied per child."""
    n = nbr.shape[0]
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
        if not built[p]:
            st = _build_chain(hist, grp, meta, built, root_seen, root_seen_len, capacity, p, allow_suicide, superko,
                              nbr, zob, nwords, max_moves, path_keys, stack)
            if st != K.OK:
                status[i] = st
                refused += 1
                continue
        cm = meta[c]
        cm[PARENT] = p
        cm[ACTION] = a
        cm[PLAYER] = 1 - pm[PLAYER]
        to_play[c] = cm[PLAYER]
        cm[MOVES] = pm[MOVES] + 1
        cm[PREV_KEY] = pm[KEY]
        if a == n:  # pass: the same board again, the same groups and keys
            cm[KEY] = pm[KEY]
            cm[PEAK] = pm[PEAK]
            cm[PASSES] = pm[PASSES] + 1
        else:
            cm[PASSES] = 0
        over = cm[PASSES] >= 2 or cm[MOVES] >= max_moves
        built[c] = False
        if build:
            st, nk, peak = _build_row(hist, grp, meta, built, root_seen, root_seen_len, capacity, c, allow_suicide,
                                      superko, nbr, zob, nwords, max_moves, path_keys, legal[c])
        elif a == n:
            hist[c, 1:] = hist[p, :-1]
            hist[c, 0] = hist[p, 0]
            st, nk, peak = K.OK, pm[KEY], pm[PEAK]
        else:
            st, nk, stones = K.play_board(hist[p], grp[p], pm[KEY], pm[PLAYER] + 1, a, allow_suicide, nbr, zob,
                                          nwords, hist[c])
            peak = stones if stones > pm[PEAK] else pm[PEAK]
        status[i] = st
        refused += st != K.OK
        cm[KEY] = nk
        cm[PEAK] = peak
        if over:
            legal[c, :] = False
            ended[i] = True
    return refused


@njit(cache=True)
def move_rows(keep, base, hist, grp, meta, built):
    """Copy rows ``keep`` (ascending, the subtree's top first) to rows ``base, base + 1, ...``
    (a row is never overwritten before it is read: ``keep[i] >= base + i``), parent rows
    renumbered the same way; the top becomes a root (parent -1). A row without its group
    table moves without it."""
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
            if built[src]:
                grp[dst] = grp[src]
            built[dst] = built[src]
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
        # written now, not row by row in the hot loop (see selfplay.arrays.resident_zeros)
        self.hist = resident_zeros((rows, h, n), np.int8)
        self.grp = resident_zeros((rows, n, group_cols), np.int64)
        self.meta = _line_aligned_rows(rows)
        self.meta[:, PARENT] = -1
        #: whether the row's group table is in place (a row expanded with ``build=False`` gets
        #: it when :meth:`build` or :meth:`load` first needs it)
        self.built = np.zeros(rows, dtype=np.bool_)
        self._seen_room = game.max_moves + 2
        self.root_seen = np.zeros((slots, self._seen_room), dtype=np.int64)
        self.root_seen_len = np.zeros(slots, dtype=np.int64)
        self._alloc_scratch()

    @staticmethod
    def bytes_per_row(game: GoGame) -> int:
        """Memory one row takes (the per-game key lists not counted)."""
        n = game.size * game.size
        return game.history * n + n * game._initial.groups.shape[1] * 8 + META_COLUMNS * 8 + 1

    def _alloc_scratch(self) -> None:
        self._merged = np.empty(self._seen_room + self.capacity + 1, dtype=np.int64)
        self._path_keys = np.empty(self.capacity + 1, dtype=np.int64)
        self._stack = np.empty(self.capacity + 1, dtype=np.int64)
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
        m[MOVES], m[PEAK], m[PARENT], m[ACTION] = state.moves, state.peak, -1, -1
        self.built[row] = True
        self.root_seen[slot, :state.seen.shape[0]] = state.seen
        self.root_seen_len[slot] = state.seen.shape[0]

    def make_root(self, slot: int, row: int) -> None:
        """The position in ``row`` becomes the root of ``slot``'s tree where it lies: its keys
        join the game's, its link to its parent is cut (the rows of its subtree keep theirs;
        the others are dead until :meth:`reroot` compacts the region)."""
        if not self.built[row]:
            self._build(np.array([row], dtype=np.int64), None)
        m = gather_seen(row, self.meta, self.root_seen, self.root_seen_len, self.capacity, self._merged)
        if m > self._seen_room:
            raise ValueError(f"go game history of {m} positions exceeds the search's room of {self._seen_room}")
        self.root_seen[slot, :m] = self._merged[:m]
        self.root_seen_len[slot] = m
        self.meta[row, PARENT] = -1

    def reroot(self, slot: int, keep: np.ndarray, base: int) -> None:
        """The subtree of rows ``keep`` (ascending, its top first) becomes the slot's tree in
        rows ``base, base + 1, ...``: its top the new root (its keys join the game's), parent
        rows renumbered like the tree's child ids."""
        self.make_root(slot, int(keep[0]))
        move_rows(np.ascontiguousarray(keep, dtype=np.int64), base, self.hist, self.grp, self.meta, self.built)

    # ---- expansion -----------------------------------------------------------------------------
    def expand(self, parents: np.ndarray, actions: np.ndarray, rows: np.ndarray, legal: np.ndarray,
               to_play: np.ndarray, *, build: bool = True) -> np.ndarray:
        """Play each ``actions[i]`` from row ``parents[i]`` into row ``rows[i]``, the player to
        move there into ``to_play[rows[i]]`` (int8, 0 Black); returns whether each child ends the
        game (bool, valid until the next call; an ended child's mask is all False). An illegal
        move raises the rules' IllegalMoveError.

        ``build``: the child's group table and legal mask (into ``legal[rows[i]]``) now. With
        ``build=False`` only its boards and key are made, and :meth:`build` makes the rest when
        a search first needs the child's legal moves (most leaves of a search never do); the
        moves must then be ones the parents' masks allow (a repeated position is caught only
        when the child is built)."""
        g = self.game
        k = rows.size
        if self._status.size < k:
            self._status = np.empty(k, dtype=np.int64)
            self._ended = np.empty(k, dtype=np.bool_)
        status, ended = self._status[:k], self._ended[:k]
        parents = np.ascontiguousarray(parents, dtype=np.int64)
        actions = np.ascontiguousarray(actions, dtype=np.int64)
        rows = np.ascontiguousarray(rows, dtype=np.int64)
        if expand_rows(self.hist, self.grp, self.meta, self.built, self.root_seen, self.root_seen_len, self.capacity,
                       parents, actions, rows, g.allow_suicide, g.superko, g._nbr, g._zob, g._nwords, g.max_moves,
                       legal, to_play, self._path_keys, self._stack, status, ended, build):
            i = int(np.flatnonzero(status)[0])
            self._refused(int(parents[i]), int(actions[i]), f"status {int(status[i])}")
        return ended

    def build(self, rows: np.ndarray, legal: np.ndarray) -> None:
        """Give ``rows`` (expanded with ``build=False``, or built already) their group tables
        and their legal masks, into ``legal[row]``."""
        self._build(np.ascontiguousarray(rows, dtype=np.int64), legal)

    def _build(self, rows: np.ndarray, legal: np.ndarray | None) -> None:
        """Group tables for ``rows`` where missing; with ``legal``, masks too."""
        g = self.game
        with_masks = legal is not None
        bad = build_rows(self.hist, self.grp, self.meta, self.built, self.root_seen, self.root_seen_len, self.capacity,
                         rows, g.allow_suicide, g.superko, g._nbr, g._zob, g._nwords, g.max_moves,
                         legal if with_masks else np.zeros((1, 1), dtype=np.bool_), with_masks, self._path_keys,
                         self._stack)
        if bad >= 0:
            row = int(rows[bad])
            self._refused(int(self.meta[row, PARENT]), int(self.meta[row, ACTION]), "when its groups were built")

    def _refused(self, parent: int, action: int, how: str) -> None:
        """Raise the rules' own error for a move the pool refused (or an AssertionError when the
        one-state rules accept it: a fault of the pool)."""
        self.game.play(self.load(parent), action)  # raises the rules' own message
        raise AssertionError(f"go pool: move {action} from row {parent} refused ({how})")  # pragma: no cover

    # ---- reading -------------------------------------------------------------------------------
    def load(self, row: int) -> GoState:
        """The position in ``row`` as a GoState of its own (arrays copied)."""
        from selfplay.games.go import GoState

        if not self.built[row]:
            self._build(np.array([row], dtype=np.int64), None)
        m = gather_seen(row, self.meta, self.root_seen, self.root_seen_len, self.capacity, self._merged)
        key, prev_key, player, passes, moves, peak = self.meta[row, :PARENT].tolist()
        return GoState(self.hist[row].copy(), self.grp[row].copy(), self._merged[:m].copy(), key, prev_key, player,
                       passes, moves, peak)

    def histories(self, rows: np.ndarray) -> np.ndarray:
        """int8 (k, H, size, size): the network's compact input boards of ``rows``."""
        g = self.game
        return self.hist[rows].reshape(len(rows), g.history, g.size, g.size)

    def states(self, rows: np.ndarray) -> PooledStates:
        """``rows`` as a sequence of states, made on access (see :class:`PooledStates`)."""
        return PooledStates(self, np.asarray(rows, dtype=np.int64))


class PooledStates(RowItems["GoState"]):
    """Positions of pool rows as a read-only sequence: an evaluator that wants the network's
    input reads :meth:`histories` (one gather); one that wants states (rollouts) gets each made
    when asked for."""

    def __init__(self, pool: GoStatePool, rows: np.ndarray) -> None:
        super().__init__(rows, pool.load)
        self.pool = pool

    def histories(self) -> np.ndarray:
        return self.pool.histories(self.rows)
