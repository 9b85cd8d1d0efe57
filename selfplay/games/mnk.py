"""m,n,k games: two players take turns placing a stone on an m-wide, n-high board; the first to
get k in a row (horizontally, vertically or diagonally) wins; a full board is a draw.

Tic-tac-toe is (3, 3, 3), the default; gomoku-like boards such as (9, 9, 5) and (15, 15, 5) use
the same code. Actions are cells numbered row-major from the top-left corner.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from selfplay.errors import ConfigError, IllegalMoveError
from selfplay.games.base import Game, dihedral, dihedral_point_permutation, side_to_move_planes
from selfplay.games.bitlines import has_run
from selfplay.games.registry import register_game
from selfplay.games.zobrist_keys import zobrist_keys

#: inclusive upper bound of ``m`` and ``n`` (the move text names columns by one letter)
MAX_SIDE = 25


class MNKState(NamedTuple):
    """One position; never changed in place.

    ``cells``: int8 (m*n,) row-major, 0 empty / 1 player 0 / 2 player 1; ``player``: side to
    move; ``moves``: stones placed; ``winner``: -1 none yet, else 0 or 1; ``key``: Zobrist hash of
    the stones; ``lines``: the two players' stones as bitboards (bit ``row * (m + 1) + col``, one
    empty guard column), used to find a line of ``k`` in a few shifts."""

    cells: np.ndarray
    player: int
    moves: int
    winner: int
    key: int
    lines: tuple[int, int]


_new_state = tuple.__new__  # NamedTuple construction without the keyword-argument machinery


class MNKGame(Game[MNKState]):
    """The (m, n, k) game; ``m`` columns, ``n`` rows, ``k`` in a row wins."""

    name = "mnk"

    def __init__(self, m: int = 3, n: int = 3, k: int = 3) -> None:
        for field, value in (("m", m), ("n", n), ("k", k)):
            if not isinstance(value, int) or isinstance(value, bool):
                raise ConfigError(f"mnk option {field}={value!r} must be an integer")
        for field, value in (("m", m), ("n", n)):
            if not 1 <= value <= MAX_SIDE:
                raise ConfigError(f"mnk option {field}={value} is out of range: it must be in 1..{MAX_SIDE}")
        if not 1 <= k <= max(m, n):
            raise ConfigError(
                f"mnk option k={k} is out of range: it must be in 1..{max(m, n)} for a {m}x{n} board, "
                "or no line can ever be made"
            )
        self.m, self.n, self.k = m, n, k
        keys = zobrist_keys(0x6D6E6B + 10000 * m + 100 * n + k, 2 * m * n + 1)
        # _zobrist[stone][cell], stone 1 or 2 (row 0 unused)
        self._zobrist: list[list[int]] = [[0] * (m * n), keys[: m * n], keys[m * n : 2 * m * n]]
        self._zobrist_side = keys[-1]
        self._square = m == n
        stride = m + 1  # bits per row, guard cell included
        self._cell_bit = [1 << (a // m * stride + a % m) for a in range(m * n)]
        # horizontal, vertical, and the two diagonals
        self._strides = (1, stride, stride + 1, stride - 1)
        self._no_moves = np.zeros(m * n, dtype=bool)

    # shape facts
    @property
    def num_actions(self) -> int:
        return self.m * self.n

    @property
    def board_shape(self) -> tuple[int, int]:
        return (self.n, self.m)

    @property
    def input_shape(self) -> tuple[int, int, int]:
        return (3, self.n, self.m)

    @property
    def max_moves(self) -> int:
        return self.m * self.n

    @property
    def typical_legal_moves(self) -> float:
        return max(1.0, self.m * self.n / 2)

    def options(self) -> dict[str, Any]:
        return {"m": self.m, "n": self.n, "k": self.k}

    # rules
    def initial_state(self) -> MNKState:
        return _new_state(MNKState, (np.zeros(self.m * self.n, dtype=np.int8), 0, 0, -1, 0, (0, 0)))

    def to_play(self, state: MNKState) -> int:
        return state.player

    def legal_mask(self, state: MNKState) -> np.ndarray:
        if state.winner >= 0 or state.moves >= self.m * self.n:
            return self._no_moves.copy()
        return state.cells == 0

    def is_terminal(self, state: MNKState) -> bool:
        return state.winner >= 0 or state.moves >= self.m * self.n

    def outcome(self, state: MNKState) -> float:
        if state.winner < 0:
            return 0.0
        return 1.0 if state.winner == 0 else -1.0

    def move_count(self, state: MNKState) -> int:
        return state.moves

    def zobrist(self, state: MNKState) -> int:
        return state.key ^ (self._zobrist_side if state.player else 0)

    def play(self, state: MNKState, action: int) -> MNKState:
        try:
            a = int(action)
        except (TypeError, ValueError):
            raise IllegalMoveError(f"move {action!r} is not an action number") from None
        cells, player, moves, winner, key, lines = state
        if winner >= 0 or moves >= self.m * self.n:
            raise IllegalMoveError(f"the game is over; move {self._text_or_raw(a)} cannot be played")
        if not 0 <= a < self.m * self.n:
            raise IllegalMoveError(f"action {a} is not a cell of the {self.m}x{self.n} board")
        if cells[a] != 0:
            raise IllegalMoveError(f"cell {self.action_to_text(a)} is already occupied")
        cells = cells.copy()
        stone = player + 1
        cells[a] = stone
        mine = lines[player] | self._cell_bit[a]
        lines = (mine, lines[1]) if player == 0 else (lines[0], mine)
        if moves + 1 >= 2 * self.k - 1 and has_run(mine, self._strides, self.k):
            winner = player
        key ^= self._zobrist[stone][a]
        return _new_state(MNKState, (cells, 1 - player, moves + 1, winner, key, lines))

    def _text_or_raw(self, action: int) -> str:
        return self.action_to_text(action) if 0 <= action < self.m * self.n else repr(action)

    # encoding
    def compact(self, state: MNKState) -> np.ndarray:
        return state.cells.reshape(self.n, self.m)

    def planes_from_compact(self, boards: np.ndarray, to_play: np.ndarray) -> np.ndarray:
        return side_to_move_planes(boards, to_play)

    # symmetry
    @property
    def num_symmetries(self) -> int:
        return 8 if self._square else 2

    def transform_boards(self, boards: np.ndarray, k: int) -> np.ndarray:
        if self._square:
            return dihedral(boards, k)
        if k == 0:
            return boards
        if k == 1:
            return boards[..., ::-1]
        raise ValueError(f"symmetry {k} out of range for a non-square mnk board")

    def action_permutation(self, k: int) -> np.ndarray:
        if self._square:
            return dihedral_point_permutation(self.n, self.m, k)
        idx = np.arange(self.num_actions).reshape(self.n, self.m)
        moved = self.transform_boards(idx, k)
        perm = np.empty(self.num_actions, dtype=np.int64)
        perm[moved.reshape(-1)] = np.arange(self.num_actions)
        return perm

    # text: columns a, b, c... from the left, rows 1.. from the bottom (as on a chess board)
    def action_to_text(self, action: int) -> str:
        r, c = divmod(int(action), self.m)
        return f"{chr(ord('a') + c)}{self.n - r}"

    def text_to_action(self, text: str) -> int:
        t = text.strip().lower()
        if len(t) >= 2 and t.isascii() and t[0].isalpha() and t[1:].isdigit():
            c = ord(t[0]) - ord("a")
            r = self.n - int(t[1:])
            if 0 <= c < self.m and 0 <= r < self.n:
                return r * self.m + c
        raise IllegalMoveError(
            f"{text!r} is not a cell of the {self.m}x{self.n} board (columns a..{chr(ord('a') + self.m - 1)}, rows 1..{self.n})"
        )


def tictactoe() -> MNKGame:
    """Tic-tac-toe: the (3, 3, 3) game."""
    return MNKGame(3, 3, 3)


register_game("mnk", MNKGame)
register_game("tictactoe", tictactoe)
register_game("gomoku", lambda m=15, n=15, k=5: MNKGame(m, n, k))
