"""The one-process loop, for a laptop without Ray: self-play -> records + replay buffer ->
learner -> snapshot -> self-play, alternating in one process.

A *generation phase* plays ``loop.games_per_phase`` games with the worker (one batched network
call per step over its G games in flight); every finished game goes to the record store (shards +
catalog on disk) and, once accepted there (duplicates dropped), into the in-RAM replay window.
A *training phase* then takes every step the target reuse ratio allows (at most
``loop.max_steps_per_phase``); the learner publishes a snapshot every K steps and the worker
picks up the newest (``worker.snapshot_pickup``): "between_moves" at once and at every poll
during generation; "between_games" only at a worker step that finished a game (as the Ray
workers do). With G games in flight the other games go on with the new weights either way;
each position records the version that searched it.

The pieces (:class:`LocalRun`'s ``generate``, ``train``, ``pickup_snapshot``) are separately
callable, so the Ray layer spreads the same pieces out over actors.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass, field
from typing import Any, Callable

import torch

from selfplay.errors import ConfigError, RunDirError, SnapshotError
from selfplay.games.base import Game
from selfplay.games.registry import make_game
from selfplay.learner import Learner
from selfplay.learner_config import LoopConfig
from selfplay.metrics import MetricsLog
from selfplay.rundir import RunDir, atomic_write_bytes
from selfplay.snapshots import SnapshotStore


#: fields of the "worker" metric lines (RULES.md) copied from SelfPlayWorker.stats()
_WORKER_FIELDS = ("games_total", "positions_total", "evals_total", "evals_per_second", "positions_per_second",
                  "snapshot_version", "games_in_flight", "resign_disabled_games_total",
                  "resign_false_positives_total")


def network_from_run_config(path: str | os.PathLike[str]) -> torch.nn.Module:
    """A fresh network of the game and architecture that a run.toml describes."""
    from selfplay.config import load_config
    from selfplay.network import build_network

    cfg = load_config(path)
    game = make_game(cfg.game.name, **cfg.game.options)
    return build_network(game, cfg.network)


@dataclass
class LoopStatus:
    """Counters of a local run, as the stop callback and the caller see them."""

    started_at: float
    games: int = 0
    positions: int = 0
    learner_steps: int = 0
    snapshot_version: int = 0
    worker_snapshot_version: int = 0
    phases: int = 0
    stopped_because: str = ""
    events: list[dict[str, Any]] = field(default_factory=list)

    @property
    def elapsed(self) -> float:
        return time.time() - self.started_at


class LocalRun:
    """Every piece of a run in one process. Open with :meth:`open`, then call :meth:`generate`,
    :meth:`train` and :meth:`pickup_snapshot` in any order; :meth:`close` flushes the records."""

    def __init__(self, config: Any, run_dir: str | os.PathLike[str], loop: LoopConfig | None = None) -> None:
        from selfplay.config import RunConfig, dump_config, identity_differences, load_config
        from selfplay.evaluators import make_evaluator
        from selfplay.network import build_network
        from selfplay.replay.buffer import ReplayBuffer
        from selfplay.replay.store import RecordStore
        from selfplay.worker import SelfPlayWorker

        if not isinstance(config, RunConfig):
            raise ConfigError(f"run_local_loop needs a RunConfig, not {type(config).__name__}")
        self.config = config
        self.loop = loop or LoopConfig()
        self.run = RunDir.create(run_dir)
        if self.run.config.exists():
            previous = load_config(self.run.config)
            diff = identity_differences(previous, config)
            if diff:
                raise RunDirError(
                    f"run directory {self.run.root} was made with another configuration "
                    f"(differs in {', '.join(diff[:8])}); use a new directory or the same config")
        else:
            atomic_write_bytes(self.run.config, dump_config(config).encode())
        session = self._next_session()
        torch.set_num_threads(config.worker.threads)
        self.game: Game = make_game(config.game.name, **config.game.options)
        self.store = SnapshotStore(self.run, source="local-loop")
        self.records = RecordStore(self.run, writer=f"local{session}", **config.replay.store_options())
        self.buffer = ReplayBuffer.from_config(self.game, config.replay, seed=config.run.seed + 7919 * session)
        self.learner_net = build_network(self.game, config.network, seed=config.run.seed)
        self.learner = Learner(self.game, self.learner_net, config.learner, self.buffer, self.store,
                               MetricsLog(self.run.metrics, "learner", "learner"))
        self.resumed_from = self.learner.resume() if config.run.learner else "none"
        if self.store.latest() is None:
            if config.run.learner:
                self.learner.publish(extra={"phase": "initial"})
            else:
                self.store.publish(self.learner_net, extra={"phase": "initial"})
        self.refill_buffer()
        self.worker_net = build_network(self.game, config.network, seed=config.run.seed)
        self.status_events: list[dict[str, Any]] = []
        info = self._load_newest_good(self.worker_net)
        self._make_evaluator = make_evaluator
        self.worker = SelfPlayWorker(
            self.game, self._evaluator(), config.search, games_in_parallel=config.worker.games_in_parallel,
            worker_id=f"local{session}", seed=config.run.seed * 1_000_003 + session,
            snapshot_version=info.version)
        self.worker_version = info.version
        self._last_poll = time.monotonic()
        self.positions_generated = self.records.totals().positions
        self.learner.note_generated(self.positions_generated)
        self.status = LoopStatus(started_at=time.time(), games=self.records.totals().games,
                                 positions=self.positions_generated, learner_steps=self.learner.step,
                                 snapshot_version=self.store.latest_version(), worker_snapshot_version=info.version,
                                 events=self.status_events)
        self.worker_metrics = MetricsLog(self.run.metrics, "worker", f"local{session}")

    # ---- set-up helpers ----------------------------------------------------------------------
    def _next_session(self) -> int:
        """Each opening of the run directory is a new session: a fresh worker id and seed, so
        game ids never repeat across resumes."""
        path = self.run.root / "local-loop.json"
        n = 0
        if path.exists():
            try:
                n = int(json.loads(path.read_text()).get("sessions", 0))
            except (ValueError, AttributeError, json.JSONDecodeError):
                raise RunDirError(f"{path} is corrupt; it only counts sessions and may be deleted") from None
        atomic_write_bytes(path, json.dumps({"sessions": n + 1}).encode())
        return n

    def _load_newest_good(self, net: torch.nn.Module) -> Any:
        """Load the newest snapshot that passes every check; a refused one is logged as an event
        and the next older one is tried. SnapshotError if none loads."""
        problems = []
        for version in reversed(self.store.versions()):
            try:
                return self.store.load_into(net, version)
            except SnapshotError as exc:
                problems.append(str(exc))
                self.status_events.append({"t": time.time(), "event": "snapshot_refused",
                                           "version": version, "reason": str(exc)})
        raise SnapshotError("no snapshot of this run loads: " + ("; ".join(problems[:3]) or "none published"))

    def _evaluator(self) -> Any:
        return self._make_evaluator(self.worker_net, self.game, self.config.search.rollout_mix_lambda,
                                    threads=self.config.worker.threads)

    def refill_buffer(self) -> int:
        """On resume, fill the replay window from the newest shards on disk; returns positions."""
        return self.buffer.refill_from(self.records)

    # ---- the pieces --------------------------------------------------------------------------
    def generate(self, games: int) -> int:
        """Play until ``games`` more games have finished; returns the positions added."""
        finished_games = 0
        added_positions = 0
        between_moves = self.config.worker.snapshot_pickup == "between_moves"
        t0 = time.perf_counter()
        while finished_games < games:
            records = self.worker.step()
            if records:
                accepted = self.records.ingest(records).accepted
                for rec in accepted:
                    self.buffer.add(rec)
                    added_positions += rec.num_positions
                finished_games += len(accepted)
            due = time.monotonic() - self._last_poll >= self.config.worker.snapshot_poll_seconds
            if due and (between_moves or records):
                self.pickup_snapshot()
        self.records.flush_if_due()
        self.positions_generated += added_positions
        self.learner.note_generated(self.positions_generated)
        self.status.games += finished_games
        self.status.positions += added_positions
        dt = time.perf_counter() - t0
        stats = self.worker.stats()
        self.worker_metrics.write(**{k: stats[k] for k in _WORKER_FIELDS if k in stats},
                                  phase_positions_per_second=added_positions / dt if dt > 0 else 0.0)
        return added_positions

    def train(self, max_steps: int | None = None) -> int:
        """Every optimiser step the reuse ratio allows now (at most ``max_steps``); returns steps."""
        if not self.config.run.learner:
            return 0
        steps = self.learner.train_available(self.positions_generated,
                                             max_steps=max_steps or self.loop.max_steps_per_phase)
        self.status.learner_steps = self.learner.step
        self.status.snapshot_version = self.store.latest_version()
        return steps

    def pickup_snapshot(self) -> bool:
        """Load the newest snapshot into the worker's network if it is newer; True if it was.

        A snapshot that fails its checks is skipped (logged in ``status.events``) and the worker
        keeps playing with its previous weights."""
        self._last_poll = time.monotonic()
        latest = self.store.latest()
        if latest is None or latest.version <= self.worker_version:
            return False
        try:
            info = self.store.load_into(self.worker_net, latest.version)
        except SnapshotError as exc:
            self.status.events.append({"t": time.time(), "event": "snapshot_refused",
                                       "version": latest.version, "reason": str(exc)})
            self.worker_version = max(self.worker_version, latest.version)  # do not retry it
            return False
        self.worker_version = info.version
        self.worker.set_evaluator(self._evaluator(), info.version)
        self.status.worker_snapshot_version = info.version
        return True

    def after_training(self) -> None:
        """Hand the worker the learner's newest snapshot: at once ("between_moves"), or at the
        worker's next step that finishes a game ("between_games")."""
        if self.config.worker.snapshot_pickup == "between_moves":
            self.pickup_snapshot()
        else:
            self._last_poll = float("-inf")

    def close(self, publish_final: bool = True) -> None:
        """Publish what the learner trained since its last snapshot (unless ``publish_final`` is
        false, as after an error), flush records."""
        try:
            if publish_final and self.config.run.learner and self.learner.step > 0 and \
                    self.learner.step != getattr(self.store.latest(), "training_steps", -1):
                self.learner.publish(extra={"phase": "final"})
        finally:
            self.records.close()


def run_local_loop(config: Any, run_dir: str | os.PathLike[str], stop: Callable[[LoopStatus], bool] | None = None,
                   loop: LoopConfig | None = None,
                   on_phase: Callable[[LocalRun], None] | None = None) -> LoopStatus:
    """Run the whole loop in this process until a stop condition holds.

    Stops when ``stop(status)`` is true, or at the config's ``run.games`` / ``run.positions`` /
    ``run.minutes`` (whichever comes first). ``on_phase(run)`` is called after each training
    phase (for evaluations and plots). Returns the final :class:`LoopStatus`."""
    run = LocalRun(config, run_dir, loop)
    rs = config.run
    if rs.positions and config.run.learner:
        run.learner.check_reachable(rs.positions)
    if rs.games and config.run.learner:
        run.learner.check_reachable(rs.games * run.game.max_moves)
    deadline = run.status.started_at + rs.minutes * 60 if rs.minutes else None
    status = run.status
    try:
        while True:
            if stop is not None and stop(status):
                status.stopped_because = "stop callback"
                break
            if rs.games and status.games >= rs.games:
                status.stopped_because = f"run.games={rs.games}"
                break
            if rs.positions and status.positions >= rs.positions:
                status.stopped_because = f"run.positions={rs.positions}"
                break
            if deadline is not None and time.time() >= deadline:
                status.stopped_because = f"run.minutes={rs.minutes}"
                break
            games = run.loop.games_per_phase
            if rs.games:
                games = max(1, min(games, rs.games - status.games))
            run.generate(games)
            if run.train():
                run.after_training()
            status.phases += 1
            if on_phase is not None:
                on_phase(run)
    except BaseException:
        run.close(publish_final=False)  # records are flushed; no snapshot from a failed learner
        raise
    run.close()
    return status


__all__ = ["LocalRun", "LoopStatus", "network_from_run_config", "run_local_loop"]
