"""Ray actor shells around the roles of :mod:`selfplay.roles`: each constructs its role and
forwards calls to it, nothing else.

- :class:`SnapshotActor` (head): the snapshot role; each new version's weights are put in Ray's
  object store once (``ray.put``), and workers fetch that one object (one copy per node).
- :class:`BufferActor` (head): one buffer shard (record store + replay window); it also appends
  the metric lines of workers on other nodes to ``RUN/metrics.jsonl``.
- :class:`LearnerActor` (head): the learner; restarted by Ray, it continues from its checkpoint.
- :class:`EvaluationActor` (head): the evaluation role, when ``[evaluation] enabled``.
- :class:`SelfPlayActor` (anywhere): one self-play worker.

Constructor arguments are plain values (the run directory, the config as a dict, actor *names*
rather than handles), so a restarted actor is rebuilt from them exactly (``max_restarts=-1``).
"""

from __future__ import annotations

import os
import sys
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import ray

from selfplay.config import RunConfig, config_from_dict
from selfplay.rundir import RunDir


def _config(config_data: dict[str, Any]) -> RunConfig:
    return config_from_dict(config_data, origin="run config")


def _where() -> dict[str, Any]:
    return {"pid": os.getpid(), "node_id": ray.get_runtime_context().get_node_id()}


@ray.remote(num_cpus=0)
class SnapshotActor:
    def __init__(self, run_root: str, config_data: dict[str, Any]) -> None:
        from selfplay.roles.snapshots import SnapshotServerRole

        self.role = SnapshotServerRole(_config(config_data), RunDir(Path(run_root)), hold=ray.put)

    def current(self, known_version: int = -1) -> tuple[int, list[Any]]:
        """(version, [weights ref]) if newer than ``known_version``, else (version, []); the
        reference is wrapped in a list so that Ray hands it over instead of resolving it."""
        version, held = self.role.current(known_version)
        return version, ([held] if held is not None else [])

    def refresh(self) -> int:
        return self.role.refresh()

    def info(self) -> dict[str, Any]:
        return {**self.role.info(), **_where()}

    def close(self) -> None:
        self.role.close()


@ray.remote(num_cpus=0)
class BufferActor:
    def __init__(self, run_root: str, config_data: dict[str, Any], index: int = 0, count: int = 1,
                 session: int = 0) -> None:
        from selfplay.roles.buffer import BufferRole

        self.role = BufferRole(_config(config_data), RunDir(Path(run_root)), index=index, count=count, session=session)
        with warnings.catch_warnings():  # Ray's property uses one of its own deprecated ones
            warnings.simplefilter("ignore")
            restarted = bool(ray.get_runtime_context().was_current_actor_reconstructed)
        if restarted:  # the driver printed the first start's lines; Ray forwards these to its terminal
            for line in self.role.recovery_report():
                print(line, file=sys.stderr, flush=True)

    def add_games(self, records: list[Any]) -> dict[str, Any]:
        return self.role.add_games(records)

    def append_metrics(self, rows: list[dict[str, Any]]) -> None:
        self.role.append_metrics(rows)

    def recovery_report(self) -> list[str]:
        return self.role.recovery_report()

    def sample(self, batch_size: int, **kwargs: Any) -> dict[str, np.ndarray]:
        return self.role.sample(batch_size, **kwargs)

    def stats(self) -> dict[str, Any]:
        return self.role.stats()

    def flush(self) -> dict[str, Any]:
        return self.role.flush()

    def close(self) -> dict[str, Any]:
        return self.role.close()

    def where(self) -> dict[str, Any]:
        return _where()


def _writable(batch: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Arrays from Ray's object store are read-only views; torch wants to own writable ones."""
    return {k: (np.array(v) if isinstance(v, np.ndarray) and not v.flags.writeable else v) for k, v in batch.items()}


class BufferClient:
    """Several buffer shards behind the interface of one buffer.

    A worker's games always go to the same shard (``slot % shards``), so a retried send meets
    its earlier copy there; a sample draws from every shard in proportion to its window."""

    def __init__(self, handles: list[Any]) -> None:
        if not handles:
            raise ValueError("a buffer needs at least one shard")
        self.handles = list(handles)

    @classmethod
    def by_name(cls, names: list[str]) -> "BufferClient":
        return cls([ray.get_actor(n) for n in names])

    def for_slot(self, slot: int) -> Any:
        return self.handles[slot % len(self.handles)]

    def _all(self, method: str, timeout: float | None) -> dict[str, Any]:
        from selfplay.roles.buffer import merge_buffer_stats

        return merge_buffer_stats(ray.get([getattr(h, method).remote() for h in self.handles], timeout=timeout))

    def stats(self, timeout: float | None = None) -> dict[str, Any]:
        return self._all("stats", timeout)

    def flush(self, timeout: float | None = None) -> dict[str, Any]:
        return self._all("flush", timeout)

    def recovery_report(self, timeout: float | None = None) -> list[str]:
        """Every shard's recovery lines (see :meth:`selfplay.roles.buffer.BufferRole.recovery_report`)."""
        return [line for lines in ray.get([h.recovery_report.remote() for h in self.handles], timeout=timeout)
                for line in lines]

    def close(self, timeout: float | None = None) -> dict[str, Any]:
        return self._all("close", timeout)

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


@ray.remote(num_cpus=0)
class LearnerActor:
    def __init__(self, run_root: str, config_data: dict[str, Any], buffer_names: list[str]) -> None:
        from selfplay.roles.learner import LearnerRole

        buffer = BufferClient.by_name(buffer_names)
        self.role = LearnerRole(_config(config_data), RunDir(Path(run_root)), sampler=buffer,
                                generated=lambda: buffer.stats()["positions_total"])

    def train(self, seconds: float) -> dict[str, Any]:
        return self.role.train(seconds)

    def status(self) -> dict[str, Any]:
        return self.role.status()

    def checkpoint(self) -> int:
        return self.role.checkpoint()

    def close(self) -> int | None:
        """Stop the learner (a last snapshot when it trained since the newest); its newest version."""
        return self.role.close()

    def where(self) -> dict[str, Any]:
        return _where()


@ray.remote(num_cpus=0)
class EvaluationActor:
    """The evaluation role (rated rounds every K snapshots, and gating when it is on); it reads
    everything from the run directory, so a restarted actor carries on where the stored results
    end."""

    def __init__(self, run_root: str, config_data: dict[str, Any]) -> None:
        from selfplay.roles.evaluation import EvaluationRole

        self.role = EvaluationRole(RunDir(Path(run_root)), _config(config_data))

    def step(self, idle_seconds: float) -> dict[str, Any] | None:
        """One rated round if one is due (its metric line); else wait ``idle_seconds``, None."""
        import time

        settings = self.role.settings
        if settings.gate_threshold is not None:
            self.role.gate_pending()  # the snapshot actor serves only what gating accepted
        line = self.role.step() if settings.enabled else None
        if line is None:
            time.sleep(idle_seconds)
        return line

    def where(self) -> dict[str, Any]:
        return _where()


@ray.remote(num_cpus=1)
class SelfPlayActor:
    """A restarted incarnation (Ray rebuilt the actor) gets a fresh incarnation tag: new seeds
    and game ids, so it never replays the games of the one that died."""

    def __init__(self, config_data: dict[str, Any], slot: int, session: int, buffer_names: list[str],
                 snapshots_name: str, game_limit: int | None = None) -> None:
        from selfplay.roles.selfplay import SelfPlayRole

        buffer = ray.get_actor(buffer_names[slot % len(buffer_names)])
        snapshots = ray.get_actor(snapshots_name)
        with warnings.catch_warnings():  # Ray's property uses one of its own deprecated ones
            warnings.simplefilter("ignore")
            restarted = bool(ray.get_runtime_context().was_current_actor_reconstructed)
        self.node_id = ray.get_runtime_context().get_node_id()

        def weights(known: int) -> tuple[int, Any]:
            try:
                version, refs = ray.get(snapshots.current.remote(known))
            except ray.exceptions.RayError:
                return known, None  # the snapshot actor is restarting: keep playing what we have
            return version, (refs[0] if refs else None)

        def fetch(ref: Any) -> Any:
            try:
                return ray.get(ref, timeout=60)
            except (ray.exceptions.RayError, TimeoutError) as exc:  # the weights' owner is restarting
                raise RuntimeError(f"snapshot weights unavailable: {type(exc).__name__}") from None

        self.buffer = buffer
        self.role = SelfPlayRole(
            _config(config_data), slot=slot, session=session, incarnation=os.urandom(3).hex() if restarted else "",
            weights=weights, fetch=fetch, deliver=lambda recs: ray.get(buffer.add_games.remote(recs)),
            metrics=lambda row: buffer.append_metrics.remote([row]), game_limit=game_limit)

    def play(self, seconds: float, game_limit: int | None = -1) -> dict[str, Any]:
        return {**self.role.play(seconds, game_limit), "node_id": self.node_id}

    def close(self) -> None:
        self.role.close()
        ray.get(self.buffer.append_metrics.remote([]))  # after the lines sent before it: all are written

    def where(self) -> dict[str, Any]:
        return {"slot": self.role.slot, "tag": self.role.tag, **_where()}
