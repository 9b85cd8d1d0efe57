"""Legal Go positions counted with our own legality test, against OEIS A094777.

OEIS A094777 (J. Tromp and G. Farnebäck, "Combinatorics of Go"): number of legal Go positions
on an n×n board: 1, 57, 12675, 24318165, ... A position (any colouring of the points with
empty / black / white) is legal when no group is without liberties.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from numba import njit

from selfplay.games import go_kernel as K
from selfplay.games.go import GoGame, position_is_legal

# Source: OEIS A094777, terms n = 1..4.
A094777 = {1: 1, 2: 57, 3: 12_675, 4: 24_318_165}


def _count_by_enumeration(n: int) -> int:
    count = 0
    for colours in itertools.product((0, 1, 2), repeat=n * n):
        board = np.array(colours, dtype=np.int8).reshape(n, n)
        count += position_is_legal(board)
    return count


@pytest.mark.parametrize("n", [1, 2, 3])
def test_legal_position_counts_match_oeis_a094777(n: int) -> None:
    # Source: OEIS A094777 (Tromp & Farnebäck, "Combinatorics of Go").
    assert _count_by_enumeration(n) == A094777[n]


@njit(cache=True)
def _count_all(n_points, nbr, zob, nwords):
    board = np.zeros(n_points, dtype=np.int8)
    total = 0
    for code in range(3 ** n_points):
        c = code
        for p in range(n_points):
            board[p] = c % 3
            c //= 3
        grp, _ = K.build_groups(board, nbr, zob, nwords)
        if K.all_groups_have_liberties(board, grp, nwords):
            total += 1
    return total


@pytest.mark.slow
def test_legal_position_count_4x4_matches_oeis_a094777() -> None:
    # Source: OEIS A094777, n = 4: 24,318,165 of the 3^16 = 43,046,721 colourings. Enumerated
    # in compiled code with the same group/liberty functions that position_is_legal uses.
    game = GoGame(size=4, tiny=True)
    assert _count_all(16, game._nbr, game._zob, game._nwords) == A094777[4]


def test_illegal_and_legal_positions_by_hand() -> None:
    # Rule (Tromp–Taylor / common practice): a position is legal when every group has a liberty.
    assert position_is_legal(np.array([[0]], dtype=np.int8))
    assert not position_is_legal(np.array([[1]], dtype=np.int8))  # a lone stone filling 1x1
    assert not position_is_legal(np.array([[1, 2], [2, 0]], dtype=np.int8))  # black a1 no liberty
    assert position_is_legal(np.array([[1, 1], [2, 0]], dtype=np.int8))
    assert not position_is_legal(np.array([[1, 1], [1, 1]], dtype=np.int8))
    with pytest.raises(ValueError, match="square"):
        position_is_legal(np.zeros((2, 3), dtype=np.int8))
