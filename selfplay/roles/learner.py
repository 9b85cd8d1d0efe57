"""The learner role: trains the network from the buffer's replay window and publishes snapshots.

On start it continues from ``RUN/learner/checkpoint.*`` (a restart or a resume), else from the
newest snapshot (version 1, published by the snapshot role, on a fresh run). It trains only as far
as the target reuse ratio allows (samples trained per position stored), publishes a snapshot
every ``learner.steps_per_snapshot`` steps and checkpoints with each, and again when it stops.
Its metric lines are the ``learner`` lines of :class:`selfplay.learner.Learner`, plus a final one.
"""

from __future__ import annotations

import time
from typing import Any, Callable

from selfplay.config import RunConfig
from selfplay.games.registry import make_game
from selfplay.metrics import MetricsLog
from selfplay.rundir import RunDir
from selfplay.seeding import network_seed


class LearnerRole:
    """``sampler`` has the replay buffer's ``sample(batch_size, policy_targets_only=...)``;
    ``generated()`` returns the positions the run has stored so far (a running total)."""

    def __init__(self, config: RunConfig, run: RunDir, *, sampler: Any, generated: Callable[[], int]) -> None:
        import torch

        from selfplay.learner import Learner
        from selfplay.network import build_network
        from selfplay.snapshots import SnapshotStore

        torch.set_num_threads(config.learner.torch_threads)
        self.config = config
        self.game = make_game(config.game.name, **config.game.options)
        self.net = build_network(self.game, config.network, seed=network_seed(config.run.seed))
        self.store = SnapshotStore(run, source="learner")
        self.generated = generated
        self.metrics = MetricsLog(run.metrics, "learner", "learner")
        self.learner = Learner(self.game, self.net, config.learner, sampler, self.store, self.metrics)
        self.resumed_from = self.learner.resume()  # checkpoint, else the newest snapshot
        self._closed = False

    def train(self, seconds: float, *, wait: bool = True, max_steps: int | None = None) -> dict[str, Any]:
        """Train for up to ``seconds`` (and ``max_steps``) as far as the reuse ratio allows; with
        ``wait`` it waits for data until ``seconds`` pass, else it returns when no step is allowed."""
        deadline = time.monotonic() + seconds
        steps = 0
        while time.monotonic() < deadline and (max_steps is None or steps < max_steps):
            chunk = 8 if max_steps is None else min(8, max_steps - steps)
            took = self.learner.train_available(int(self.generated()), max_steps=chunk)
            steps += took
            if took == 0:
                if not wait:
                    break
                time.sleep(min(0.25, max(0.0, deadline - time.monotonic())))
        return self.status(steps)

    def status(self, steps: int = 0) -> dict[str, Any]:
        last = self.learner.history[-1] if self.learner.history else {}
        return {"step": self.learner.step, "steps": steps, "snapshot_version": self.learner.snapshot_version,
                "samples_trained_total": self.learner.samples_trained_total,
                "reuse_ratio": self.learner.reuse_ratio, "loss": last.get("loss"),
                "resumed_from": self.resumed_from}

    def check_reachable(self, total_positions: int) -> None:
        """ConfigError when a run capped at ``total_positions`` can never satisfy the reuse ratio."""
        self.learner.check_reachable(total_positions)

    def checkpoint(self) -> int:
        """Save a checkpoint now; returns the newest snapshot version the learner published."""
        self.learner.save_checkpoint()
        return self.learner.snapshot_version

    def close(self, save: bool = True) -> int | None:
        """Publish what was trained since the newest snapshot as a last one (which checkpoints
        too), or just checkpoint — unless ``save`` is false, as after the learner itself failed —
        and write the final line. Returns the newest snapshot version this learner knows (None
        when it was already closed)."""
        if self._closed:
            return None
        self._closed = True
        L = self.learner
        if save:
            newest = self.store.latest()
            if L.step > 0 and (newest is None or L.step != newest.training_steps):
                L.publish(extra={"phase": "final"})
            else:
                L.save_checkpoint()
        self.metrics.write(step=L.step, samples_trained_total=L.samples_trained_total, reuse_ratio=L.reuse_ratio,
                           snapshot_version=L.snapshot_version, pretrain_steps=L.pretrain_steps,
                           resumed_from=self.resumed_from, final=True)
        return int(L.snapshot_version)
