"""Four-in-a-row (gravity board): published position counts and the rules on small cases."""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.errors import ConfigError, IllegalMoveError
from selfplay.games.fourinrow import FourInRowGame
from selfplay.games.registry import make_game

# OEIS A212693: number of legal positions on the standard 7x6 board after n plies, n = 0..9.
A212693 = [1, 7, 49, 238, 1120, 4263, 16422, 54859, 184275, 558186]


def positions_by_ply(game: FourInRowGame, max_ply: int, key: str = "zobrist") -> list[int]:
    """Distinct positions after exactly n plies, n = 0..max_ply, by breadth-first search from
    the empty board; transpositions are merged (by the Zobrist hash, or by the compact board's
    bytes with ``key="board"``) and won positions are counted but not expanded."""
    layer = [game.initial_state()]
    counts = [1]
    for _ in range(max_ply):
        nxt: dict[object, object] = {}
        for state in layer:
            if game.is_terminal(state):
                continue
            for action in game.legal_actions(state):
                child = game.play(state, int(action))
                k = game.zobrist(child) if key == "zobrist" else game.compact(child).tobytes()
                nxt[k] = child
        layer = list(nxt.values())
        counts.append(len(layer))
    return counts


def test_positions_after_n_plies_match_oeis_a212693():
    # Source: OEIS A212693 (legal 7x6 positions after n plies), plies 0..8.
    game = make_game("fourinrow")
    assert positions_by_ply(game, 8) == A212693[:9]


def test_transpositions_merged_by_board_agree_with_zobrist():
    # Source: OEIS A212693, plies 0..6, this time merging transpositions by the board itself,
    # so the Zobrist count above cannot hide a collision or a missed merge.
    game = FourInRowGame()
    assert positions_by_ply(game, 6, key="board") == A212693[:7]


@pytest.mark.slow
def test_positions_after_nine_plies_match_oeis_a212693():
    # Source: OEIS A212693, plies 0..9 (558,186 positions at ply 9).
    assert positions_by_ply(FourInRowGame(), 9) == A212693


# ---- rules on hand-built positions -------------------------------------------------------------

def test_gravity_drops_to_lowest_empty_cell():
    game = FourInRowGame()
    state = game.play_sequence(["4", "4", "4"])
    board = game.compact(state)
    assert board.dtype == np.int8 and board.shape == (6, 7)
    # row 0 is the top: the three pieces sit in the bottom three rows of column 4
    assert board[:, 3].tolist() == [0, 0, 0, 1, 2, 1]
    assert board.sum() == 4  # 1 + 2 + 1, nothing elsewhere


@pytest.mark.parametrize(
    "moves, winner",
    [
        (["1", "2", "1", "2", "1", "2", "1"], 0),  # vertical, player 0
        (["1", "1", "2", "2", "3", "3", "4"], 0),  # horizontal along the bottom
        (["1", "3", "2", "1", "4", "2", "7", "4", "7", "3"], 1),  # horizontal, player 1, second row
        (["1", "2", "1", "2", "1", "2", "3", "2"], 1),  # vertical, player 1
        (["1", "2", "2", "3", "4", "3", "3", "4", "4", "6", "4"], 0),  # diagonal rising to the right
        (["7", "6", "6", "5", "4", "5", "5", "4", "4", "2", "4"], 0),  # diagonal rising to the left
    ],
)
def test_four_in_a_row_wins(moves, winner):
    game = FourInRowGame()
    before = game.play_sequence(moves[:-1])
    assert not game.is_terminal(before)
    state = game.play(before, game.text_to_action(moves[-1]))
    assert game.is_terminal(state)
    assert game.outcome(state) == (1.0 if winner == 0 else -1.0)
    assert not game.legal_mask(state).any()
    with pytest.raises(IllegalMoveError, match="over"):
        game.play(state, 0)


def test_three_in_a_row_and_lines_broken_across_the_edge_do_not_win():
    game = FourInRowGame()
    # player 0 holds the top three cells of column 1 and the bottom cell of column 2: one step
    # apart in a column-major layout without a guard bit, but not a line on the board
    state = game.play_sequence(["2", "1", "5", "1", "5", "1", "1", "6", "1", "6"])
    assert not game.is_terminal(state)
    state = game.play_sequence(["1"], state)
    assert game.compact(state)[:, 0].tolist() == [1, 1, 1, 2, 2, 2]
    assert not game.is_terminal(state)


def test_column_full_is_illegal_and_masked():
    game = FourInRowGame()
    state = game.play_sequence(["3"] * 6)
    assert not game.legal_mask(state)[2]
    assert game.legal_mask(state).sum() == 6
    with pytest.raises(IllegalMoveError, match="column 3 is full"):
        game.play(state, 2)


def _reference_winner(board: np.ndarray, k: int) -> int:
    """-1 or the player (0/1) with k in a row on a compact board, by scanning every line."""
    rows, cols = board.shape
    for r in range(rows):
        for c in range(cols):
            v = int(board[r, c])
            if v == 0:
                continue
            for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
                cells = [(r + i * dr, c + i * dc) for i in range(k)]
                if all(0 <= rr < rows and 0 <= cc < cols and board[rr, cc] == v for rr, cc in cells):
                    return v - 1
    return -1


@pytest.mark.parametrize("columns, rows, k", [(7, 6, 4), (5, 4, 3), (4, 7, 4), (9, 8, 5), (3, 3, 3), (1, 6, 4)])
def test_bitboard_rules_agree_with_a_plain_line_scan(columns, rows, k):
    # Differential check of the bitboard shortcut against a direct scan of the board, on random
    # games of several board shapes (common practice for fast move generators).
    game = FourInRowGame(columns=columns, rows=rows, k=k)
    rng = np.random.default_rng(columns * 100 + rows * 10 + k)
    draws = 0
    for _ in range(60):
        state = game.initial_state()
        heights = [0] * columns
        while True:
            board = game.compact(state)
            ref = _reference_winner(board, k)
            full = game.move_count(state) == columns * rows
            assert game.is_terminal(state) == (ref >= 0 or full)
            if game.is_terminal(state):
                assert game.outcome(state) == {-1: 0.0, 0: 1.0, 1: -1.0}[ref]
                draws += ref < 0
                break
            mask = game.legal_mask(state)
            assert mask.tolist() == [h < rows for h in heights]
            a = int(rng.choice(np.flatnonzero(mask)))
            state = game.play(state, a)
            heights[a] += 1
            # the new piece sits at the lowest free cell of its column (row 0 is the top)
            assert game.compact(state)[rows - heights[a], a] == 2 - (game.move_count(state) % 2)
    if columns * rows <= 12:
        assert draws > 0  # small boards do reach full-board draws


def test_full_board_without_a_line_is_a_draw():
    game = FourInRowGame(columns=3, rows=2, k=3)
    state = game.play_sequence(["1", "2", "3", "1", "2", "3"])
    assert game.compact(state).tolist() == [[2, 1, 2], [1, 2, 1]]
    assert game.is_terminal(state) and game.outcome(state) == 0.0
    assert not game.legal_mask(state).any()


def test_mirror_symmetry_of_a_position():
    game = FourInRowGame()
    moves = [3, 4, 4, 0, 6, 6, 2]
    perm = game.action_permutation(1)
    assert perm.tolist() == [6, 5, 4, 3, 2, 1, 0]
    a = game.play_sequence(moves)
    b = game.play_sequence([int(perm[m]) for m in moves])
    assert np.array_equal(game.compact(b), game.transform_boards(game.compact(a), 1))
    assert np.array_equal(game.encode(b), game.transform_boards(game.encode(a), 1))
    with pytest.raises(ValueError):
        game.action_permutation(2)


def test_move_text():
    game = FourInRowGame()
    assert [game.action_to_text(a) for a in range(7)] == ["1", "2", "3", "4", "5", "6", "7"]
    assert game.text_to_action("a") == 0 and game.text_to_action("G") == 6 and game.text_to_action(" 7 ") == 6
    for bad in ["0", "8", "h", "", "4x", "-1"]:
        with pytest.raises(IllegalMoveError, match="not a column"):
            game.text_to_action(bad)
    with pytest.raises(IllegalMoveError, match="not a column"):
        game.play(game.initial_state(), 7)


def test_zobrist_follows_the_position_not_the_order():
    game = FourInRowGame()
    a = game.play_sequence([0, 1, 2, 3])
    b = game.play_sequence([2, 3, 0, 1])
    c = game.play_sequence([2, 1, 0, 3])
    assert game.zobrist(a) == game.zobrist(b) == game.zobrist(c)
    d = game.play_sequence([1, 0, 3, 2])  # same cells, colours swapped
    assert game.zobrist(d) != game.zobrist(a)
    assert game.zobrist(game.initial_state()) != game.zobrist(game.play(game.initial_state(), 0))
    # stable across builds of the game (the table comes from a fixed seed)
    assert FourInRowGame().zobrist(FourInRowGame().play_sequence([0, 1, 2, 3])) == game.zobrist(a)


@pytest.mark.parametrize(
    "options, field",
    [
        ({"columns": 0}, "columns"),
        ({"columns": 33}, "columns"),
        ({"rows": 0}, "rows"),
        ({"rows": 100}, "rows"),
        ({"k": 0}, "k"),
        ({"k": 8}, "k"),
        ({"columns": 3, "rows": 3, "k": 4}, "k"),
        ({"columns": "7"}, "columns"),
        ({"rows": 6.0}, "rows"),
        ({"k": True}, "k"),
    ],
)
def test_bad_options_name_the_field(options, field):
    with pytest.raises(ConfigError, match=rf"\b{field}="):
        make_game("fourinrow", **options)


def test_options_round_trip():
    game = make_game("fourinrow", columns=9, rows=7, k=5)
    assert game.options() == {"columns": 9, "rows": 7, "k": 5}
    assert make_game("fourinrow", **game.options()).input_shape == (3, 7, 9)
    assert game.num_actions == 9 and game.max_moves == 63


def test_zobrist_keys_come_from_splitmix64():
    from selfplay.games.zobrist_keys import splitmix64, zobrist_keys

    # splitmix64 (Steele, Lea & Flood 2014) started at 0: first output 0xE220A8397B1DCDAF
    # (the generator's reference value, from memory)
    assert splitmix64(0, 1) == [0xE220A8397B1DCDAF]
    keys = zobrist_keys(12345, 1000)
    assert len(set(keys)) == 1000 and all(0 < k < 2**63 for k in keys)
