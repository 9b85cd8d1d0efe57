"""The snapshot publishing role: publishes version 1 (the run's initial weights) when a run
starts with none, follows ``RUN/snapshots`` on its own timer, and serves the newest version that
loads and fits the game to the self-play workers.

Versions only go up: a newer snapshot that does not load or fit is refused (once, with its
reason) and the previous one stays served. ``hold`` turns the loaded weights into what workers
receive: the arrays themselves in one process; on Ray, an object-store reference (one copy per
node, shared by all workers there)."""

from __future__ import annotations

import threading
from typing import Any, Callable

import numpy as np

from selfplay.config import RunConfig
from selfplay.errors import SnapshotError
from selfplay.games.registry import make_game
from selfplay.metrics import MetricsLog
from selfplay.roles.timer import Every
from selfplay.rundir import RunDir
from selfplay.seeding import network_seed

Weights = dict[str, np.ndarray]


def initial_network(config: RunConfig) -> Any:
    """The run's version-1 network: the configured architecture with weights from the run seed."""
    from selfplay.network import build_network

    game = make_game(config.game.name, **config.game.options)
    return build_network(game, config.network, seed=network_seed(config.run.seed))


class SnapshotServerRole:
    """Publishes version 1 if the run has no snapshot, then serves the newest good version."""

    def __init__(self, config: RunConfig, run: RunDir, *, hold: Callable[[Weights], Any] = lambda w: w,
                 metrics: Any = None, timer: bool = True) -> None:
        from selfplay.snapshots import SnapshotStore

        self.config = config
        self.run = run
        #: gating is on: serve only what the evaluation role accepted (RUN/accepted-snapshot.json)
        self.gated = config.evaluation.gate_threshold is not None
        self.game_name = config.game.name
        self.game_options = dict(config.game.options)
        self.store = SnapshotStore(run, source="snapshots")
        self.hold = hold
        self.metrics = MetricsLog(metrics if metrics is not None else run.metrics, "snapshot_server", "snapshots")
        self._lock = threading.RLock()
        self.version = 0
        self.published_at = 0.0
        self._held: Any = None
        self.refused: dict[int, str] = {}
        self.versions_loaded_total = 0
        net = initial_network(config)
        # every worker's network has these tensors: a snapshot that does not fit is refused here, once
        self.expected_shapes = {k: tuple(v.shape) for k, v in net.state_dict().items()}
        self.probe_net = net  # and its dtypes and outputs on probe positions (SnapshotStore.load)
        if self.store.latest_version() == 0:
            self.store.publish(net, extra={"phase": "initial"})  # version 1: the one place it is published
        self.refresh()
        self._timer = Every(max(0.1, config.worker.snapshot_poll_seconds), self.refresh, "snapshot-server") if timer else None

    def refresh(self) -> int:
        """Adopt the newest snapshot on disk if it is newer than the one served; return the version
        served. With gating (``[evaluation] gate_threshold``) only versions up to the one gating
        last accepted are served (AlphaGo Zero's evaluator; Silver et al. 2017)."""
        with self._lock:
            ceiling = self._gate_ceiling()
            for version in reversed(self.store.versions()):
                if version > ceiling:
                    continue
                if version <= self.version:
                    break
                if version in self.refused:
                    continue
                try:
                    tensors, info = self.store.load(version, game=self.game_name, game_options=self.game_options,
                                                    expected_shapes=self.expected_shapes,
                                                    probe_net=self.probe_net)
                except SnapshotError as exc:
                    self.refused[version] = str(exc)
                    continue
                self._held = self.hold({name: t.numpy() for name, t in tensors.items()})
                self.versions_loaded_total += 1
                self.version = info.version
                self.published_at = info.published_at
                self._write_line()
                break
            return self.version

    def _gate_ceiling(self) -> float:
        if self.gated:
            from selfplay.roles.evaluation import read_accepted_version

            return read_accepted_version(self.run)
        return float("inf")

    def current(self, known_version: int = -1) -> tuple[int, Any]:
        """(version, weights) if the served version is newer than ``known_version``, else (version, None)."""
        if self._timer is not None:
            self._timer.check()
        with self._lock:
            if self.version > known_version and self._held is not None:
                return self.version, self._held
            return self.version, None

    def info(self) -> dict[str, Any]:
        with self._lock:
            return {"version": self.version, "published_at": self.published_at,
                    "versions_loaded_total": self.versions_loaded_total, "refused": dict(self.refused)}

    def _write_line(self, **extra: Any) -> None:
        self.metrics.write(version=self.version, versions_loaded_total=self.versions_loaded_total,
                           refused_total=len(self.refused), **extra)

    def close(self) -> None:
        """Stop the timer and write the final line."""
        if self._timer is not None:
            self._timer.stop()
            self._timer = None
        with self._lock:
            self._write_line(final=True)

