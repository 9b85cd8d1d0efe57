"""The buffer role: one shard of the run's replay buffer — a record store (shard files and the
shared catalog: exactly-once by game id) and an in-RAM replay window of ``window_positions /
count`` positions that the learner samples from.

It owns its timer: every ``tick_seconds`` it writes a shard when the oldest waiting game is due
(``replay.shard_max_age_seconds``) and, every ``metrics_seconds``, its ``buffer`` metric line.
Roles that cannot reach the run directory (a Ray worker on another node) hand it their metric
lines (:meth:`append_metrics`); it appends them to ``RUN/metrics.jsonl``."""

from __future__ import annotations

import threading
import time
from typing import Any

import numpy as np

from selfplay.config import RunConfig
from selfplay.games.registry import make_game
from selfplay.metrics import MetricsLog, append_rows
from selfplay.records import GameRecord
from selfplay.roles.timer import Every
from selfplay.rundir import RunDir
from selfplay.seeding import buffer_seed


class BufferRole:
    """Buffer shard ``index`` of ``count``; see the module docstring."""

    tick_seconds = 0.5
    metrics_seconds = 5.0

    def __init__(self, config: RunConfig, run: RunDir, *, index: int = 0, count: int = 1, session: int = 0,
                 timer: bool = True) -> None:
        from selfplay.replay.buffer import ReplayBuffer
        from selfplay.replay.reader import newest_records
        from selfplay.replay.store import RecordStore

        self.config = config
        self.run = run
        self.index, self.count = index, count
        self.game = make_game(config.game.name, **config.game.options)
        self._lock = threading.RLock()
        #: what opening the store found and repaired (journals replayed, torn tails cut, catalog
        #: rebuilt, stale temporary files removed, shards indexed or quarantined), one sentence each
        self.recovery_lines: list[str] = []
        self.store = RecordStore(run, writer=f"buffer{index}", say=self.recovery_lines.append,
                                 **config.replay.store_options())
        capacity = max(1, config.replay.window_positions // count)
        self.window = ReplayBuffer(self.game, capacity, recency_weight=config.replay.recency_weight,
                                   augment=config.replay.augment, seed=buffer_seed(config.run.seed, session, index))
        self.refilled = 0
        if run.catalog.exists():
            # the newest committed positions (a resume): one shard in ``count`` each, newest first
            self.refilled = self.window.add_many(newest_records(run, capacity, part=(index, count)))
        self.metrics = MetricsLog(run.metrics, "buffer", f"buffer{index}")
        self.newest_snapshot = 0
        self._totals = self.store.totals()
        self._totals_at = time.monotonic()
        self._totals_shards = self.store.commits
        self._metrics_at = 0.0
        self._closed = False
        if self.recovery_lines:  # said in the metrics at once, with the counters after recovery
            self._write_line(event="recovery", recovery="; ".join(self.recovery_lines))
        self._timer = Every(self.tick_seconds, self.tick, f"buffer{index}") if timer else None

    # ---- what the others call ----------------------------------------------------------------
    def add_games(self, records: list[GameRecord]) -> dict[str, Any]:
        """Store ``records`` (game ids already stored or waiting are ignored and counted) and add
        the new ones to the replay window. Returns {"added": [game ids], "duplicates": count}."""
        self._check()
        with self._lock:
            result = self.store.ingest(records)
            for rec in result.accepted:
                self.window.add(rec)
                if rec.num_positions:
                    self.newest_snapshot = max(self.newest_snapshot, int(rec.snapshot.max()))
        return {"added": [r.game_id for r in result.accepted], "duplicates": result.duplicates,
                "positions": sum(r.num_positions for r in result.accepted)}

    def recovery_report(self) -> list[str]:
        """What opening the store found and repaired, as lines for a person ([] if nothing)."""
        return [f"buffer{self.index} recovered the run: {line}" for line in self.recovery_lines]

    def append_metrics(self, rows: list[dict[str, Any]]) -> None:
        """Append metric lines written by a role far from the run directory."""
        append_rows(self.run.metrics, rows)

    def sample(self, batch_size: int, **kwargs: Any) -> dict[str, np.ndarray]:
        self._check()
        return self.window.sample(batch_size, **kwargs)

    def flush(self) -> dict[str, Any]:
        """Write the waiting games now; return the counters."""
        with self._lock:
            self.store.flush()
            return self.stats(fresh=True)

    def stats(self, fresh: bool = False) -> dict[str, Any]:
        """Durable counts of the whole catalog (shared by all shards) and this shard's waiting
        games; ``games_total``/``positions_total`` are their sums (what the run has stored)."""
        with self._lock:
            # The catalog count is cached for a second, but never across a commit of this store.
            if (fresh or time.monotonic() - self._totals_at > 1.0
                    or self.store.commits != self._totals_shards):
                self._totals = self.store.totals()
                self._totals_at = time.monotonic()
                self._totals_shards = self.store.commits
            t = self._totals
            pending_g, pending_p = self.store.pending_games, self.store.pending_positions
            return {
                "games_total": t.games + pending_g, "positions_total": t.positions + pending_p,
                "games_durable": t.games, "positions_durable": t.positions,
                "pending_games": pending_g, "pending_positions": pending_p,
                "duplicates_total": t.duplicates, "shards_total": t.shards,
                "window_positions": len(self.window), "window_capacity": self.window.capacity,
                "window_policy_targets": self.window.policy_target_positions,
                "newest_snapshot_in_data": max(self.newest_snapshot, t.newest_snapshot or 0),
                "refilled_positions": self.refilled,
            }

    # ---- its own clock -----------------------------------------------------------------------
    def tick(self) -> None:
        """Write a shard if the oldest waiting game is due; the metric line when it is due."""
        with self._lock:
            if self._closed:
                return
            self.store.flush_if_due()
            if time.monotonic() - self._metrics_at >= self.metrics_seconds:
                self._write_line()

    def _write_line(self, **extra: Any) -> None:
        s = self.stats()
        self._metrics_at = time.monotonic()
        self.metrics.write(games_total=s["games_total"], positions_total=s["positions_total"],
                           pending_games=s["pending_games"], duplicates_total=s["duplicates_total"],
                           window_positions=s["window_positions"], window_capacity=s["window_capacity"],
                           shards_total=s["shards_total"], newest_snapshot_in_data=s["newest_snapshot_in_data"],
                           refilled_positions=s["refilled_positions"], **extra)

    def _check(self) -> None:
        if self._timer is not None:
            self._timer.check()

    def close(self) -> dict[str, Any]:
        """Stop the timer, write the waiting games, write the final line, release the store.
        A store that failed to write (disk full, read-only) is closed without sealing: what it
        accepted is in its journal and sealed when the run next opens."""
        if self._timer is not None:
            self._timer.stop()
            self._timer = None
        from selfplay.replay.store import StoreWriteError

        with self._lock:
            if self._closed:
                return self.stats()
            try:
                self.store.flush()
            except StoreWriteError:
                pass  # a failed store (disk full): its games stay in the journal, sealed at the next open
            stats = self.stats(fresh=True)
            self._write_line(final=True)
            self._closed = True
            self.store.close()
            return stats


def merge_buffer_stats(parts: list[dict[str, Any]]) -> dict[str, Any]:
    """Counters of all buffer shards as one buffer: ``games_total``/``positions_total`` are the
    catalog's durable counts plus every shard's waiting games."""
    durable_g = max(p["games_durable"] for p in parts)
    durable_p = max(p["positions_durable"] for p in parts)
    pend_g = sum(p["pending_games"] for p in parts)
    pend_p = sum(p["pending_positions"] for p in parts)
    return {
        "games_total": durable_g + pend_g, "positions_total": durable_p + pend_p,
        "games_durable": durable_g, "positions_durable": durable_p,
        "pending_games": pend_g, "pending_positions": pend_p,
        "duplicates_total": max(p["duplicates_total"] for p in parts),
        "shards_total": max(p["shards_total"] for p in parts),
        "window_positions": sum(p["window_positions"] for p in parts),
        "window_capacity": sum(p["window_capacity"] for p in parts),
        "window_policy_targets": sum(p["window_policy_targets"] for p in parts),
        "newest_snapshot_in_data": max(p["newest_snapshot_in_data"] for p in parts),
        "buffer_shards": len(parts),
    }
