"""Ray actors that wrap the :mod:`selfplay` library.

- :class:`SnapshotActor` (head): follows ``RUN/snapshots``; each new version's weights are put in
  Ray's object store once (``ray.put``), and workers fetch that one object — on a node, Ray keeps
  one copy in shared memory for all its workers — instead of each reading a file.
- :class:`BufferActor` (head): the record store (shards + catalog: exactly-once by game id) and
  the in-RAM replay window the learner samples from.
- :class:`LearnerActor` (head): the learner; it checkpoints with every snapshot and, when Ray
  restarts it, continues from its checkpoint (or the newest snapshot).
- :class:`SelfPlayActor` (anywhere): one self-play worker playing many games at once; it sends
  finished games to the buffer and picks up new snapshots between steps.

Each actor takes the resolved run config as a plain dict (``RunConfig.model_dump``), so a
restarted actor rebuilds exactly what it had. Every actor is restartable (``max_restarts=-1``):
constructors only read what is on disk or in other actors.
"""

from __future__ import annotations

import hashlib
import os
import re
import time
from pathlib import Path
from typing import Any

import numpy as np
import ray

from selfplay.config import RunConfig, config_from_dict
from selfplay.errors import SelfplayError, SnapshotError
from selfplay.games.registry import make_game
from selfplay.metrics import MetricsLog
from selfplay.rundir import RunDir


def _config(config_data: dict[str, Any]) -> RunConfig:
    return config_from_dict(config_data, origin="run config")


def derive_seed(*parts: Any) -> int:
    """A 63-bit seed from the run seed and the parts that tell workers and incarnations apart."""
    digest = hashlib.blake2b(repr(parts).encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") >> 1


# ---- snapshots ------------------------------------------------------------------------------------


@ray.remote(num_cpus=0)
class SnapshotActor:
    """Follows the run's snapshot store and holds the newest version's weights in the object store.

    Versions only increase: :meth:`refresh` moves to a newer complete snapshot that loads and fits
    the game, and otherwise keeps the one it has."""

    def __init__(self, run_root: str, config_data: dict[str, Any]) -> None:
        from selfplay.snapshots import SnapshotStore

        config = _config(config_data)
        self.game_name = config.game.name
        self.game_options = dict(config.game.options)
        self.store = SnapshotStore(RunDir(Path(run_root)), source="snapshot-actor")
        self.version = 0
        self.published_at = 0.0
        self._ref: ray.ObjectRef | None = None
        self.refused: dict[int, str] = {}
        self.puts = 0
        from selfplay.network import build_network

        game = make_game(config.game.name, **config.game.options)
        net = build_network(game, config.network, seed=derive_seed(config.run.seed, "network"))
        # every worker's network has these tensors: a snapshot that does not fit is refused here, once
        self.expected_shapes = {k: tuple(v.shape) for k, v in net.state_dict().items()}
        self.probe_net = net  # and its dtypes and outputs on probe positions (SnapshotStore.load)
        if self.store.latest_version() == 0:
            self.store.publish(net, extra={"phase": "initial"})  # version 1: the initial weights
        self.refresh()

    def refresh(self) -> int:
        """Adopt the newest snapshot on disk if it is newer than ours; return the current version."""
        for version in reversed(self.store.versions()):
            if version <= self.version:
                break
            if version in self.refused:
                continue
            try:
                tensors, info = self.store.load(version, game=self.game_name, game_options=self.game_options,
                                                expected_shapes=self.expected_shapes, probe_net=self.probe_net)
            except SnapshotError as exc:
                self.refused[version] = str(exc)
                continue
            arrays = {name: t.numpy() for name, t in tensors.items()}
            self._ref = ray.put(arrays)  # once per version: every worker reads this one object
            self.puts += 1
            self.version = info.version
            self.published_at = info.published_at
            break
        return self.version

    def current(self, known_version: int = -1) -> tuple[int, list[ray.ObjectRef]]:
        """(version, [weights ref]) if newer than ``known_version``, else (version, []).

        The reference is wrapped in a list so that Ray hands it over instead of resolving it."""
        if self.version > known_version and self._ref is not None:
            return self.version, [self._ref]
        return self.version, []

    def info(self) -> dict[str, Any]:
        return {"version": self.version, "published_at": self.published_at, "puts": self.puts,
                "refused": dict(self.refused), "node_id": ray.get_runtime_context().get_node_id()}


class SnapshotClient:
    """The snapshot actor as the other actors use it. (A bare actor handle given to an actor's
    constructor travels through the object store, which Ray warns may break restarts; this
    wrapper travels inline.)"""

    def __init__(self, handle: Any) -> None:
        self.handle = handle

    def current(self, known_version: int = -1) -> tuple[int, list[Any]]:
        return ray.get(self.handle.current.remote(known_version))

    def refresh(self) -> int:
        return ray.get(self.handle.refresh.remote())


# ---- the buffer -------------------------------------------------------------------------------------


def refill_window(buffer: Any, store: Any, run: RunDir, capacity: int, index: int = 0, count: int = 1) -> int:
    """Fill a replay window from the newest shards in the catalog (on a restart or resume).

    With ``count`` buffer shards, shard ``index`` takes every ``count``-th of the newest shards,
    so the shards together hold the newest positions. Returns the positions added."""
    from selfplay.replay.shards import read_shard

    rows = store.catalog.shards()
    chosen = []
    need = capacity
    for pos, row in enumerate(reversed(rows)):
        if pos % count != index:
            continue
        chosen.append(row)
        need -= row.positions
        if need <= 0:
            break
    added = 0
    for row in reversed(chosen):
        path = run.shards / row.name
        if not path.exists():
            continue
        try:
            for _, rec in read_shard(path, damaged=[]):  # a damaged frame is skipped, not the rest
                buffer.add(rec)
                added += rec.num_positions
        except SelfplayError:
            continue  # a damaged shard: the record store quarantines it when it next checks
    return added


@ray.remote(num_cpus=0)
class BufferActor:
    """One buffer shard on the head node: a record store (its own shard files, the shared
    catalog: exactly-once by game id) and a replay window of ``window_positions / count``.

    :meth:`add_games` returns once the games are accepted; they become durable (a shard and its
    catalog rows) when the store's batch is full, at the latest ``replay.shard_max_age_seconds``
    after they arrived (:meth:`tick`), and at every :meth:`flush`."""

    def __init__(self, run_root: str, config_data: dict[str, Any], index: int = 0, count: int = 1) -> None:
        from selfplay.replay.buffer import ReplayBuffer
        from selfplay.replay.store import RecordStore

        config = _config(config_data)
        self.config = config
        self.index, self.count = index, count
        self.run = RunDir(Path(run_root))
        self.game = make_game(config.game.name, **config.game.options)
        self.store = RecordStore(self.run, writer=f"buffer{index}", **config.replay.store_options())
        capacity = max(1, config.replay.window_positions // count)
        self.buffer = ReplayBuffer(self.game, capacity, recency_weight=config.replay.recency_weight,
                                   augment=config.replay.augment,
                                   seed=derive_seed(config.run.seed, "buffer", index, os.getpid()))
        self.refilled = refill_window(self.buffer, self.store, self.run, capacity, index, count)
        self.metrics = MetricsLog(self.run.metrics, "buffer", f"buffer{index}")
        self.metrics_seconds = 5.0
        self._metrics_at = 0.0
        self.newest_snapshot = 0
        self._totals = self.store.totals()
        self._totals_at = time.monotonic()
        self._totals_shards = self.store.commits

    def add_games(self, records: list[Any]) -> dict[str, Any]:
        """Store ``records`` (game ids already stored or waiting are ignored and counted) and add
        the new ones to the replay window. Returns {"added": ids, "duplicates": count}."""
        result = self.store.ingest(records)
        for rec in result.accepted:
            self.buffer.add(rec)
            if rec.num_positions:
                self.newest_snapshot = max(self.newest_snapshot, int(rec.snapshot.max()))
        return {"added": [r.game_id for r in result.accepted], "duplicates": result.duplicates}

    def sample(self, batch_size: int, **kwargs: Any) -> dict[str, np.ndarray]:
        return self.buffer.sample(batch_size, **kwargs)

    def where(self) -> dict[str, Any]:
        return {"pid": os.getpid(), "node_id": ray.get_runtime_context().get_node_id()}

    def flush(self) -> dict[str, Any]:
        self.store.flush()
        return self.stats(fresh=True)

    def tick(self) -> dict[str, Any]:
        """Write a shard if the oldest waiting game is due, log a metrics line (every few
        seconds), return the counters."""
        self.store.flush_if_due()
        stats = self.stats()
        if time.monotonic() - self._metrics_at < self.metrics_seconds:
            return stats
        self._metrics_at = time.monotonic()
        self.metrics.write(games_total=stats["games_durable"] + stats["pending_games"],
                           positions_total=stats["positions_durable"] + stats["pending_positions"],
                           duplicates_total=stats["duplicates_total"], window_positions=stats["window_positions"],
                           window_capacity=stats["window_capacity"], shards_total=stats["shards_total"],
                           newest_snapshot_in_data=stats["newest_snapshot_in_data"])
        return stats

    def stats(self, fresh: bool = False) -> dict[str, Any]:
        """Durable counts of the whole catalog (shared by all shards) and this shard's waiting games."""
        # The catalog count is cached for a second, but never across a shard this store wrote:
        # the waiting games it moved into the catalog would drop out of durable + waiting.
        if (fresh or time.monotonic() - self._totals_at > 1.0
                or self.store.commits != self._totals_shards):
            self._totals = self.store.totals()
            self._totals_at = time.monotonic()
            self._totals_shards = self.store.commits
        t = self._totals
        return {
            "games_durable": t.games, "positions_durable": t.positions,
            "pending_games": self.store.pending_games, "pending_positions": self.store.pending_positions,
            "duplicates_total": t.duplicates, "shards_total": t.shards,
            "window_positions": len(self.buffer), "window_capacity": self.buffer.capacity,
            "window_policy_targets": self.buffer.policy_target_positions,
            "newest_snapshot_in_data": max(self.newest_snapshot, t.newest_snapshot or 0),
            "refilled_positions": self.refilled,
        }


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


def _writable(batch: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Arrays from Ray's object store are read-only views; torch wants to own writable ones."""
    return {k: (np.array(v) if isinstance(v, np.ndarray) and not v.flags.writeable else v) for k, v in batch.items()}


class BufferClient:
    """Several buffer shards behind the interface of one buffer (picklable: actors pass it on).

    A worker's games always go to the same shard (``slot % shards``), so a retried send meets
    its earlier copy there; a sample draws from every shard in proportion to its window."""

    def __init__(self, handles: list[Any]) -> None:
        if not handles:
            raise ValueError("a buffer needs at least one shard")
        self.handles = list(handles)

    def for_slot(self, slot: int) -> Any:
        return self.handles[slot % len(self.handles)]

    def stats(self, timeout: float | None = None) -> dict[str, Any]:
        return merge_buffer_stats(ray.get([h.stats.remote() for h in self.handles], timeout=timeout))

    def tick(self, timeout: float | None = None) -> dict[str, Any]:
        return merge_buffer_stats(ray.get([h.tick.remote() for h in self.handles], timeout=timeout))

    def flush(self, timeout: float | None = None) -> dict[str, Any]:
        return merge_buffer_stats(ray.get([h.flush.remote() for h in self.handles], timeout=timeout))

    def sample(self, batch_size: int, **kwargs: Any) -> dict[str, np.ndarray]:
        from selfplay.replay.batch import concat_batches

        if len(self.handles) == 1:
            return _writable(ray.get(self.handles[0].sample.remote(batch_size, **kwargs)))
        sizes = np.array([s["window_positions"] for s in ray.get([h.stats.remote() for h in self.handles])],
                         dtype=np.float64)
        if sizes.sum() <= 0:
            return _writable(ray.get(self.handles[0].sample.remote(batch_size, **kwargs)))
        counts = np.floor(batch_size * sizes / sizes.sum()).astype(int)
        counts[int(np.argmax(sizes))] += batch_size - int(counts.sum())
        refs = [h.sample.remote(int(n), **kwargs) for h, n in zip(self.handles, counts) if n > 0]
        return concat_batches(ray.get(refs))


# ---- the learner -----------------------------------------------------------------------------------


@ray.remote(num_cpus=0)
class LearnerActor:
    """The learner on the head node. On (re)start it resumes from RUN/learner/checkpoint.* or the
    newest snapshot (version 1, the initial weights, is published by the SnapshotActor)."""

    def __init__(self, run_root: str, config_data: dict[str, Any], buffer: BufferClient,
                 snapshots: SnapshotClient) -> None:
        import torch

        from selfplay.learner import Learner
        from selfplay.network import build_network
        from selfplay.snapshots import SnapshotStore

        config = _config(config_data)
        torch.set_num_threads(config.learner.torch_threads)
        self.run = RunDir(Path(run_root))
        self.game = make_game(config.game.name, **config.game.options)
        net = build_network(self.game, config.network, seed=derive_seed(config.run.seed, "network"))
        store = SnapshotStore(self.run, source="learner")
        self.buffer = buffer
        self.snapshots = snapshots
        self.learner = Learner(self.game, net, config.learner, buffer, store,
                               MetricsLog(self.run.metrics, "learner", "learner"))
        self.resumed_from = self.learner.resume()  # checkpoint, else the newest snapshot
        if store.latest_version() == 0:
            self.learner.publish()
        snapshots.refresh()

    def train(self, seconds: float) -> dict[str, Any]:
        """Train for up to ``seconds`` as far as the reuse ratio allows; return counters."""
        deadline = time.monotonic() + seconds
        version = self.learner.snapshot_version
        steps = 0
        while time.monotonic() < deadline:
            generated = self.buffer.stats()["positions_total"]
            took = self.learner.train_available(generated, max_steps=8)
            steps += took
            if self.learner.snapshot_version != version:
                version = self.learner.snapshot_version
                self.snapshots.refresh()
            if took == 0:
                time.sleep(min(0.25, max(0.0, deadline - time.monotonic())))
        return self.status(steps)

    def status(self, steps: int = 0) -> dict[str, Any]:
        last = self.learner.history[-1] if self.learner.history else {}
        return {"step": self.learner.step, "steps": steps, "snapshot_version": self.learner.snapshot_version,
                "samples_trained_total": self.learner.samples_trained_total,
                "reuse_ratio": self.learner.reuse_ratio, "loss": last.get("loss"),
                "resumed_from": self.resumed_from}

    def where(self) -> dict[str, Any]:
        return {"pid": os.getpid(), "node_id": ray.get_runtime_context().get_node_id()}

    def checkpoint(self) -> int:
        """Save a checkpoint now (at a clean stop); returns the current snapshot version."""
        self.learner.save_checkpoint()
        return self.learner.snapshot_version


# ---- self-play workers --------------------------------------------------------------------------


@ray.remote(num_cpus=1)
class SelfPlayActor:
    """One self-play worker. ``slot`` names its place in the run; each incarnation (a first start
    or a restart by Ray) gets a fresh ``tag``, so game ids never repeat across restarts, and its
    seed derives from the run seed, the slot and the tag."""

    def __init__(self, config_data: dict[str, Any], slot: int, session: str, buffer: BufferClient,
                 snapshots: SnapshotClient) -> None:
        import torch

        from selfplay.evaluators import make_evaluator
        from selfplay.network import build_network
        from selfplay.worker import SelfPlayWorker

        config = _config(config_data)
        self.config = config
        torch.set_num_threads(config.worker.threads)
        self.slot = slot
        self.tag = f"{session}{os.urandom(3).hex()}"
        self.worker_id = f"w{slot:04d}"
        self.buffer = buffer.for_slot(slot)
        self.snapshots = snapshots
        self.game = make_game(config.game.name, **config.game.options)
        self.net = build_network(self.game, config.network, seed=derive_seed(config.run.seed, "network"))
        self._make_evaluator = make_evaluator
        self.version = 0
        self._load_newest()
        self.worker = SelfPlayWorker(
            self.game, self._evaluator(), config.search,
            games_in_parallel=config.worker.games_in_parallel, worker_id=self.worker_id,
            seed=derive_seed(config.run.seed, slot, self.tag), snapshot_version=self.version,
            run_tag=self.tag)
        self.last_poll = time.monotonic()
        self.node_id = ray.get_runtime_context().get_node_id()
        self.games_sent = 0
        self.positions_sent = 0

    def _evaluator(self) -> Any:
        return self._make_evaluator(self.net, self.game, self.config.search.rollout_mix_lambda,
                                    threads=self.config.worker.threads)

    def _load_newest(self) -> bool:
        """Fetch a newer snapshot's weights from the object store; True if the net changed."""
        import torch

        try:
            version, refs = self.snapshots.current(self.version)
            if not refs or version <= self.version:
                return False
            arrays = ray.get(refs[0])
            state = {k: torch.from_numpy(np.array(v)) for k, v in arrays.items()}
            self.net.load_state_dict(state, strict=True)
        except (ray.exceptions.RayError, RuntimeError):
            return False  # the store is restarting or the weights do not fit: keep playing what we have
        self.version = version
        return True

    def play(self, seconds: float) -> dict[str, Any]:
        """Play for about ``seconds``, send the finished games to this worker's buffer shard and
        return what it accepted, with the worker's counters."""
        deadline = time.monotonic() + seconds
        finished: list[Any] = []
        between_games = self.config.worker.snapshot_pickup == "between_games"
        while time.monotonic() < deadline:
            done = self.worker.step()
            finished.extend(done)
            due = time.monotonic() - self.last_poll >= self.config.worker.snapshot_poll_seconds
            if due and (done or not between_games):
                self.last_poll = time.monotonic()
                if self._load_newest():
                    self.worker.set_evaluator(self._evaluator(), self.version)
        added: list[str] = []
        duplicates = 0
        positions = 0
        if finished:
            result = ray.get(self.buffer.add_games.remote(finished))
            added, duplicates = result["added"], int(result["duplicates"])
            accepted = set(added)
            positions = sum(r.num_positions for r in finished if r.game_id in accepted)
        return {"slot": self.slot, "worker_id": self.worker_id, "tag": self.tag, "node_id": self.node_id,
                "added": added, "duplicates": duplicates, "positions": positions,
                "snapshot_version": self.version, "stats": dict(self.worker.stats())}

    def where(self) -> dict[str, Any]:
        return {"slot": self.slot, "tag": self.tag, "node_id": self.node_id, "pid": os.getpid()}


#: errors meaning that an actor (or its node) died or is being restarted: the driver carries on
ACTOR_FAILURES: tuple[type[BaseException], ...] = tuple(
    getattr(ray.exceptions, name) for name in (
        "RayActorError", "ActorDiedError", "ActorUnavailableError", "ObjectLostError", "OwnerDiedError",
        "WorkerCrashedError", "NodeDiedError", "ActorUnschedulableError", "ObjectReconstructionFailedError")
    if hasattr(ray.exceptions, name))


def actor_failure(exc: BaseException) -> bool:
    """True for the errors that mean an actor died or is restarting (the driver carries on);
    False for an actor whose constructor raised (Ray does not restart it: see
    :func:`startup_error`)."""
    return isinstance(exc, ACTOR_FAILURES) and not getattr(exc, "actor_init_failed", False)


_ERROR_LINE = re.compile(r"^\s*(?:[\w.]+\.)?(\w*Error): (.+)$")


def startup_error(what: str, exc: BaseException) -> SelfplayError:
    """A one-line error for an actor whose constructor raised (e.g. a run directory that
    another process writes): the last ``XxxError: message`` line of Ray's report."""
    text = str(exc)
    found = None
    for line in text.splitlines():
        m = _ERROR_LINE.match(line)
        if m and m.group(1) not in ("RayTaskError", "ActorDiedError"):
            found = m.group(2).strip()
    return SelfplayError(f"{what} could not start: {found or text.splitlines()[-1] if text else type(exc).__name__}")


__all__ = ["BufferActor", "BufferClient", "SnapshotClient", "LearnerActor", "SelfPlayActor", "SnapshotActor", "actor_failure",
           "derive_seed", "merge_buffer_stats", "refill_window", "startup_error"]
