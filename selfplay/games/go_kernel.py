"""Compiled core of the Go rules: incremental groups, liberty bitsets and Zobrist hashes.

Everything here is a numba function over small numpy arrays, so that copying a position is
copying two arrays and the search's per-simulation rules cost stays in the microseconds.

Layout of one position (``N`` points, numbered row-major from the top-left corner):

- ``board``: int8 (N,) — 0 empty, 1 black, 2 white.
- ``grp``: int64 (N, 4 + W) — one row per point; only rows of occupied points mean anything:
  column ``REP`` the representative point of the point's group (-1 when empty), ``NEXT`` the
  next stone of the group (a circular list through all its stones), and, on the representative's
  row only, ``SIZE`` the number of stones, ``HASH`` the xor of the group's stone Zobrist keys and
  ``LIB0 .. LIB0+W-1`` the group's liberties as a bitset of W = ceil(N / 64) words.
- ``seen``: int64 (M,) sorted — Zobrist keys of every board position reached so far in the game
  (the current one included), for positional superko.

A board key is the xor of ``zob[colour, point]`` over all stones (board only: positional
superko compares whole-board positions, not side to move). The empty board's key is 0.

Status codes returned by the move functions: ``OK`` legal, ``OCCUPIED``, ``SUICIDE``,
``REPEAT`` (the move recreates an earlier position: superko, or the previous one under the
plain ko rule).
"""

from __future__ import annotations

import numpy as np
from numba import njit

REP, NEXT, SIZE, HASH, LIB0 = 0, 1, 2, 3, 4
OK, OCCUPIED, SUICIDE, REPEAT = 0, 1, 2, 3
#: extra status codes of the search's batched expansion (:mod:`selfplay.games.go_pool`): the game had ended, the action is not a point or pass
OVER, OFF_BOARD = 4, 5


# ---- liberty bitsets ----------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _bit(p):
    return np.int64(1) << np.int64(p & 63)


@njit(cache=True, inline="always")
def _lib_set(grp, r, p):
    grp[r, LIB0 + (p >> 6)] |= _bit(p)


@njit(cache=True, inline="always")
def _lib_clear(grp, r, p):
    grp[r, LIB0 + (p >> 6)] &= ~_bit(p)


@njit(cache=True, inline="always")
def _lib_none(grp, r, nwords):
    for w in range(nwords):
        if grp[r, LIB0 + w] != 0:
            return False
    return True


@njit(cache=True, inline="always")
def _lib_only(grp, r, p, nwords):
    """True when point ``p`` is the group's one and only liberty."""
    wp = p >> 6
    for w in range(nwords):
        want = _bit(p) if w == wp else np.int64(0)
        if grp[r, LIB0 + w] != want:
            return False
    return True


@njit(cache=True, inline="always")
def _lib_other_than(grp, r, p, nwords):
    """True when the group has a liberty other than point ``p``."""
    wp = p >> 6
    for w in range(nwords):
        v = grp[r, LIB0 + w]
        if w == wp:
            v &= ~_bit(p)
        if v != 0:
            return True
    return False


@njit(cache=True)
def liberty_count(grp, r, nwords):
    """Number of liberties of the group represented by ``r`` (popcount of its bitset)."""
    total = 0
    for w in range(nwords):
        v = grp[r, LIB0 + w]
        while v != 0:
            v &= v - 1
            total += 1
    return total


# ---- the position-key set (sorted array) --------------------------------------------------------

@njit(cache=True, inline="always")
def lower_bound(keys, n, key):
    """First index of the sorted ``keys[:n]`` whose key is not below ``key`` (``n`` if none)."""
    lo, hi = 0, n
    while lo < hi:
        mid = (lo + hi) >> 1
        if keys[mid] < key:
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(cache=True, inline="always")
def _contains(seen, n, key):
    """Whether ``key`` is in the sorted ``seen[:n]`` (stops at the first match: a set lookup on the
    legal-mask path, where this runs faster than :func:`lower_bound`)."""
    lo, hi = 0, n
    while lo < hi:
        mid = (lo + hi) >> 1
        v = seen[mid]
        if v < key:
            lo = mid + 1
        elif v > key:
            hi = mid
        else:
            return True
    return False


@njit(cache=True, inline="always")
def _insert_into(seen, key, out):
    """Write the sorted ``seen`` with ``key`` added into ``out`` (length len(seen) + 1); return
    False, leaving ``out`` untouched, when ``key`` is already in ``seen``."""
    n = seen.shape[0]
    lo = lower_bound(seen, n, key)
    if lo < n and seen[lo] == key:
        return False
    out[:lo] = seen[:lo]
    out[lo] = key
    out[lo + 1:] = seen[lo:]
    return True


# ---- group surgery ------------------------------------------------------------------------------

@njit(cache=True)
def _merge(grp, a, b, nwords):
    """Join the groups represented by ``a`` and ``b``; return the new representative."""
    if grp[a, SIZE] < grp[b, SIZE]:
        a, b = b, a
    s = b
    while True:
        grp[s, REP] = a
        s = grp[s, NEXT]
        if s == b:
            break
    na = grp[a, NEXT]
    grp[a, NEXT] = grp[b, NEXT]
    grp[b, NEXT] = na
    grp[a, SIZE] += grp[b, SIZE]
    grp[a, HASH] ^= grp[b, HASH]
    for w in range(nwords):
        grp[a, LIB0 + w] |= grp[b, LIB0 + w]
    return a


@njit(cache=True)
def _remove_group(board, grp, r, nbr):
    """Take the group represented by ``r`` off the board; neighbours gain the liberties.
    Returns the number of stones removed."""
    s = r
    count = 0
    while True:
        board[s] = 0
        count += 1
        s = grp[s, NEXT]
        if s == r:
            break
    s = r
    while True:
        nxt = grp[s, NEXT]
        for k in range(4):
            q = nbr[s, k]
            if q >= 0 and board[q] != 0:
                _lib_set(grp, grp[q, REP], s)
        grp[s, REP] = -1
        s = nxt
        if s == r:
            break
    return count


@njit(cache=True)
def play_inplace(board, grp, key, color, p, allow_suicide, nbr, zob, nwords):
    """Put a ``color`` stone on empty point ``p``, capture, and (if allowed) remove a suicidal
    group. Changes ``board``/``grp`` in place. Returns (status, new key, stones captured)."""
    opp = 3 - color
    board[p] = color
    grp[p, REP] = p
    grp[p, NEXT] = p
    grp[p, SIZE] = 1
    grp[p, HASH] = zob[color, p]
    for w in range(nwords):
        grp[p, LIB0 + w] = 0
    key ^= zob[color, p]
    for k in range(4):
        q = nbr[p, k]
        if q < 0:
            continue
        if board[q] == 0:
            _lib_set(grp, p, q)
        else:
            _lib_clear(grp, grp[q, REP], p)
    rep = p
    for k in range(4):
        q = nbr[p, k]
        if q >= 0 and board[q] == color:
            r = grp[q, REP]
            if r != rep:
                rep = _merge(grp, rep, r, nwords)
    captured = 0
    for k in range(4):
        q = nbr[p, k]
        if q >= 0 and board[q] == opp:
            r = grp[q, REP]
            if _lib_none(grp, r, nwords):
                key ^= grp[r, HASH]
                captured += _remove_group(board, grp, r, nbr)
    if captured == 0 and _lib_none(grp, rep, nwords):
        if not allow_suicide:
            return SUICIDE, key, 0
        key ^= grp[rep, HASH]
        _remove_group(board, grp, rep, nbr)
    return OK, key, captured


@njit(cache=True)
def _suicide_key(board, grp, p, color, key, nbr):
    """Key of the board after a suicide at ``p``: every friendly group touching ``p`` goes
    (the new stone never stays). Off the hot path: suicides are rare."""
    nk = key
    r0 = -1
    r1 = -1
    r2 = -1
    for k in range(4):
        q = nbr[p, k]
        if q >= 0 and board[q] == color:
            r = grp[q, REP]
            if r != r0 and r != r1 and r != r2:
                nk ^= grp[r, HASH]
                if r0 < 0:
                    r0 = r
                elif r1 < 0:
                    r1 = r
                else:
                    r2 = r
    return nk


@njit(cache=True, inline="always")
def move_result(board, grp, p, color, key, allow_suicide, nbr, zob, nwords):
    """Without changing anything: status (OK or SUICIDE) of a ``color`` stone on the empty
    point ``p`` and the key of the board it would make (``key`` itself when not OK).

    The caller checks that ``p`` is empty. Kept branch-light on purpose: with the emptiness
    test or the suicide bookkeeping wrapped around the neighbour loop, numba made this
    several times slower."""
    nk = key ^ zob[color, p]
    has_lib = False
    c0 = -1
    c1 = -1
    c2 = -1
    for k in range(4):
        q = nbr[p, k]
        if q < 0:
            continue
        v = board[q]
        if v == 0:
            has_lib = True
        elif v == color:
            if _lib_other_than(grp, grp[q, REP], p, nwords):
                has_lib = True
        else:
            r = grp[q, REP]
            if r != c0 and r != c1 and r != c2 and _lib_only(grp, r, p, nwords):
                nk ^= grp[r, HASH]
                has_lib = True
                if c0 < 0:
                    c0 = r
                elif c1 < 0:
                    c1 = r
                else:
                    c2 = r
    status = OK
    if not has_lib:
        if allow_suicide:
            nk = _suicide_key(board, grp, p, color, key, nbr)
        else:
            status = SUICIDE
            nk = key
    return status, nk


@njit(cache=True, inline="always")
def _seen_in(seen, extra, key):
    """Whether ``key`` is in the sorted ``seen`` or in the short unsorted ``extra`` (the keys of
    a search path below its root, :mod:`selfplay.games.go_pool`; empty elsewhere)."""
    if _contains(seen, seen.shape[0], key):
        return True
    for i in range(extra.shape[0]):
        if extra[i] == key:
            return True
    return False


@njit(cache=True, inline="always")
def _repeats(nk, seen, extra, prev_key, superko):
    if superko:
        return _seen_in(seen, extra, nk)
    return nk == prev_key


@njit(cache=True)
def legal_points(board, grp, seen, key, prev_key, color, allow_suicide, superko, nbr, zob,
                 nwords, peak, out):
    """Fill ``out[:N]`` with the legality of a ``color`` stone on each point (pass not touched).

    ``peak``: the most stones any board of the game so far held. While the board holds that
    many, a move that captures nothing makes a board with more stones than any earlier one,
    which cannot repeat: the superko lookup is skipped for it (``tests/test_go_rules.py``
    checks the masks against lookups at every point)."""
    _legal_points(board, grp, seen, seen[:0], key, prev_key, color, allow_suicide, superko, nbr, zob, nwords,
                  _stone_count(board) >= peak, out)


@njit(cache=True, inline="always")
def _stone_count(board):
    stones = 0
    for p in range(board.shape[0]):
        if board[p] != 0:
            stones += 1
    return stones


@njit(cache=True)
def _legal_points(board, grp, seen, extra, key, prev_key, color, allow_suicide, superko, nbr, zob, nwords, fresh,
                  out):
    """:func:`legal_points` for a board that holds the game's most stones (``fresh``) or not.
    Earlier boards: the sorted ``seen``, the unsorted ``extra`` and the board itself (``key``: a
    caller may leave it out of both).

    The per-point test is :func:`move_result` written out in the loop: numba's inlined version
    ran several times slower here. ``tests/test_go_rules.py`` checks that both agree."""
    n = board.shape[0]
    for p in range(n):
        if board[p] != 0:
            out[p] = False
            continue
        nk = key ^ zob[color, p]
        has_lib = False
        c0 = -1
        c1 = -1
        c2 = -1
        for k in range(4):
            q = nbr[p, k]
            if q < 0:
                continue
            v = board[q]
            if v == 0:
                has_lib = True
            elif v == color:
                if _lib_other_than(grp, grp[q, REP], p, nwords):
                    has_lib = True
            else:
                r = grp[q, REP]
                if r != c0 and r != c1 and r != c2 and _lib_only(grp, r, p, nwords):
                    nk ^= grp[r, HASH]
                    has_lib = True
                    if c0 < 0:
                        c0 = r
                    elif c1 < 0:
                        c1 = r
                    else:
                        c2 = r
        ok = has_lib
        if not has_lib and allow_suicide:
            nk = _suicide_key(board, grp, p, color, key, nbr)
            ok = True
        if ok and not (fresh and has_lib and c0 < 0):
            if superko:
                ok = nk != key and not _seen_in(seen, extra, nk)
            elif nk == prev_key:
                ok = False
        out[p] = ok


@njit(cache=True)
def play_history(hist, grp, seen, extra, key, prev_key, color, p, allow_suicide, superko, nbr, zob,
                 nwords, peak, out_hist, out_grp, out_seen, out_mask):
    """Play a ``color`` stone at ``p`` on a position kept with its history, into arrays the
    caller allocated (allocating them here and handing them back to Python cost more than the
    move itself).

    ``hist`` int8 (H, N): the current board first, then the boards before it (zero rows before
    the game's start). ``out_hist`` (H, N) receives the new board first and the older boards
    shifted down, ``out_grp`` the new group table, ``out_seen`` (len(seen) + 1,) the sorted keys
    with the new one (an empty ``out_seen``: not built); with a non-empty ``out_mask`` (N + 1,)
    the legal mask of the new position for the opponent (pass legal). The game's earlier boards
    are the keys in ``seen`` and ``extra`` (see :func:`_seen_in`). ``peak``: the most stones any
    board of the game so far held (see :func:`legal_points`). Returns (status, key, keys_grew,
    peak after the move): ``keys_grew`` False when the new key was already in ``seen`` or no
    ``out_seen`` was given (then the set is ``seen``). On a non-OK status the outputs mean
    nothing."""
    if hist[0, p] != 0:
        return OCCUPIED, key, False, peak
    out_hist[1:] = hist[:-1]
    out_hist[0] = hist[0]
    board = out_hist[0]
    out_grp[:] = grp
    st, nk, _ = play_inplace(board, out_grp, key, color, p, allow_suicide, nbr, zob, nwords)
    if st != OK:
        return st, key, False, peak
    if _repeats(nk, seen, extra, prev_key, superko):
        return REPEAT, key, False, peak
    stones = _stone_count(board)
    new_peak = stones if stones > peak else peak
    grew = out_seen.shape[0] > 0 and _insert_into(seen, nk, out_seen)
    if out_mask.shape[0] > 0:
        # seen and extra hold the earlier boards, _legal_points compares the new one's key (nk)
        # itself; the new board holds the game's most stones when it reached a new peak
        _legal_points(board, out_grp, seen, extra, nk, key, 3 - color, allow_suicide, superko, nbr, zob, nwords,
                      stones >= new_peak, out_mask)
        out_mask[hist.shape[1]] = True
    return OK, nk, grew, new_peak


@njit(cache=True, inline="always")
def _clear_stones(board, grp, r):
    """Empty every point of the group represented by ``r`` (read from ``grp``, which is left
    as it is) on ``board``."""
    s = r
    while True:
        board[s] = 0
        s = grp[s, NEXT]
        if s == r:
            break


@njit(cache=True)
def play_board(hist, grp, key, color, p, allow_suicide, nbr, zob, nwords, out_hist):
    """The boards after a ``color`` stone at ``p`` into ``out_hist`` (new board first, older
    ones shifted down, as :func:`play_history` writes them) and the new board's key, reading the
    position's group table ``grp`` without changing it and writing no new table: the cheap half
    of a move, for a search node whose own groups and legal moves may never be needed.

    The move must be one the position's legal mask allows: only an occupied point and (without
    ``allow_suicide``) a suicide are caught here; a repeated position is not, because that needs
    the game's keys (:func:`play_history`, run when the node's groups are built, checks it all).
    Returns (status, new key, stones on the new board)."""
    board0 = hist[0]
    if board0[p] != 0:
        return OCCUPIED, key, 0
    st, nk = move_result(board0, grp, p, color, key, allow_suicide, nbr, zob, nwords)
    if st != OK:
        return st, key, 0
    out_hist[1:] = hist[:-1]
    out_hist[0] = board0
    board = out_hist[0]
    opp = 3 - color
    has_lib = False
    for k in range(4):
        q = nbr[p, k]
        if q < 0:
            continue
        v = board[q]
        if v == opp and _lib_only(grp, grp[q, REP], p, nwords):
            _clear_stones(board, grp, grp[q, REP])  # captured
            has_lib = True
        elif v == 0 or (v == color and _lib_other_than(grp, grp[q, REP], p, nwords)):
            has_lib = True
    if has_lib:
        board[p] = color
    else:  # a suicide the rules allow: every friendly group it touches leaves the board with it
        for k in range(4):
            q = nbr[p, k]
            if q >= 0 and board[q] == color:
                _clear_stones(board, grp, grp[q, REP])
    return OK, nk, _stone_count(board)


@njit(cache=True)
def history_planes(boards, to_play, out):
    """Network input planes from compact boards int8 (n, H, rows, cols) and the side to move
    (n,), into float32 ``out`` (n, 2H + 2, rows, cols): planes 2i / 2i+1 the mover's / the
    opponent's stones on board i, plane 2H ones when Black (player 0) is to move, plane 2H+1
    ones."""
    n, h, rows, cols = boards.shape
    for i in range(n):
        own = to_play[i] + 1
        black = np.float32(1.0) if to_play[i] == 0 else np.float32(0.0)
        for j in range(h):
            for r in range(rows):
                for c in range(cols):
                    v = boards[i, j, r, c]
                    out[i, 2 * j, r, c] = np.float32(1.0) if v == own else np.float32(0.0)
                    out[i, 2 * j + 1, r, c] = np.float32(1.0) if v != 0 and v != own else np.float32(0.0)
        for r in range(rows):
            for c in range(cols):
                out[i, 2 * h, r, c] = black
                out[i, 2 * h + 1, r, c] = np.float32(1.0)


# ---- whole-board helpers (setup positions, legality of a position, scoring) ---------------------

@njit(cache=True)
def build_groups(board, nbr, zob, nwords):
    """Group table and key of an arbitrary board (e.g. SGF setup stones). Groups with no
    liberty are kept as they are (see :func:`all_groups_have_liberties`)."""
    n = board.shape[0]
    grp = np.zeros((n, LIB0 + nwords), dtype=np.int64)
    key = np.int64(0)
    for p in range(n):
        grp[p, REP] = -1
        c = board[p]
        if c == 0:
            continue
        grp[p, REP] = p
        grp[p, NEXT] = p
        grp[p, SIZE] = 1
        grp[p, HASH] = zob[c, p]
        key ^= zob[c, p]
        for k in range(4):
            q = nbr[p, k]
            if q >= 0 and board[q] == 0:
                _lib_set(grp, p, q)
    for p in range(n):
        c = board[p]
        if c == 0:
            continue
        for k in range(4):
            q = nbr[p, k]
            if q >= 0 and board[q] == c:
                a = grp[p, REP]
                b = grp[q, REP]
                if a != b:
                    _merge(grp, a, b, nwords)
    return grp, key


@njit(cache=True)
def all_groups_have_liberties(board, grp, nwords):
    """True when every group on the board has at least one liberty (a legal Go position)."""
    for p in range(board.shape[0]):
        if board[p] != 0 and grp[p, REP] == p and _lib_none(grp, p, nwords):
            return False
    return True


@njit(cache=True)
def area_owner(board, nbr):
    """Tromp–Taylor area owner of every point: int8 (n,), +1 a black stone or an empty point
    reaching only black, -1 the same for white, 0 an empty point reaching both colours or none."""
    n = board.shape[0]
    owner = np.zeros(n, dtype=np.int8)
    seen = np.zeros(n, dtype=np.bool_)
    stack = np.empty(n, dtype=np.int64)
    region = np.empty(n, dtype=np.int64)
    for p in range(n):
        c = board[p]
        if c == 1:
            owner[p] = 1
        elif c == 2:
            owner[p] = -1
        elif not seen[p]:
            reach = 0
            size = 0
            top = 0
            stack[top] = p
            top += 1
            seen[p] = True
            while top > 0:
                top -= 1
                s = stack[top]
                region[size] = s
                size += 1
                for k in range(4):
                    q = nbr[s, k]
                    if q < 0:
                        continue
                    v = board[q]
                    if v == 0:
                        if not seen[q]:
                            seen[q] = True
                            stack[top] = q
                            top += 1
                    else:
                        reach |= v
            if reach == 1 or reach == 2:
                mark = 1 if reach == 1 else -1
                for i in range(size):
                    owner[region[i]] = mark
    return owner


@njit(cache=True)
def area_score(board, nbr):
    """Tromp–Taylor area: (black, white) = stones of each colour plus the empty points that
    reach only that colour (the points :func:`area_owner` marks +1 and -1)."""
    owner = area_owner(board, nbr)
    black = 0
    white = 0
    for p in range(owner.shape[0]):
        if owner[p] == 1:
            black += 1
        elif owner[p] == -1:
            white += 1
    return black, white


# ---- random playouts entirely in compiled code (for the rules benchmark) ------------------------

@njit(cache=True, inline="always")
def _fills_own_eye(board, grp, p, color, nbr, nwords):
    """True when every neighbour of ``p`` is a ``color`` stone whose group has another liberty."""
    for k in range(4):
        q = nbr[p, k]
        if q < 0:
            continue
        if board[q] != color:
            return False
        if not _lib_other_than(grp, grp[q, REP], p, nwords):
            return False
    return True


@njit(cache=True)
def random_playouts(num_games, seed, n, nbr, zob, nwords, allow_suicide, superko, max_moves):
    """Play ``num_games`` random games from the empty board; return the moves played (passes
    included). Each move is a uniformly random legal point (superko and suicide checked) that
    does not fill one of the mover's own one-point eyes; a player with no such point passes.
    A game ends after two passes in a row or ``max_moves`` moves."""
    np.random.seed(seed)
    total = 0
    cand = np.empty(n, dtype=np.int64)
    seen = np.empty(max_moves + 2, dtype=np.int64)
    for _ in range(num_games):
        board = np.zeros(n, dtype=np.int8)
        grp = np.zeros((n, LIB0 + nwords), dtype=np.int64)
        for p in range(n):
            grp[p, REP] = -1
        key = np.int64(0)
        prev_key = np.int64(0)
        seen[0] = 0
        nseen = 1
        color = 1
        passes = 0
        moves = 0
        while passes < 2 and moves < max_moves:
            ncand = 0
            for p in range(n):
                if board[p] == 0:
                    cand[ncand] = p
                    ncand += 1
            chosen = -1
            chosen_key = key
            while ncand > 0:
                i = np.random.randint(ncand)
                p = cand[i]
                ncand -= 1
                cand[i] = cand[ncand]
                if _fills_own_eye(board, grp, p, color, nbr, nwords):
                    continue
                st, nk = move_result(board, grp, p, color, key, allow_suicide, nbr, zob, nwords)
                if st != OK or _repeats(nk, seen[:nseen], seen[:0], prev_key, superko):
                    continue
                chosen = p
                chosen_key = nk
                break
            prev_key = key
            if chosen < 0:
                passes += 1
            else:
                passes = 0
                _, key, _ = play_inplace(board, grp, key, color, chosen, allow_suicide, nbr, zob,
                                         nwords)
                if key != chosen_key:
                    raise RuntimeError("incremental key disagrees with the predicted key")
                # insert into the sorted prefix seen[:nseen]
                j = nseen
                while j > 0 and seen[j - 1] > key:
                    seen[j] = seen[j - 1]
                    j -= 1
                if not (j > 0 and seen[j - 1] == key):
                    seen[j] = key
                    nseen += 1
                else:
                    # already present (possible only without superko): undo the shift
                    for t in range(j, nseen):
                        seen[t] = seen[t + 1]
            color = 3 - color
            moves += 1
        total += moves
    return total
