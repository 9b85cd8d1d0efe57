"""Turning compact positions into training arrays: input planes, policy target, legal mask,
value target (and, for games scored by area, the final ownership and score margin), with an
optional board symmetry per position.

Shared by the replay buffer (sampling), the run reader (streaming) and the export, so all three
produce the same arrays for the same position.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from selfplay.games.base import Game
from selfplay.records import GameRecord


class BatchBuilder:
    """Builds batches for one game. ``perms[k, a]`` is the action ``a`` becomes under symmetry ``k``."""

    def __init__(self, game: Game) -> None:
        self.game = game
        self.num_actions = game.num_actions
        self.num_symmetries = max(1, int(game.num_symmetries))
        self.history = max(1, int(game.history_length))
        self.compact_shape = tuple(game.compact_shape)
        self.perms = np.stack([np.asarray(game.action_permutation(k), dtype=np.int64)
                               for k in range(self.num_symmetries)])
        #: the game is scored by area (Go): batches carry ownership, score_margin, ownership_weight
        self.has_area = game.final_area(game.initial_state()) is not None

    def build(self, boards: np.ndarray, to_play: np.ndarray, legal_packed: np.ndarray,
              pol_rows: np.ndarray, pol_cols: np.ndarray, pol_weights: np.ndarray,
              outcomes: np.ndarray, full_search: np.ndarray, snapshot: np.ndarray,
              symmetry: np.ndarray | None = None, final_ownership: np.ndarray | None = None,
              final_margin: np.ndarray | None = None,
              area_weight: np.ndarray | None = None) -> dict[str, np.ndarray]:
        """A batch of B positions.

        boards: int8 (B, history, *compact_shape), current board first, zeros before the start;
        to_play: int8 (B,); legal_packed: uint8 (B, ceil(A/8)); pol_rows/pol_cols/pol_weights:
        the policy entries as (position in batch, action, weight) triples; outcomes: int8 (B,)
        from the mover's view; symmetry: int (B,) symmetry index per position, or None.
        For a game scored by area (``has_area``): final_ownership int8 (B, *compact_shape),
        final_margin (B,) points, both from player 0's view, and area_weight (B,) 1 where they
        are a target (the game was scored on that area), 0 elsewhere; None: no target (all 0).

        Returns float32 ``planes`` (B, C, H, W); float32 ``policy`` (B, A), each row summing to 1
        (all zero for a position without a policy target); float32 ``value`` (B,) in {-1, 0, 1}
        from the mover's view; bool ``mask`` (B, A); bool ``full_search`` (B,); int32
        ``snapshot`` (B,); int8 ``symmetry`` (B,). With ``has_area`` also int8 ``ownership``
        (B, *compact_shape) and float32 ``score_margin`` (B,) from the mover's view (the board
        under the same symmetry as the planes), float32 ``ownership_weight`` (B,).
        """
        b = int(to_play.shape[0])
        a = self.num_actions
        k = np.zeros(b, dtype=np.int64) if symmetry is None else np.asarray(symmetry, dtype=np.int64)
        mask = np.unpackbits(legal_packed, axis=1, count=a).view(bool)
        cols = np.asarray(pol_cols, dtype=np.int64)
        if symmetry is not None and self.num_symmetries > 1 and np.any(k):
            boards = self._transform(boards, k)
            cols = self.perms[k[pol_rows], cols]
            moved = np.empty_like(mask)
            np.put_along_axis(moved, self.perms[k], mask, axis=1)
            mask = moved
        area = self._area(to_play, k if symmetry is not None else None, final_ownership,
                          final_margin, area_weight) if self.has_area else {}
        planes = self.game.planes_from_compact(boards, np.asarray(to_play, dtype=np.int8))
        flat = np.asarray(pol_rows, dtype=np.int64) * a + cols
        policy = np.bincount(flat, weights=pol_weights, minlength=b * a).reshape(b, a)
        sums = policy.sum(axis=1, keepdims=True)
        policy = (policy / np.where(sums > 0, sums, 1.0)).astype(np.float32)
        return {
            "planes": np.ascontiguousarray(planes, dtype=np.float32),
            "policy": policy,
            "value": np.asarray(outcomes, dtype=np.float32),
            "mask": mask,
            "full_search": np.asarray(full_search, dtype=bool),
            "snapshot": np.asarray(snapshot, dtype=np.int32),
            "symmetry": k.astype(np.int8),
            **area,
        }

    def _transform(self, arrays: np.ndarray, k: np.ndarray) -> np.ndarray:
        """``arrays[i]`` (board on its last two axes) under symmetry ``k[i]``, for every i."""
        out = np.empty_like(arrays)
        for s in np.unique(k):
            sel = k == s
            out[sel] = self.game.transform_boards(arrays[sel], int(s))
        return out

    def _area(self, to_play: np.ndarray, k: np.ndarray | None, own: np.ndarray | None,
              margin: np.ndarray | None, weight: np.ndarray | None) -> dict[str, np.ndarray]:
        """Area targets from the mover's view: player 0's view times +1 / -1 by the mover."""
        b = int(np.asarray(to_play).shape[0])
        if own is None or margin is None or weight is None:
            return {"ownership": np.zeros((b, *self.compact_shape), dtype=np.int8),
                    "score_margin": np.zeros(b, dtype=np.float32),
                    "ownership_weight": np.zeros(b, dtype=np.float32)}
        sign = np.where(np.asarray(to_play) == 0, 1, -1).astype(np.int8)
        own = np.asarray(own, dtype=np.int8) * sign.reshape(-1, *([1] * len(self.compact_shape)))
        if k is not None and self.num_symmetries > 1 and np.any(k):
            own = self._transform(own, k)
        return {"ownership": np.ascontiguousarray(own),
                "score_margin": (np.asarray(margin, dtype=np.float32) * sign).astype(np.float32),
                "ownership_weight": np.asarray(weight, dtype=np.float32)}

    def history_of(self, boards: np.ndarray) -> np.ndarray:
        """History stacks of every position of one game: (T, history, *compact_shape) from the
        game's boards (T, *compact_shape); board t-j at slot j, zeros before the first move."""
        t = boards.shape[0]
        out = np.zeros((t, self.history, *boards.shape[1:]), dtype=np.int8)
        for j in range(self.history):
            if j < t:
                out[j:, j] = boards[:t - j]
        return out

    def from_record(self, rec: GameRecord, symmetry: np.ndarray | None = None,
                    positions: np.ndarray | None = None) -> dict[str, np.ndarray]:
        """Training arrays for the positions of one record (all, or the indices ``positions``)."""
        idx = np.arange(rec.num_positions) if positions is None else np.asarray(positions, dtype=np.int64)
        hist = self.history_of(np.asarray(rec.boards))[idx]
        off = np.asarray(rec.policy_offsets, dtype=np.int64)
        counts = off[idx + 1] - off[idx]
        total = int(counts.sum())
        excl = np.cumsum(counts) - counts
        entry = np.arange(total) - np.repeat(excl, counts) + np.repeat(off[idx], counts)
        rows = np.repeat(np.arange(len(idx)), counts)
        return self.build(hist, np.asarray(rec.to_play)[idx], np.asarray(rec.legal)[idx], rows,
                          np.asarray(rec.policy_actions)[entry],
                          np.asarray(rec.policy_weights, dtype=np.float64)[entry],
                          np.asarray(rec.outcomes)[idx], np.asarray(rec.full_search)[idx],
                          np.asarray(rec.snapshot)[idx], symmetry, *self._record_area(rec, len(idx)))

    def _record_area(self, rec: GameRecord, n: int) -> tuple[np.ndarray | None, ...]:
        """(ownership, margin, weight) of a record repeated for ``n`` positions, or Nones."""
        if not self.has_area or rec.final_ownership is None or rec.final_margin is None:
            return None, None, None
        own = np.broadcast_to(np.asarray(rec.final_ownership, dtype=np.int8), (n, *self.compact_shape))
        return (own, np.full(n, rec.final_margin, dtype=np.float32),
                np.full(n, 1.0 if rec.final_area_scored else 0.0, dtype=np.float32))


def concat_batches(parts: list[dict[str, Any]]) -> dict[str, np.ndarray]:
    """Concatenate batches field by field."""
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
