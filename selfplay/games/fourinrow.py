"""Four-in-a-row on a gravity board: pieces drop into the lowest empty cell of the chosen column.

The board is ``columns`` wide and ``rows`` high (7 x 6 by default); the first player to line up
``k`` pieces (4 by default) horizontally, vertically or diagonally wins; a full board is a draw.

Actions are columns, ``0 .. columns-1`` from the left. Move text is the column number counted
from 1 (``"1" .. "7"`` on the default board); :meth:`FourInRowGame.text_to_action` also accepts
the column letter (``"a" .. "g"``, either case) for boards of at most 26 columns.

The rules run on bitboards held in Python integers, which keeps :meth:`~FourInRowGame.play` and
:meth:`~FourInRowGame.legal_mask` to about a microsecond each. Bit ``c * (rows + 1) + r`` is the
cell of column ``c`` and row ``r`` counted from the *bottom*; each column carries one always-empty
guard bit on top, so that shifting a bitboard never carries a line from one column into the next
(the usual layout for gravity-board bitboards). Dropping a piece into column ``c`` is then
``occupied | (occupied + bottom_bit[c])``, and a line of ``k`` is found with a few shifts and ANDs
(:func:`selfplay.games.bitlines.has_run`).
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from selfplay.errors import ConfigError, IllegalMoveError
from selfplay.games.base import Game, side_to_move_planes
from selfplay.games.bitlines import has_run
from selfplay.games.registry import register_game
from selfplay.games.zobrist_keys import zobrist_keys

#: inclusive range accepted for ``columns`` and ``rows``
MAX_SIDE = 32


class FourInRowState(NamedTuple):
    """One position. Never changed in place.

    ``first``: bitboard of player 0's pieces; ``occupied``: bitboard of every piece;
    ``moves``: pieces on the board (player ``moves % 2`` is to move); ``winner``: -1 while no one
    has a line, else the player (0 or 1) who made one; ``key``: Zobrist hash of the pieces.
    """

    first: int
    occupied: int
    moves: int
    winner: int
    key: int


_new_state = tuple.__new__  # NamedTuple construction without the keyword-argument machinery


def _check_int(field: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ConfigError(f"fourinrow option {field}={value!r} must be an integer")
    return int(value)


class FourInRowGame(Game[FourInRowState]):
    """Gravity board of ``columns`` x ``rows``; ``k`` in a row wins."""

    name = "fourinrow"

    def __init__(self, columns: int = 7, rows: int = 6, k: int = 4) -> None:
        columns = _check_int("columns", columns)
        rows = _check_int("rows", rows)
        k = _check_int("k", k)
        for field, value in (("columns", columns), ("rows", rows)):
            if not 1 <= value <= MAX_SIDE:
                raise ConfigError(f"fourinrow option {field}={value} is out of range: it must be in 1..{MAX_SIDE}")
        if not 1 <= k <= max(columns, rows):
            raise ConfigError(
                f"fourinrow option k={k} is out of range: it must be in 1..{max(columns, rows)} "
                f"for a board of {columns} columns x {rows} rows, or no line can ever be made"
            )
        self.columns, self.rows, self.k = columns, rows, k
        self._cells = columns * rows
        stride = rows + 1  # bits per column, guard bit included
        self._stride = stride
        self._bottom_bit = [1 << (c * stride) for c in range(columns)]
        self._top_bit = [1 << (c * stride + rows - 1) for c in range(columns)]
        self._top_row = sum(self._top_bit)
        # shift per direction: vertical, horizontal, and the two diagonals
        self._shifts = (1, stride, stride - 1, stride + 1)
        self._nbits = columns * stride
        self._nbytes = (self._nbits + 7) // 8
        # Zobrist keys: one per (player, cell), keyed by the cell's single-bit integer
        keys = zobrist_keys(0x46495224 + 1000 * columns + rows, 2 * columns * rows + 1)
        self._zobrist_piece = [
            {1 << (c * stride + r): keys[(p * columns + c) * rows + r] for c in range(columns) for r in range(rows)}
            for p in (0, 1)
        ]
        self._zobrist_side = keys[-1]
        self._mask_cache: dict[int, np.ndarray] = {}
        self._no_moves = np.zeros(columns, dtype=bool)

    # ---- shape facts -------------------------------------------------------------------------
    @property
    def num_actions(self) -> int:
        return self.columns

    @property
    def board_shape(self) -> tuple[int, int]:
        return (self.rows, self.columns)

    @property
    def input_shape(self) -> tuple[int, int, int]:
        return (3, self.rows, self.columns)

    @property
    def max_moves(self) -> int:
        return self._cells

    @property
    def typical_legal_moves(self) -> float:
        return float(self.columns)

    def options(self) -> dict[str, Any]:
        return {"columns": self.columns, "rows": self.rows, "k": self.k}

    # ---- rules -------------------------------------------------------------------------------
    def initial_state(self) -> FourInRowState:
        return _new_state(FourInRowState, (0, 0, 0, -1, 0))

    def to_play(self, state: FourInRowState) -> int:
        return state.moves & 1

    def is_terminal(self, state: FourInRowState) -> bool:
        return state.winner >= 0 or state.moves >= self._cells

    def outcome(self, state: FourInRowState) -> float:
        if state.winner < 0:
            return 0.0
        return 1.0 if state.winner == 0 else -1.0

    def move_count(self, state: FourInRowState) -> int:
        return state.moves

    def zobrist(self, state: FourInRowState) -> int:
        return state.key ^ (self._zobrist_side if state.moves & 1 else 0)

    def legal_mask(self, state: FourInRowState) -> np.ndarray:
        if state.winner >= 0 or state.moves >= self._cells:
            return self._no_moves.copy()
        full = state.occupied & self._top_row
        mask = self._mask_cache.get(full)
        if mask is None:
            mask = np.array([not full & t for t in self._top_bit], dtype=bool)
            if len(self._mask_cache) < 4096:
                self._mask_cache[full] = mask
        return mask.copy()

    def play(self, state: FourInRowState, action: int) -> FourInRowState:
        try:
            a = int(action)
        except (TypeError, ValueError):
            raise IllegalMoveError(f"move {action!r} is not an action number") from None
        first, occupied, moves, winner, key = state
        if winner >= 0 or moves >= self._cells:
            raise IllegalMoveError(f"the game is over; column {self._text_or_raw(a)} cannot be played")
        if not 0 <= a < self.columns:
            raise IllegalMoveError(f"action {a} is not a column of the board (0..{self.columns - 1})")
        if occupied & self._top_bit[a]:
            raise IllegalMoveError(f"column {a + 1} is full")
        new_occupied = occupied | (occupied + self._bottom_bit[a])
        piece = new_occupied ^ occupied
        mover = moves & 1
        if mover == 0:
            first |= piece
            mine = first
        else:
            mine = new_occupied ^ first
        key ^= self._zobrist_piece[mover][piece]
        if moves + 1 >= 2 * self.k - 1 and has_run(mine, self._shifts, self.k):
            winner = mover
        return _new_state(FourInRowState, (first, new_occupied, moves + 1, winner, key))

    # ---- encoding ----------------------------------------------------------------------------
    def _bit_cells(self, bits: int) -> np.ndarray:
        """(columns, rows) uint8 array of a bitboard, rows counted from the bottom."""
        raw = np.frombuffer(bits.to_bytes(self._nbytes, "little"), dtype=np.uint8)
        flat = np.unpackbits(raw, bitorder="little")[: self._nbits]
        return flat.reshape(self.columns, self._stride)[:, : self.rows]

    def compact(self, state: FourInRowState) -> np.ndarray:
        """int8 (rows, columns), row 0 at the top; 0 empty, 1 player 0, 2 player 1."""
        first = self._bit_cells(state.first)
        second = self._bit_cells(state.occupied ^ state.first)
        board = (first + 2 * second).astype(np.int8)
        return np.ascontiguousarray(board.T[::-1])

    def planes_from_compact(self, boards: np.ndarray, to_play: np.ndarray) -> np.ndarray:
        """Planes: the side to move's pieces, the opponent's pieces, ones. float32 (N, 3, rows, columns)."""
        return side_to_move_planes(boards, to_play)

    # ---- symmetry: identity and the left-right mirror ----------------------------------------
    @property
    def num_symmetries(self) -> int:
        return 2

    def transform_boards(self, boards: np.ndarray, k: int) -> np.ndarray:
        if k == 0:
            return boards
        if k == 1:
            return boards[..., ::-1]
        raise ValueError(f"symmetry {k} out of range for fourinrow (0 identity, 1 mirror)")

    def action_permutation(self, k: int) -> np.ndarray:
        if k == 0:
            return np.arange(self.columns, dtype=np.int64)
        if k == 1:
            return np.arange(self.columns - 1, -1, -1, dtype=np.int64)
        raise ValueError(f"symmetry {k} out of range for fourinrow (0 identity, 1 mirror)")

    # ---- text: column numbers from 1, or letters ---------------------------------------------
    def _text_or_raw(self, action: int) -> str:
        return str(action + 1) if 0 <= action < self.columns else repr(action)

    def action_to_text(self, action: int) -> str:
        a = int(action)
        if not 0 <= a < self.columns:
            raise IllegalMoveError(f"action {a} is not a column of the board (0..{self.columns - 1})")
        return str(a + 1)

    def text_to_action(self, text: str) -> int:
        t = str(text).strip().lower()
        if t.isascii() and t.isdigit() and 1 <= int(t) <= self.columns:
            return int(t) - 1
        if self.columns <= 26 and len(t) == 1 and "a" <= t <= "z" and ord(t) - ord("a") < self.columns:
            return ord(t) - ord("a")
        last_letter = chr(ord("a") + min(self.columns, 26) - 1)
        raise IllegalMoveError(
            f"{text!r} is not a column of the board: give 1..{self.columns}"
            + (f" or a..{last_letter}" if self.columns <= 26 else "")
        )


register_game("fourinrow", FourInRowGame)
