"""m,n,k games: tic-tac-toe's well-known counts, and lines of k on larger boards."""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import pytest

from selfplay.errors import ConfigError, IllegalMoveError
from selfplay.games.mnk import MNKGame, MNKState
from selfplay.games.registry import make_game


# ---- tic-tac-toe ---------------------------------------------------------------------------------

def count_games(game: MNKGame) -> dict[float, int]:
    """Complete games by plain depth-first search from the empty board, stopping at wins:
    counts by outcome (+1 first player won, -1 second player won, 0 draw)."""
    counts = {1.0: 0, -1.0: 0, 0.0: 0}

    def walk(state: MNKState) -> None:
        if game.is_terminal(state):
            counts[game.outcome(state)] += 1
            return
        for a in game.legal_actions(state):
            walk(game.play(state, int(a)))

    walk(game.initial_state())
    return counts


def reachable_positions(game: MNKGame) -> dict[bytes, MNKState]:
    """Every position reachable from the empty board (empty board included), by board bytes."""
    seen: dict[bytes, MNKState] = {}
    stack = [game.initial_state()]
    while stack:
        state = stack.pop()
        key = game.compact(state).tobytes()
        if key in seen:
            continue
        seen[key] = state
        if not game.is_terminal(state):
            stack.extend(game.play(state, int(a)) for a in game.legal_actions(state))
    return seen


def test_tictactoe_has_255168_possible_games():
    # Well-known result, from memory: 255,168 possible games of tic-tac-toe
    # (131,184 won by the first player, 77,904 by the second, 46,080 drawn).
    counts = count_games(make_game("tictactoe"))
    assert sum(counts.values()) == 255_168
    assert counts == {1.0: 131_184, -1.0: 77_904, 0.0: 46_080}


def test_tictactoe_has_5478_reachable_positions_958_terminal():
    # Well-known result, from memory: 5,478 legal positions reachable from the empty board
    # (the empty board included), 958 of them terminal (626 won by X, 316 by O, 16 drawn).
    game = make_game("tictactoe")
    positions = reachable_positions(game)
    assert len(positions) == 5_478
    terminal = [s for s in positions.values() if game.is_terminal(s)]
    assert len(terminal) == 958
    by_outcome = {z: sum(game.outcome(s) == z for s in terminal) for z in (1.0, -1.0, 0.0)}
    assert by_outcome == {1.0: 626, -1.0: 316, 0.0: 16}
    # the Zobrist hash separates every one of them
    assert len({game.zobrist(s) for s in positions.values()}) == 5_478


def test_tictactoe_perfect_play_is_a_draw():
    # Well-known result, from memory: tic-tac-toe is a draw under perfect play (minimax).
    game = make_game("tictactoe")

    @lru_cache(maxsize=None)
    def negamax(key: int) -> float:
        state = states[key]
        if game.is_terminal(state):
            return game.value_for_mover(state, game.to_play(state))
        best = -2.0
        for a in game.legal_actions(state):
            child = game.play(state, int(a))
            states[game.zobrist(child)] = child
            best = max(best, -negamax(game.zobrist(child)))
        return best

    root = game.initial_state()
    states = {game.zobrist(root): root}
    assert negamax(game.zobrist(root)) == 0.0
    # and a side that has a line ready wins: X at a3, b3 to move after O's reply elsewhere
    s = game.play_sequence(["a3", "a1", "b3", "b1"])
    assert negamax(game.zobrist(s)) == 1.0


def test_tictactoe_lines_and_text():
    game = make_game("tictactoe")
    assert game.options() == {"m": 3, "n": 3, "k": 3}
    assert [game.action_to_text(a) for a in (0, 2, 4, 6, 8)] == ["a3", "c3", "b2", "a1", "c1"]
    state = game.play_sequence(["a1", "a2", "b2", "b1", "c3"])  # diagonal a1-b2-c3 for X
    assert game.is_terminal(state) and game.outcome(state) == 1.0
    state = game.play_sequence(["a1", "a2", "b1", "b2", "c3", "c2"])  # row 2 for O
    assert game.is_terminal(state) and game.outcome(state) == -1.0
    with pytest.raises(IllegalMoveError, match="already occupied"):
        game.play_sequence(["b2", "b2"])
    for bad in ["d1", "a4", "a0", "", "11", "b"]:
        with pytest.raises(IllegalMoveError, match="not a cell"):
            game.text_to_action(bad)


# ---- larger boards -------------------------------------------------------------------------------

def _line(m: int, n: int, start: tuple[int, int], step: tuple[int, int], length: int) -> list[int]:
    r, c = start
    dr, dc = step
    return [(r + i * dr) * m + (c + i * dc) for i in range(length)]


def _play_line(game: MNKGame, cells: list[int], filler: list[int]) -> MNKState:
    """Player 0 plays ``cells`` in order, player 1 answers with the ``filler`` cells."""
    state = game.initial_state()
    for i, cell in enumerate(cells):
        state = game.play(state, cell)
        if i < len(cells) - 1:
            state = game.play(state, filler[i])
    return state


@pytest.mark.parametrize("size", [9, 15])
@pytest.mark.parametrize(
    "start, step",
    [
        ((4, 0), (0, 1)),  # horizontal, from the left edge
        ((0, 3), (1, 0)),  # vertical, from the top edge
        ((0, 0), (1, 1)),  # diagonal from the top-left corner
        ((0, 8), (1, -1)),  # anti-diagonal
    ],
)
def test_five_in_a_row_wins_four_does_not(size, start, step):
    # Common practice: the m,n,k rule, k = 5 on 9x9 and 15x15 boards, each of the four directions.
    game = make_game("mnk", m=size, n=size, k=5)
    cells = _line(size, size, start, step, 5)
    filler = [(size - 1) * size + c for c in range(size - 4, size)]  # bottom-right, out of the way
    assert not set(cells) & set(filler)
    four = _play_line(game, cells[:4], filler)
    assert not game.is_terminal(four)
    five = _play_line(game, cells, filler)
    assert game.is_terminal(five) and game.outcome(five) == 1.0
    assert not game.legal_mask(five).any()


def test_five_filled_in_from_both_ends_wins_and_gomoku_defaults():
    game = make_game("gomoku")
    assert game.options() == {"m": 15, "n": 15, "k": 5}
    # a b c _ e then d: the middle stone completes the line
    row = 7 * 15
    state = game.play_sequence([row + 0, 0, row + 1, 1, row + 2, 2, row + 4, 4])
    assert not game.is_terminal(state)
    state = game.play(state, row + 3)
    assert game.is_terminal(state) and game.outcome(state) == 1.0


def test_lines_do_not_wrap_around_the_board_edge():
    # five stones consecutive in row-major order across a row end, and a diagonal that would
    # wrap: neither is a line on the board
    game = make_game("mnk", m=9, n=9, k=5)
    wrap_row = [2 * 9 + 6, 2 * 9 + 7, 2 * 9 + 8, 3 * 9 + 0, 3 * 9 + 1]
    wrap_diag = [0 * 9 + 7, 1 * 9 + 8, 2 * 9 + 0, 3 * 9 + 1, 4 * 9 + 2]
    filler = [8 * 9 + c for c in range(9)]
    for cells in (wrap_row, wrap_diag):
        state = _play_line(game, cells, filler)
        assert not game.is_terminal(state)


def _scan_winner(board: np.ndarray, k: int) -> int:
    rows, cols = board.shape
    for r in range(rows):
        for c in range(cols):
            v = int(board[r, c])
            for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
                if v and all(
                    0 <= r + i * dr < rows and 0 <= c + i * dc < cols and board[r + i * dr, c + i * dc] == v
                    for i in range(k)
                ):
                    return v - 1
    return -1


@pytest.mark.parametrize("m, n, k", [(3, 3, 3), (4, 3, 3), (3, 5, 3), (9, 9, 5), (7, 5, 4), (1, 6, 4), (6, 1, 2)])
def test_rules_agree_with_a_plain_line_scan(m, n, k):
    # Differential check of the bitboard line test against a direct scan of the board
    # (common practice for fast move generators).
    game = MNKGame(m, n, k)
    rng = np.random.default_rng(m * 100 + n * 10 + k)
    for _ in range(40):
        state = game.initial_state()
        while True:
            ref = _scan_winner(game.compact(state), k)
            assert game.is_terminal(state) == (ref >= 0 or game.move_count(state) == m * n)
            if game.is_terminal(state):
                assert game.outcome(state) == {-1: 0.0, 0: 1.0, 1: -1.0}[ref]
                break
            assert np.array_equal(game.legal_mask(state), game.compact(state).reshape(-1) == 0)
            state = game.play(state, int(rng.choice(game.legal_actions(state))))


@pytest.mark.parametrize(
    "options, field",
    [
        ({"m": 9, "n": 9, "k": 10}, "k"),  # k larger than the board
        ({"m": 15, "n": 15, "k": 16}, "k"),
        ({"m": 3, "n": 3, "k": 0}, "k"),
        ({"m": 0}, "m"),
        ({"n": 26}, "n"),
        ({"m": "9"}, "m"),
        ({"k": 2.5}, "k"),
    ],
)
def test_bad_options_name_the_field(options, field):
    with pytest.raises(ConfigError, match=rf"\b{field}\b"):
        make_game("mnk", **options)


def test_gomoku_and_tictactoe_refuse_unknown_options():
    with pytest.raises(ConfigError, match="size"):
        make_game("gomoku", size=15)
    with pytest.raises(ConfigError, match="m"):
        make_game("tictactoe", m=4)
