"""Go on an n×n board under Tromp–Taylor rules (area scoring, positional superko, komi).

Rules as implemented (J. Tromp and B. Taylor, "The Logical Rules of Go",
https://tromp.github.io/go.html; see ``docs/go-rules.md``):

- Players alternate, Black (player 0) first. A move is a stone on an empty point, or a pass.
- After a stone is placed, opponent groups without liberties are removed; then, if the mover's
  own group has no liberty, it is suicide: illegal by default (``allow_suicide=False``, as most
  play), or, as in the original Tromp–Taylor text, the own group is removed.
- Positional superko (``superko=True``): a move may not recreate any earlier whole-board
  position (board only, not side to move). With ``superko=False`` only the plain ko rule
  applies: a move may not recreate the position before the opponent's last move.
- The game ends after two consecutive passes, or when ``max_moves`` moves have been played;
  either way it is scored: a player's area is their stones plus the empty points that reach
  only their colour; White adds ``komi``. Result +1 Black wins, -1 White wins, 0 a draw.

Actions: point ``row * size + col`` (row 0 at the top, col 0 at the left); pass is
``size * size``. Text: letter-number ("D4": column letters A..T skipping I from the left, rows
1..size from the bottom), SGF ("dd": column then row letters from the top-left), or "pass".

Speed: groups, liberties (as bitsets) and Zobrist keys are updated incrementally by the numba
kernel in :mod:`selfplay.games.go_kernel`; no per-move flood fill.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Iterable, Sequence

import numpy as np

from selfplay.errors import ConfigError, IllegalMoveError
from selfplay.games import go_kernel as K
from selfplay.games.base import FinalArea, Game, dihedral, dihedral_point_permutation
from selfplay.games.registry import register_game

if TYPE_CHECKING:
    from selfplay.games.go_pool import GoStatePool

#: column letters of the letter-number style (I is skipped, as on most boards and in GTP)
COLUMN_LETTERS = "ABCDEFGHJKLMNOPQRST"
MIN_SIZE, MAX_SIZE = 5, 19
#: most memory a search's position rows (:meth:`GoGame.state_pool`) may take, bytes
STATE_POOL_LIMIT_BYTES = 768 * 2**20

_STATUS_TEXT = {
    K.OCCUPIED: "the point is occupied",
    K.SUICIDE: "it is suicide (the stone's group would have no liberty and captures nothing)",
    K.REPEAT: "it recreates an earlier board position (positional superko)",
}


def _splitmix64(seed: int, count: int) -> list[int]:
    """``count`` 64-bit values from the splitmix64 generator (Steele, Lea & Flood 2014), as
    signed ints. Written out so that Zobrist keys never depend on a library's random stream."""
    out = []
    mask = (1 << 64) - 1
    x = seed & mask
    for _ in range(count):
        x = (x + 0x9E3779B97F4A7C15) & mask
        z = x
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & mask
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & mask
        z ^= z >> 31
        out.append(z - (1 << 64) if z >= 1 << 63 else z)
    return out


class GoState:
    """One Go position with everything the rules need; never changed after creation.

    ``history`` int8 (H, N): the current board first, then the boards before it (zero rows
    before the game's start; H = the game's ``history`` option), what the network's history
    planes are built from; ``board`` is ``history[0]``. ``groups`` int64 group table and ``seen``
    sorted int64 keys of every board position so far (see :mod:`selfplay.games.go_kernel`);
    ``key`` the board's Zobrist key, ``prev_key`` the key of the position before the last move;
    ``player`` 0 (Black) or 1 (White) to move; ``passes`` consecutive passes just played;
    ``moves`` moves played; ``peak`` the most stones any board of the game so far held (lets
    the superko test skip moves that cannot repeat a board, see
    :func:`selfplay.games.go_kernel.legal_points`)."""

    __slots__ = ("history", "groups", "seen", "key", "prev_key", "player", "passes", "moves", "peak")

    def __init__(self, history: np.ndarray, groups: np.ndarray, seen: np.ndarray, key: int,
                 prev_key: int, player: int, passes: int, moves: int, peak: int) -> None:
        self.history = history
        self.groups = groups
        self.seen = seen
        self.key = key
        self.prev_key = prev_key
        self.player = player
        self.passes = passes
        self.moves = moves
        self.peak = peak

    @property
    def board(self) -> np.ndarray:
        """int8 (N,): the current board, ``history[0]`` (a view made on each access; the search's
        hot path reads the history array directly)."""
        return self.history[0]

    def __repr__(self) -> str:
        return (f"GoState(moves={self.moves}, to_play={'BW'[self.player]}, passes={self.passes}, "
                f"key={self.key & ((1 << 64) - 1):016x})")


def _check_int(field: str, value: Any) -> int:
    if not isinstance(value, (int, np.integer)) or isinstance(value, bool):
        raise ConfigError(f"go option {field}={value!r} must be an integer")
    return int(value)


def _check_bool(field: str, value: Any) -> bool:
    if not isinstance(value, (bool, np.bool_)):
        raise ConfigError(f"go option {field}={value!r} must be true or false")
    return bool(value)


class GoGame(Game[GoState]):
    """Go on a ``size``×``size`` board; see the module docstring for the rules."""

    name = "go"

    def __init__(self, size: int = 19, komi: float = 7.5, allow_suicide: bool = False,
                 superko: bool = True, history: int = 4, max_moves: int | None = None,
                 tiny: bool = False) -> None:
        tiny = _check_bool("tiny", tiny)
        size = _check_int("size", size)
        lo = 1 if tiny else MIN_SIZE
        if not lo <= size <= MAX_SIZE:
            why = ("sizes 1..4 need tiny=True (meant for tests)"
                   if 1 <= size < MIN_SIZE else f"it must be in {MIN_SIZE}..{MAX_SIZE}")
            raise ConfigError(f"go option size={size} is out of range: {why}")
        if isinstance(komi, bool) or not isinstance(komi, (int, float, np.integer, np.floating)):
            raise ConfigError(f"go option komi={komi!r} must be a number")
        komi = float(komi)
        if not np.isfinite(komi) or abs(komi) > 1000:
            raise ConfigError(f"go option komi={komi!r} must be a finite number with |komi| <= 1000")
        history = _check_int("history", history)
        if not 1 <= history <= 16:
            raise ConfigError(f"go option history={history} must be in 1..16")
        if max_moves is None:
            max_moves = 2 * size * size
        max_moves = _check_int("max_moves", max_moves)
        if not 1 <= max_moves <= 100 * size * size:
            raise ConfigError(f"go option max_moves={max_moves} must be in 1..{100 * size * size}")
        self.size = size
        self.komi = komi
        self.allow_suicide = _check_bool("allow_suicide", allow_suicide)
        self.superko = _check_bool("superko", superko)
        self.history = history
        self._max_moves = max_moves
        self.tiny = tiny
        n = size * size
        self._n = n
        self._pass = n
        self._nwords = (n + 63) // 64
        nbr = np.full((n, 4), -1, dtype=np.int64)
        for p in range(n):
            r, c = divmod(p, size)
            for k, (dr, dc) in enumerate(((-1, 0), (1, 0), (0, -1), (0, 1))):
                rr, cc = r + dr, c + dc
                if 0 <= rr < size and 0 <= cc < size:
                    nbr[p, k] = rr * size + cc
        self._nbr = nbr
        keys = _splitmix64(0x51A7E + size, 2 * n + 1)
        zob = np.zeros((3, n), dtype=np.int64)
        zob[1] = keys[:n]
        zob[2] = keys[n:2 * n]
        self._zob = zob
        self._side_key = keys[2 * n]
        self._no_mask = np.zeros(0, dtype=np.bool_)  # "no mask wanted" for the play kernel
        # "previous position" of a state that has none (setup): a key no board will have
        self._no_position = _splitmix64(0x0B5E55ED, 1)[0]
        empty = np.zeros(n, dtype=np.int8)
        groups, _ = K.build_groups(empty, nbr, zob, self._nwords)
        self._initial = GoState(np.zeros((history, n), dtype=np.int8), groups, np.zeros(1, dtype=np.int64), 0,
                                self._no_position, 0, 0, 0, 0)

    # ---- shape facts ---------------------------------------------------------------------------
    @property
    def num_actions(self) -> int:
        return self._n + 1

    @property
    def board_shape(self) -> tuple[int, int]:
        return (self.size, self.size)

    @property
    def history_length(self) -> int:
        return self.history

    @property
    def input_shape(self) -> tuple[int, int, int]:
        return (2 * self.history + 2, self.size, self.size)

    @property
    def max_moves(self) -> int:
        return self._max_moves

    @property
    def pass_action(self) -> int:
        """The pass action, ``size * size``."""
        return self._pass

    @property
    def typical_legal_moves(self) -> float:
        return 0.7 * self._n + 1

    def options(self) -> dict[str, Any]:
        out: dict[str, Any] = {"size": self.size, "komi": self.komi,
                               "allow_suicide": self.allow_suicide, "superko": self.superko,
                               "history": self.history, "max_moves": self._max_moves}
        if self.tiny:
            out["tiny"] = True
        return out

    # ---- rules ---------------------------------------------------------------------------------
    def initial_state(self) -> GoState:
        return self._initial

    def state_from_setup(self, black: Iterable[int] = (), white: Iterable[int] = (),
                         to_play: int = 0) -> GoState:
        """A starting position with setup stones (e.g. handicap), ``to_play`` (0 Black,
        1 White) to move; raise IllegalMoveError when a point is off the board, set twice, or
        a group is left without liberties."""
        board = np.zeros(self._n, dtype=np.int8)
        for colour, points in ((1, black), (2, white)):
            for p in points:
                p = int(p)
                if not 0 <= p < self._n:
                    raise IllegalMoveError(f"setup point {p} is off the {self.size}x{self.size} board")
                if board[p] != 0:
                    raise IllegalMoveError(
                        f"setup point {self.action_to_text(p)} is given more than one stone")
                board[p] = colour
        groups, key = K.build_groups(board, self._nbr, self._zob, self._nwords)
        if not K.all_groups_have_liberties(board, groups, self._nwords):
            raise IllegalMoveError("setup stones leave a group without liberties")
        if to_play not in (0, 1):
            raise IllegalMoveError(f"to_play={to_play!r} must be 0 (Black) or 1 (White)")
        history = np.zeros((self.history, self._n), dtype=np.int8)
        history[0] = board
        return GoState(history, groups, np.array([key], dtype=np.int64), int(key),
                       self._no_position, int(to_play), 0, 0, int(np.count_nonzero(board)))

    def to_play(self, state: GoState) -> int:
        return state.player

    def is_terminal(self, state: GoState) -> bool:
        return state.passes >= 2 or state.moves >= self._max_moves

    def move_count(self, state: GoState) -> int:
        return state.moves

    def legal_mask(self, state: GoState) -> np.ndarray:
        out = np.zeros(self._n + 1, dtype=np.bool_)
        if state.passes >= 2 or state.moves >= self._max_moves:
            return out
        K.legal_points(state.board, state.groups, state.seen, state.key, state.prev_key,
                       state.player + 1, self.allow_suicide, self.superko, self._nbr, self._zob,
                       self._nwords, state.peak, out)
        out[self._n] = True
        return out

    def play(self, state: GoState, action: int) -> GoState:
        return self._play(state, action, None)[0]

    def play_with_mask(self, state: GoState, action: int, out: np.ndarray | None = None) -> tuple[GoState, np.ndarray]:
        """:meth:`play` and the new position's legal mask (into ``out`` when given) from one
        compiled call."""
        mask = np.empty(self._n + 1, dtype=np.bool_) if out is None else out
        new, done = self._play(state, action, mask)
        if not done:
            mask[:] = self.legal_mask(new)
        return new, mask

    def state_pool(self, slots: int, capacity: int) -> GoStatePool:
        """Rows of shared arrays for the positions of ``slots`` search trees of ``capacity`` nodes
        each (:class:`selfplay.games.go_pool.GoStatePool`): the search expands every new edge of
        a round in one compiled call, with no state object per node. None when the rows would
        take more than :data:`STATE_POOL_LIMIT_BYTES` (large boards with big searches): the tree
        then keeps a state object per node it creates."""
        from selfplay.games.go_pool import GoStatePool

        if slots * capacity * GoStatePool.bytes_per_row(self) > STATE_POOL_LIMIT_BYTES:
            return None
        return GoStatePool(self, slots, capacity)

    def _play(self, state: GoState, action: int, mask: np.ndarray | None) -> tuple[GoState, bool]:
        """The new state, and True when ``mask`` (if given) was filled with its legal mask."""
        try:
            a = int(action)
        except (TypeError, ValueError):
            raise IllegalMoveError(f"move {action!r} is not an action number") from None
        if state.passes >= 2 or state.moves >= self._max_moves:
            raise IllegalMoveError(
                f"the game is over; move {self._safe_text(a)} by {'BW'[state.player]} cannot be played")
        if a == self._pass:
            history = np.empty_like(state.history)
            history[0] = state.board
            history[1:] = state.history[:-1]
            return GoState(history, state.groups, state.seen, state.key, state.key,
                           1 - state.player, state.passes + 1, state.moves + 1, state.peak), False
        if not 0 <= a < self._n:
            raise IllegalMoveError(
                f"action {a} is off the {self.size}x{self.size} board (points 0..{self._n - 1}, "
                f"pass {self._n})")
        # the new position is terminal (so its mask all False) only at the move cap
        with_mask = mask is not None and state.moves + 1 < self._max_moves
        history = np.empty_like(state.history)
        groups = np.empty_like(state.groups)
        seen = np.empty(state.seen.shape[0] + 1, dtype=np.int64)
        if not with_mask:
            mask = self._no_mask
        st, key, grew, peak = K.play_history(
            state.history, state.groups, state.seen, state.seen[:0], state.key, state.prev_key, state.player + 1, a,
            self.allow_suicide, self.superko, self._nbr, self._zob, self._nwords, state.peak, history, groups, seen,
            mask)
        if st != K.OK:
            reason = _STATUS_TEXT[st]
            if st == K.REPEAT and not self.superko:
                reason = "it retakes a ko at once (recreates the previous board position)"
            raise IllegalMoveError(
                f"move {self.action_to_text(a)} by {'BW'[state.player]} is illegal: {reason}")
        return (GoState(history, groups, seen if grew else state.seen, int(key), state.key, 1 - state.player, 0,
                        state.moves + 1, int(peak)), with_mask)

    def score(self, state: GoState) -> tuple[int, int]:
        """Tromp–Taylor area (black, white): stones plus empty points reaching only that
        colour, komi not included."""
        b, w = K.area_score(state.board, self._nbr)
        return int(b), int(w)

    def score_margin(self, state: GoState) -> float:
        """Black's area minus White's area minus komi (positive: Black ahead)."""
        b, w = self.score(state)
        return b - w - self.komi

    def final_area(self, state: GoState) -> FinalArea:
        """Tromp–Taylor area of ``state`` per point (+1 Black, -1 White, 0 neither) and
        :meth:`score_margin`; the ownership sums to black area minus white area."""
        owner = K.area_owner(state.board, self._nbr).reshape(self.size, self.size)
        b = int(np.count_nonzero(owner == 1))
        w = int(np.count_nonzero(owner == -1))
        return FinalArea(owner, b - w - self.komi)

    def outcome(self, state: GoState) -> float:
        m = self.score_margin(state)
        return 1.0 if m > 0 else (-1.0 if m < 0 else 0.0)

    def result_text(self, state: GoState) -> str:
        """Result in SGF RE style from the Tromp–Taylor score: "B+3.5", "W+0.5" or "0"."""
        m = self.score_margin(state)
        if m == 0:
            return "0"
        return f"{'B' if m > 0 else 'W'}+{abs(m):g}"

    def zobrist(self, state: GoState) -> int:
        """64-bit key of the board and side to move (unsigned)."""
        k = state.key ^ (self._side_key if state.player else 0)
        return k & ((1 << 64) - 1)

    def board_key(self, state: GoState) -> int:
        """64-bit key of the board alone (what positional superko compares), unsigned."""
        return state.key & ((1 << 64) - 1)

    def liberties(self, state: GoState, point: int) -> int:
        """Number of liberties of the group on ``point`` (0 for an empty point)."""
        r = int(state.groups[point, K.REP])
        return 0 if r < 0 else int(K.liberty_count(state.groups, r, self._nwords))

    # ---- encoding ------------------------------------------------------------------------------
    def compact(self, state: GoState) -> np.ndarray:
        return state.board.reshape(self.size, self.size).copy()

    def compact_history(self, state: GoState) -> np.ndarray:
        return state.history.reshape(self.history, self.size, self.size).copy()

    def compact_histories(self, states: Sequence[GoState]) -> np.ndarray:
        if not states:
            return np.zeros((0, self.history, self.size, self.size), dtype=np.int8)
        # concatenate, not stack: stack adds an axis to every array first (several times slower)
        return np.concatenate([s.history for s in states]).reshape(len(states), self.history, self.size, self.size)

    def planes_from_compact(self, boards: np.ndarray, to_play: np.ndarray) -> np.ndarray:
        """Planes 2i and 2i+1: the side to move's and the opponent's stones on board i (0 is
        the current one); plane 2h: ones when Black is to move; plane 2h+1: ones."""
        boards = np.asarray(boards)
        to_play = np.asarray(to_play).astype(np.int8)
        n, h = boards.shape[0], self.history
        if boards.shape[1:] != (h, self.size, self.size):
            raise ValueError(f"boards of shape {boards.shape} do not fit go {self.size}x{self.size} "
                             f"with history {h}")
        planes = np.empty((n, 2 * h + 2, self.size, self.size), dtype=np.float32)
        K.history_planes(np.ascontiguousarray(boards, dtype=np.int8), np.ascontiguousarray(to_play), planes)
        return planes

    # ---- symmetry ------------------------------------------------------------------------------
    @property
    def num_symmetries(self) -> int:
        return 8

    def transform_boards(self, boards: np.ndarray, k: int) -> np.ndarray:
        return dihedral(boards, k)

    def action_permutation(self, k: int) -> np.ndarray:
        perm = np.empty(self._n + 1, dtype=np.int64)
        perm[:self._n] = dihedral_point_permutation(self.size, self.size, k)
        perm[self._n] = self._n
        return perm

    # ---- text ----------------------------------------------------------------------------------
    def _safe_text(self, a: int) -> str:
        return self.action_to_text(a) if 0 <= a <= self._n else str(a)

    def action_to_text(self, action: int) -> str:
        a = int(action)
        if a == self._pass:
            return "pass"
        if not 0 <= a < self._n:
            raise IllegalMoveError(f"action {a} is off the {self.size}x{self.size} board")
        r, c = divmod(a, self.size)
        return f"{COLUMN_LETTERS[c]}{self.size - r}"

    def text_to_action(self, text: str) -> int:
        """Letter-number ("D4", any case), SGF ("dd"; "" and, on boards up to 19, "tt" are
        pass) or "pass"."""
        from selfplay.games.sgf import sgf_to_point

        if not isinstance(text, str):
            raise IllegalMoveError(f"move {text!r} is not text")
        t = text.strip()
        if t.lower() == "pass" or t == "":
            return self._pass
        if len(t) >= 2 and t.isascii() and t[0].isalpha() and t[1:].isdigit():
            letter = t[0].upper()
            if letter in COLUMN_LETTERS[:self.size]:
                c = COLUMN_LETTERS.index(letter)
                r = self.size - int(t[1:])
                if 0 <= r < self.size:
                    return r * self.size + c
            raise IllegalMoveError(
                f"move {text!r} is off the {self.size}x{self.size} board (columns "
                f"A..{COLUMN_LETTERS[self.size - 1]} without I, rows 1..{self.size})")
        if len(t) == 2 and t.isalpha() and t.islower():
            return sgf_to_point(t, self.size)
        raise IllegalMoveError(
            f"move {text!r} is not a Go move (expected e.g. 'D4', SGF 'dd' or 'pass')")

    def render(self, state: GoState) -> str:
        rows = []
        for r in range(self.size):
            cells = " ".join(".XO"[int(v)] for v in state.board[r * self.size:(r + 1) * self.size])
            rows.append(f"{self.size - r:>2} {cells}")
        rows.append("   " + " ".join(COLUMN_LETTERS[:self.size]))
        return "\n".join(rows)

    # ---- benchmark hook ------------------------------------------------------------------------
    def benchmark_playouts(self, num_games: int, seed: int) -> int:
        """Play ``num_games`` random games from the empty board entirely in compiled code;
        return the number of moves played (passes included).

        Each move is a uniformly random legal point (suicide and superko checked under this
        game's options) that does not fill one of the mover's own one-point eyes; a player with
        no such point passes. Games end after two passes or ``max_moves`` moves."""
        return int(K.random_playouts(int(num_games), int(seed) & 0xFFFFFFFF, self._n, self._nbr,
                                     self._zob, self._nwords, self.allow_suicide, self.superko,
                                     self._max_moves))


def position_is_legal(board: np.ndarray) -> bool:
    """True when the compact Go board (int8 (n, n), 0/1/2) is a legal position: every group has
    at least one liberty. Uses the same group and liberty-bitset code as play."""
    board = np.asarray(board, dtype=np.int8)
    if board.ndim != 2 or board.shape[0] != board.shape[1]:
        raise ValueError(f"a Go board must be square, got shape {board.shape}")
    game = _tiny_games.get(board.shape[0])
    if game is None:
        game = _tiny_games[board.shape[0]] = GoGame(size=board.shape[0], tiny=True)
    flat = np.ascontiguousarray(board.reshape(-1))
    groups, _ = K.build_groups(flat, game._nbr, game._zob, game._nwords)
    return bool(K.all_groups_have_liberties(flat, groups, game._nwords))


_tiny_games: dict[int, GoGame] = {}

register_game("go", GoGame)
