"""The finished-game record: what self-play produces and the replay storage keeps.

One :class:`GameRecord` per finished game, with per-position data held column-wise (one numpy
array per field, first axis = position index in the game), so that encoding, ingest and sampling
work on whole arrays. The on-disk encoding is documented in ``docs/record-format.md`` and
implemented in :mod:`selfplay.replay.codec`.

Perspective: ``root_values`` and ``outcomes`` are from the view of the player to move at that
position (the *mover*), in [-1, 1]; ``result`` is from player 0's view.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from selfplay.games.base import FinalArea


@dataclass
class GameRecord:
    """One finished game.

    Per-game fields
    ---------------
    game_id: unique and stable under retries (derived from run seed, worker id and game index).
    game, game_options: registry name and options (``make_game(game, **game_options)``).
    worker_id: which self-play worker played it.
    seed: the seed that determines the game's randomness.
    search: the search settings used (plain JSON-able dict).
    result: final result from player 0's view: +1, 0, -1.
    resigned: True if the game ended by resignation.
    resign_disabled: True if resignation was switched off for this game (false-positive probe).
    resign_would_have: player (0/1) whose root value first crossed the resignation threshold in
        a game with resignation disabled, or -1; that player winning anyway is a false positive.
    started_at, finished_at: Unix time in seconds.
    num_actions: the game's number of actions A (0 = not given; the replay codec then asks the
        game registry). :class:`GameRecordBuilder` fills it from the legal mask's length.
    final_ownership: int8 ``compact_shape`` or None: area of the game's last position from
        player 0's view (+1 player 0's, -1 player 1's, 0 nobody's; Go: Tromp–Taylor area).
        None for games without a notion of area and for records written before the field.
    final_margin: float or None: player 0's area minus player 1's minus komi, in points, of the
        same position; None exactly when ``final_ownership`` is.
    final_area_scored: True when the game ended under its rules and was scored on that
        position (the result is the margin's sign); False when the game ended otherwise
        (resignation, or a move cap that does not score): the area is then that of the
        position at the end, not a final result.

    Per-position columns (length T = number of positions = number of moves played)
    ------------------------------------------------------------------------------
    boards: int8 (T, *compact_shape): compact board before the move (0 empty, 1 / 2 players).
    to_play: int8 (T,): player to move.
    actions: int16 (T,): the move played.
    legal: uint8 (T, ceil(A/8)): legal-move mask, ``np.packbits`` of a (A,) bool row.
    policy_offsets: int32 (T+1,): position t's policy target is entries
        ``policy_offsets[t]:policy_offsets[t+1]`` of the next two arrays (CSR layout).
    policy_actions: int16 (nnz,): actions with a non-zero target.
    policy_weights: float32 (nnz,): visit counts (PUCT) or improved-policy probabilities (Gumbel);
        normalise per position to get the target distribution.
    root_values: float32 (T,): search's root value, from the mover's view.
    full_search: bool (T,): True if the move had the full budget (playout cap randomisation);
        only these positions are policy targets.
    outcomes: int8 (T,): final result from the mover's view: +1, 0, -1.
    snapshot: int32 (T,): snapshot version that played the move.
    """

    game_id: str
    game: str
    game_options: dict[str, Any]
    worker_id: str
    seed: int
    search: dict[str, Any]
    result: int
    boards: np.ndarray
    to_play: np.ndarray
    actions: np.ndarray
    legal: np.ndarray
    policy_offsets: np.ndarray
    policy_actions: np.ndarray
    policy_weights: np.ndarray
    root_values: np.ndarray
    full_search: np.ndarray
    outcomes: np.ndarray
    snapshot: np.ndarray
    resigned: bool = False
    resign_disabled: bool = False
    resign_would_have: int = -1
    started_at: float = 0.0
    finished_at: float = 0.0
    extra: dict[str, Any] = field(default_factory=dict)
    num_actions: int = 0
    final_ownership: np.ndarray | None = None
    final_margin: float | None = None
    final_area_scored: bool = False

    @property
    def num_positions(self) -> int:
        return int(self.actions.shape[0])

    def policy_target(self, t: int, num_actions: int) -> np.ndarray:
        """Dense normalised policy target of position ``t``: float32 (num_actions,)."""
        lo, hi = int(self.policy_offsets[t]), int(self.policy_offsets[t + 1])
        out = np.zeros(num_actions, dtype=np.float32)
        out[self.policy_actions[lo:hi]] = self.policy_weights[lo:hi]
        s = out.sum()
        return out / s if s > 0 else out

    def legal_mask(self, t: int, num_actions: int) -> np.ndarray:
        """Dense legal mask of position ``t``: bool (num_actions,)."""
        return np.unpackbits(self.legal[t], count=num_actions).astype(bool)


class GameRecordBuilder:
    """Collects one game's positions as it is played and produces a :class:`GameRecord`.

    Call :meth:`add_position` before each move, then :meth:`finish` with the result."""

    def __init__(self, game_id: str, game: str, game_options: dict[str, Any], worker_id: str,
                 seed: int, search: dict[str, Any], started_at: float) -> None:
        self.meta = dict(game_id=game_id, game=game, game_options=game_options,
                         worker_id=worker_id, seed=seed, search=search)
        self.started_at = started_at
        self._boards: list[np.ndarray] = []
        self._to_play: list[int] = []
        self._actions: list[int] = []
        self._legal: list[np.ndarray] = []
        self._pol_actions: list[np.ndarray] = []
        self._pol_weights: list[np.ndarray] = []
        self._root_values: list[float] = []
        self._full: list[bool] = []
        self._snapshot: list[int] = []
        self._num_actions = 0

    def add_position(self, board: np.ndarray, to_play: int, action: int, legal_mask: np.ndarray,
                     policy_actions: np.ndarray, policy_weights: np.ndarray, root_value: float,
                     full_search: bool, snapshot: int) -> None:
        self._num_actions = int(np.asarray(legal_mask).shape[-1])
        self._boards.append(np.asarray(board, dtype=np.int8))
        self._to_play.append(int(to_play))
        self._actions.append(int(action))
        self._legal.append(np.packbits(np.asarray(legal_mask, dtype=bool)))
        self._pol_actions.append(np.asarray(policy_actions, dtype=np.int16))
        self._pol_weights.append(np.asarray(policy_weights, dtype=np.float32))
        self._root_values.append(float(root_value))
        self._full.append(bool(full_search))
        self._snapshot.append(int(snapshot))

    def finish(self, result: int, finished_at: float, *, resigned: bool = False,
               resign_disabled: bool = False, resign_would_have: int = -1,
               final_area: FinalArea | None = None, final_area_scored: bool = False) -> GameRecord:
        """``result`` from player 0's view (+1, 0, -1). ``final_area``: the area of the game's
        last position (:meth:`selfplay.games.base.Game.final_area`), None for games without
        one; ``final_area_scored``: the result was scored on it (see :class:`GameRecord`)."""
        to_play = np.array(self._to_play, dtype=np.int8)
        lengths = [len(a) for a in self._pol_actions]
        offsets = np.zeros(len(lengths) + 1, dtype=np.int32)
        np.cumsum(lengths, out=offsets[1:])
        outcomes = np.where(to_play == 0, result, -result).astype(np.int8)
        empty_i16 = np.zeros(0, dtype=np.int16)
        empty_f32 = np.zeros(0, dtype=np.float32)
        return GameRecord(
            **self.meta,
            result=int(result),
            boards=np.stack(self._boards) if self._boards else np.zeros((0, 0, 0), dtype=np.int8),
            to_play=to_play,
            actions=np.array(self._actions, dtype=np.int16),
            legal=np.stack(self._legal) if self._legal else np.zeros((0, 0), dtype=np.uint8),
            policy_offsets=offsets,
            policy_actions=np.concatenate(self._pol_actions) if self._pol_actions else empty_i16,
            policy_weights=np.concatenate(self._pol_weights) if self._pol_weights else empty_f32,
            root_values=np.array(self._root_values, dtype=np.float32),
            full_search=np.array(self._full, dtype=bool),
            outcomes=outcomes,
            snapshot=np.array(self._snapshot, dtype=np.int32),
            resigned=resigned,
            resign_disabled=resign_disabled,
            resign_would_have=resign_would_have,
            started_at=self.started_at,
            finished_at=finished_at,
            num_actions=self._num_actions,
            final_ownership=None if final_area is None else np.asarray(final_area.ownership, dtype=np.int8),
            final_margin=None if final_area is None else float(final_area.margin),
            final_area_scored=final_area is not None and bool(final_area_scored),
        )
