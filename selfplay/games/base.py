"""The one small interface every game implements.

A *game* object holds the rules and options (board size, komi, ...); a *state* is a value that
the game's methods take and return. States are never changed in place: :meth:`Game.play`
returns a new state, so a search tree may keep states in its nodes.

Conventions used across the project:

- Players are numbered 0 (first to move: Black in Go, X in tic-tac-toe) and 1.
- Actions are integers in ``[0, num_actions)``. Board games number points row-major from the
  top-left corner (``row * width + col``); Go's pass is the last action, ``width * height``.
- ``outcome(state)`` of a terminal state is from player 0's view: +1 player 0 won, -1 lost, 0 draw.
  Records and the network use the *mover's* view: ``z = outcome if mover == 0 else -outcome``.
- The *compact board* is an ``int8`` array of shape ``compact_shape`` with 0 for empty,
  1 for a stone/piece of player 0 and 2 for one of player 1. The network input is rebuilt from the
  last ``history_length`` compact boards and the side to move (:meth:`planes_from_compact`),
  so records store only small integers, never float planes.

To add a game: subclass :class:`Game`, implement the abstract methods, and register a factory in
:mod:`selfplay.games.registry`. ``DEVELOPERS.md`` walks through an example.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass
from typing import Any, Generic, Sequence, TypeVar

import numpy as np

State = TypeVar("State")


@dataclass(frozen=True)
class FinalArea:
    """Area of a position, from player 0's view.

    ownership: int8 ``board_shape``: +1 the point counts for player 0, -1 for player 1, 0 for
        nobody (Go: Tromp–Taylor area, stones plus empty regions reaching only one colour).
    margin: player 0's area minus player 1's minus komi, in points.
    """

    ownership: np.ndarray
    margin: float


class Game(abc.ABC, Generic[State]):
    """Rules of one game with fixed options."""

    #: registry name, e.g. ``"go"``, ``"fourinrow"``, ``"mnk"``
    name: str = ""

    # ---- shape facts -------------------------------------------------------------------------
    @property
    @abc.abstractmethod
    def num_actions(self) -> int:
        """Number of distinct actions (the policy head's width)."""

    @property
    @abc.abstractmethod
    def board_shape(self) -> tuple[int, int]:
        """(height, width) of the board in points or cells."""

    @property
    def compact_shape(self) -> tuple[int, ...]:
        """Shape of one compact board (int8); by default the board itself."""
        return self.board_shape

    @property
    def history_length(self) -> int:
        """How many compact boards (current first) the network input is built from."""
        return 1

    @property
    @abc.abstractmethod
    def input_shape(self) -> tuple[int, int, int]:
        """(channels, height, width) of the network input made by :meth:`planes_from_compact`."""

    @property
    @abc.abstractmethod
    def max_moves(self) -> int:
        """Move cap: a game reaching this many moves ends (Go) or is full (board games)."""

    @property
    @abc.abstractmethod
    def typical_legal_moves(self) -> float:
        """Rough number of legal moves in a typical position; sets the default Dirichlet alpha."""

    def options(self) -> dict[str, Any]:
        """The options this game was built with, as plain JSON-able values."""
        return {}

    # ---- rules -------------------------------------------------------------------------------
    @abc.abstractmethod
    def initial_state(self) -> State:
        """The empty board with player 0 to move."""

    @abc.abstractmethod
    def to_play(self, state: State) -> int:
        """Player (0 or 1) to move in ``state``."""

    @abc.abstractmethod
    def legal_mask(self, state: State) -> np.ndarray:
        """Boolean array of shape (num_actions,): True where the action is legal.

        A terminal state has no legal action."""

    @abc.abstractmethod
    def play(self, state: State, action: int) -> State:
        """Return the state after ``action``; raise IllegalMoveError if it is not legal."""

    def play_with_mask(self, state: State, action: int, out: np.ndarray | None = None) -> tuple[State, np.ndarray]:
        """``play(state, action)`` and the new state's ``legal_mask`` (written into ``out``, a
        bool (num_actions,) array, when given); a game may compute both in one call (the search
        expands every new node this way)."""
        new = self.play(state, action)
        mask = self.legal_mask(new)
        if out is None:
            return new, mask
        out[:] = mask
        return new, out

    def state_pool(self, slots: int, capacity: int) -> Any | None:
        """Optional: storage for the positions of ``slots`` search trees of ``capacity`` nodes
        each, in rows numbered like the tree's nodes, or None (the default: the tree keeps one
        state object per node). A pool offers ``store_root(slot, row, state)``,
        ``expand(parents, actions, rows, legal, to_play, build=True) -> ended`` (every new edge of
        a round in one call, players to move into ``to_play[rows]``, legal masks into
        ``legal[rows]``; with ``build=False`` the masks wait), ``build(rows, legal)`` (the masks
        of rows expanded without them), ``make_root(slot, row)`` (a row becomes the root where
        it lies), ``reroot(slot, keep, base)`` (keep a subtree as the new tree, compacted to the
        region's front), ``load(row) -> state`` and ``states(rows)`` (a sequence whose
        ``histories()`` gives the network's compact input); see
        :class:`selfplay.games.go_pool.GoStatePool`."""
        return None

    @abc.abstractmethod
    def is_terminal(self, state: State) -> bool:
        """True when the game is over."""

    @abc.abstractmethod
    def outcome(self, state: State) -> float:
        """Result of a terminal state from player 0's view: +1, 0 or -1."""

    @abc.abstractmethod
    def move_count(self, state: State) -> int:
        """Number of moves played to reach ``state``."""

    @abc.abstractmethod
    def zobrist(self, state: State) -> int:
        """Stable 64-bit Zobrist hash of the position (board and side to move)."""

    def final_area(self, state: State) -> "FinalArea | None":
        """Who owns each point of ``state`` and the score margin, for games scored by area
        (Go); None for games without a notion of area (the default)."""
        return None

    # ---- encoding ----------------------------------------------------------------------------
    @abc.abstractmethod
    def compact(self, state: State) -> np.ndarray:
        """The current compact board (int8, ``compact_shape``); 0 empty, 1 player 0, 2 player 1."""

    def compact_history(self, state: State) -> np.ndarray:
        """The last ``history_length`` compact boards, current first, zero-padded:
        int8 array of shape (history_length, *compact_shape)."""
        out = np.zeros((self.history_length, *self.compact_shape), dtype=np.int8)
        out[0] = self.compact(state)
        return out

    def compact_histories(self, states: Sequence[State]) -> np.ndarray:
        """:meth:`compact_history` of many states stacked: int8 (len(states), history_length,
        *compact_shape). Games may override it with a faster batched form."""
        return np.stack([self.compact_history(s) for s in states])

    @abc.abstractmethod
    def planes_from_compact(self, boards: np.ndarray, to_play: np.ndarray) -> np.ndarray:
        """Network input for a batch.

        ``boards``: int8 (N, history_length, *compact_shape), current board first;
        ``to_play``: int8 (N,). Returns float32 (N, *input_shape), from the side to move's view.
        """

    def encode(self, state: State) -> np.ndarray:
        """Network input of one state: float32 ``input_shape``."""
        boards = self.compact_history(state)[None]
        return self.planes_from_compact(boards, np.array([self.to_play(state)], dtype=np.int8))[0]

    # ---- symmetry ----------------------------------------------------------------------------
    @property
    def num_symmetries(self) -> int:
        """Size of the symmetry group used for augmentation (1 = none)."""
        return 1

    def transform_boards(self, boards: np.ndarray, k: int) -> np.ndarray:
        """Apply symmetry ``k`` to arrays whose last two axes are the board (H, W)."""
        if k != 0:
            raise ValueError(f"symmetry {k} out of range for {self.name}")
        return boards

    def action_permutation(self, k: int) -> np.ndarray:
        """int64 (num_actions,): ``perm[a]`` is the action that ``a`` becomes under symmetry ``k``."""
        if k != 0:
            raise ValueError(f"symmetry {k} out of range for {self.name}")
        return np.arange(self.num_actions)

    # ---- text --------------------------------------------------------------------------------
    @abc.abstractmethod
    def action_to_text(self, action: int) -> str:
        """Human-readable move, e.g. ``"D4"`` or ``"pass"`` in Go, ``"3"`` for a column."""

    @abc.abstractmethod
    def text_to_action(self, text: str) -> int:
        """Inverse of :meth:`action_to_text`; raise IllegalMoveError naming the text if unknown."""

    def render(self, state: State) -> str:
        """Plain-text picture of the board (for logs and errors)."""
        symbols = {0: ".", 1: "X", 2: "O"}
        board = self.compact(state)
        return "\n".join("".join(symbols[int(v)] for v in row) for row in board)

    # ---- helpers -----------------------------------------------------------------------------
    def legal_actions(self, state: State) -> np.ndarray:
        """Indices of the legal actions."""
        return np.flatnonzero(self.legal_mask(state))

    def value_for_mover(self, state: State, mover: int) -> float:
        """Outcome of a terminal state from ``mover``'s view."""
        z = self.outcome(state)
        return z if mover == 0 else -z

    def play_sequence(self, moves: Sequence[int | str], state: State | None = None) -> State:
        """Play a list of actions or move texts from ``state`` (default: the initial state)."""
        s = self.initial_state() if state is None else state
        for m in moves:
            a = self.text_to_action(m) if isinstance(m, str) else int(m)
            s = self.play(s, a)
        return s


# ---- input planes shared by games without history ------------------------------------------

def side_to_move_planes(boards: np.ndarray, to_play: np.ndarray) -> np.ndarray:
    """Three planes from the current compact board (``boards[:, 0]``): the side to move's
    stones, the opponent's stones, and a plane of ones (so the net sees the board's edge
    through zero padding). float32 (N, 3, H, W), from the side to move's view."""
    cur = boards[:, 0]
    own = (np.asarray(to_play).astype(np.int8) + 1)[:, None, None]
    planes = np.empty((cur.shape[0], 3, *cur.shape[1:]), dtype=np.float32)
    planes[:, 0] = cur == own
    planes[:, 1] = (cur != 0) & (cur != own)
    planes[:, 2] = 1.0
    return planes


# ---- dihedral symmetry of a square board (shared by Go and m,n,k on square boards) -----------

def dihedral(arr: np.ndarray, k: int) -> np.ndarray:
    """Symmetry ``k`` in 0..7 of the dihedral group on the last two axes.

    k = 0..3: rotation by k quarter turns (counter-clockwise, as ``np.rot90``); k = 4..7: the same
    rotation after a left-right mirror."""
    if not 0 <= k < 8:
        raise ValueError(f"dihedral symmetry index {k} is not in 0..7")
    if k >= 4:
        arr = arr[..., ::-1]
    return np.rot90(arr, k % 4, axes=(-2, -1))


def dihedral_point_permutation(height: int, width: int, k: int) -> np.ndarray:
    """``perm[p]`` = index of point ``p`` after :func:`dihedral` symmetry ``k`` (square boards)."""
    idx = np.arange(height * width).reshape(height, width)
    moved = dihedral(idx, k)  # moved[r, c] = old point now at (r, c)
    perm = np.empty(height * width, dtype=np.int64)
    perm[moved.reshape(-1)] = np.arange(height * width)
    return perm
