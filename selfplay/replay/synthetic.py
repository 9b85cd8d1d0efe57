"""Synthetic game records: random legal games with made-up visit counts.

For benchmarks, load tests and tests of the storage path (no network, no search). Every move
is legal under the game's own rules; the "visits" are random counts over a random subset of
the legal moves that always contains the move played.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np

from selfplay.games.base import Game
from selfplay.records import GameRecord, GameRecordBuilder


def random_record(game: Game, rng: np.random.Generator, game_id: str, *,
                  game_name: str | None = None, game_options: dict[str, Any] | None = None,
                  worker_id: str = "synthetic", snapshot: int = 0, max_entries: int = 24,
                  full_search_share: float = 0.25, max_moves: int | None = None,
                  started_at: float = 0.0, finished_at: float = 0.0) -> GameRecord:
    """One random legal game of ``game`` as a record.

    ``max_entries``: most non-zero visit entries per position; ``full_search_share``: share of
    positions flagged as full searches; ``max_moves``: stop early (the game is then scored a draw)."""
    b = GameRecordBuilder(game_id, game_name or game.name,
                          dict(game.options() if game_options is None else game_options),
                          worker_id, int(rng.integers(2**31)), {"kind": "synthetic"}, started_at)
    state = game.initial_state()
    limit = game.max_moves if max_moves is None else max_moves
    moves = 0
    while not game.is_terminal(state) and moves < limit:
        mask = game.legal_mask(state)
        legal = np.flatnonzero(mask)
        action = int(rng.choice(legal))
        k = int(min(len(legal), rng.integers(1, max_entries + 1)))
        others = legal[legal != action]
        chosen = np.concatenate(([action], rng.choice(others, size=min(k - 1, len(others)), replace=False)))
        visits = rng.integers(1, 50, size=chosen.shape[0]).astype(np.float32)
        b.add_position(game.compact(state), game.to_play(state), action, mask, chosen, visits,
                       float(rng.uniform(-1, 1)), bool(rng.random() < full_search_share), snapshot)
        state = game.play(state, action)
        moves += 1
    terminal = game.is_terminal(state)
    result = int(game.outcome(state)) if terminal else 0
    return b.finish(result, finished_at, final_area=game.final_area(state), final_area_scored=terminal)


def with_id(rec: GameRecord, game_id: str, **changes: Any) -> GameRecord:
    """A shallow copy of ``rec`` under another game id (arrays shared)."""
    out = copy.copy(rec)
    out.game_id = game_id
    for k, v in changes.items():
        setattr(out, k, v)
    return out
