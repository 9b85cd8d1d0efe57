"""A torch ``IterableDataset`` over a run directory, for a user's own trainer.

Two ways to read:

- **stream** (``window_positions=None``): every position once, in commit order (optionally
  shuffled within a pool), ``batch_size`` at a time; with ``follow=True`` it goes on with new
  shards as they land. With a ``DataLoader(num_workers=n)`` the shards are split among the
  loader's processes.
- **window** (``window_positions=N``): a :class:`ReplayBuffer` over the newest N positions,
  refreshed with new shards between batches, sampled like the built-in learner does (uniform or
  recency-weighted, with symmetry augmentation), for ``steps`` batches or until ``stop`` is set.

Batches are dicts of tensors: ``planes`` float32 (B, C, H, W), ``policy`` float32 (B, A),
``value`` float32 (B,), ``mask`` bool (B, A), ``full_search`` bool (B,), ``snapshot`` int32
(B,), ``symmetry`` int8 (B,); for games scored by area (Go) also ``ownership`` int8 (B, H, W),
``score_margin`` float32 (B,) (final area and margin from the mover's view) and
``ownership_weight`` float32 (B,). Use ``DataLoader(dataset, batch_size=None)``.
"""

from __future__ import annotations

import os
import threading
import time
from typing import Any, Iterator

import numpy as np
import torch
from torch.utils.data import IterableDataset, get_worker_info

from selfplay.replay.buffer import ReplayBuffer
from selfplay.replay.reader import RunReader, make_record_game
from selfplay.rundir import RunDir


def to_tensors(batch: dict[str, np.ndarray]) -> dict[str, torch.Tensor]:
    return {k: torch.from_numpy(np.ascontiguousarray(v)) for k, v in batch.items()}


class ReplayDataset(IterableDataset):
    """Batches of training tensors read from a run directory (see the module docstring)."""

    def __init__(self, run_dir: str | os.PathLike[str], batch_size: int = 256, *,
                 follow: bool = False, window_positions: int | None = None,
                 recency_weight: float = 0.0, augment: bool = True,
                 policy_targets_only: bool = False, shuffle_positions: int = 0,
                 steps: int | None = None, seed: int | None = None, poll_interval: float = 1.0,
                 idle_timeout: float | None = None, stop: threading.Event | None = None) -> None:
        super().__init__()
        self.run = RunDir.open(run_dir)
        self.batch_size = batch_size
        self.follow = follow
        self.window_positions = window_positions
        self.recency_weight = recency_weight
        self.augment = augment
        self.policy_targets_only = policy_targets_only
        self.shuffle_positions = shuffle_positions
        self.steps = steps
        self.seed = seed
        self.poll_interval = poll_interval
        self.idle_timeout = idle_timeout
        self.stop = stop or threading.Event()

    def __iter__(self) -> Iterator[dict[str, torch.Tensor]]:
        info = get_worker_info()
        part = (info.id, info.num_workers) if info is not None else (0, 1)
        seed = None if self.seed is None else self.seed + 7919 * part[0]
        if self.window_positions is None:
            reader = RunReader(self.run, follow=self.follow, poll_interval=self.poll_interval,
                               idle_timeout=self.idle_timeout, stop=self.stop, part=part)
            for batch in reader.batches(self.batch_size, augment=self.augment, seed=seed,
                                        shuffle_positions=self.shuffle_positions,
                                        policy_targets_only=self.policy_targets_only):
                yield to_tensors(batch)
            return
        yield from self._window(seed)

    def _window(self, seed: int | None) -> Iterator[dict[str, torch.Tensor]]:
        reader = RunReader(self.run)
        buf: ReplayBuffer | None = None
        done = 0
        idle_since = time.monotonic()
        while not self.stop.is_set() and (self.steps is None or done < self.steps):
            new = reader.poll()
            if new:
                idle_since = time.monotonic()
                if buf is None:
                    buf = ReplayBuffer(make_record_game(new[0]), int(self.window_positions or 1),
                                       recency_weight=self.recency_weight, augment=self.augment,
                                       seed=seed)
                buf.add_many(new)
            ready = buf is not None and (buf.policy_target_positions if self.policy_targets_only else len(buf))
            if not ready:
                if self.idle_timeout is not None and time.monotonic() - idle_since >= self.idle_timeout:
                    return
                if self.stop.wait(self.poll_interval):
                    return
                continue
            assert buf is not None
            yield to_tensors(buf.sample(self.batch_size, policy_targets_only=self.policy_targets_only))
            done += 1

    def extra_repr(self) -> str:  # pragma: no cover - cosmetic
        return f"run={self.run.root}, batch_size={self.batch_size}"


def describe(batch: dict[str, Any]) -> str:
    """One line naming each array's shape and dtype (for logs)."""
    return ", ".join(f"{k} {tuple(v.shape)} {v.dtype}" for k, v in batch.items())
