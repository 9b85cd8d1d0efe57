"""The run in one process, without Ray (``selfplay run --in-process``, tests, scripts): the same
roles that the Ray actors wrap (:mod:`selfplay.roles`), composed here.

:class:`LocalRun` opens the run directory (its lock and a new session), starts the snapshot
role (which publishes version 1 on a fresh run), one buffer shard, the learner (unless
``run.learner`` is off) and ``run.workers`` self-play roles (one if unset), then alternates: a
*generation phase* lets the workers play until ``loop.games_per_phase`` more games are stored,
a *training phase* takes every step the target reuse ratio allows (at most
``loop.max_steps_per_phase``). After each training phase the snapshot role reads the store and
the workers pick up the newest version (``worker.snapshot_pickup`` says when it is put into
use): no snapshot-server clock decides which version a game is played with. A generation phase
plays in slices of ``worker.report_seconds`` (each delivers its finished games), and ends at the
step that finishes its last game, so the clock decides neither the games nor the training data.
"""

from __future__ import annotations

import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Callable, ClassVar

from pydantic import Field

from selfplay.config import RunConfig
from selfplay.errors import ConfigError, RunDirError
from selfplay.learner_config import _Section
from selfplay.roles.buffer import BufferRole
from selfplay.roles.learner import LearnerRole
from selfplay.roles.run import (GameBudget, RunLog, closing_summary, error_reason, stop_reached,
                                write_failure)
from selfplay.roles.runlock import RunLock
from selfplay.roles.selfplay import SelfPlayRole
from selfplay.roles.snapshots import SnapshotServerRole
from selfplay.rundir import RunDir, atomic_write_bytes


class LoopConfig(_Section):
    """Phase sizes of the in-process run: generation phases alternate with training phases."""

    section_name: ClassVar[str] = "loop"

    games_per_phase: int = Field(32, ge=1)
    """Games a generation phase stores before the learner trains (at least one worker step)."""

    max_steps_per_phase: int = Field(1000, ge=1)
    """Upper bound on optimiser steps in one training phase (the reuse ratio usually binds first)."""


def network_from_run_config(path: str | os.PathLike[str]) -> Any:
    """A fresh network of the game and architecture that a run.toml describes."""
    from selfplay.config import load_config
    from selfplay.games.registry import make_game
    from selfplay.network import build_network

    cfg = load_config(path)
    game = make_game(cfg.game.name, **cfg.game.options)
    return build_network(game, cfg.network)


@dataclass
class LoopStatus:
    """Counters of an in-process run, as the stop callback and the caller see them."""

    started_at: float
    games: int = 0
    positions: int = 0
    learner_steps: int = 0
    snapshot_version: int = 0
    phases: int = 0
    stopped_because: str = ""
    events: list[dict[str, Any]] = field(default_factory=list)

    @property
    def elapsed(self) -> float:
        return time.time() - self.started_at


class LocalRun:
    """Every role of a run in this process; :meth:`run` drives them, :meth:`close` stops them."""

    def __init__(self, config: RunConfig, run_dir: str | os.PathLike[str], loop: LoopConfig | None = None, *,
                 lock: RunLock | None = None, say: Callable[[str], None] | None = None) -> None:
        from selfplay.config import dump_config, identity_differences, load_config

        if not isinstance(config, RunConfig):
            raise TypeError(f"LocalRun needs a RunConfig, not {type(config).__name__}")
        self.config = config
        self.loop = loop or LoopConfig()
        self.say = say or (lambda line: None)
        self.lock = lock or RunLock.acquire(run_dir, say=self.say)
        self._own_lock = lock is None
        self.run = RunDir.create(run_dir)
        self.closed = False
        self.runlog: RunLog | None = None
        self.workers: list[SelfPlayRole] = []
        self.learner: LearnerRole | None = None
        self.buffer: BufferRole | None = None
        self.snapshots: SnapshotServerRole | None = None
        self.evaluation: Any = None
        try:
            if self.run.config.exists():
                diff = identity_differences(load_config(self.run.config), config)
                if diff:
                    raise RunDirError(
                        f"run directory {self.run.root} was made with another configuration "
                        f"(differs in {', '.join(diff[:8])}); use a new directory or the same config")
            else:
                atomic_write_bytes(self.run.config, dump_config(config).encode())
            session = self.lock.session
            self.runlog = RunLog(self.run, "in-process", session, source="local")
            self.snapshots = SnapshotServerRole(config, self.run, timer=False)  # refreshed per phase
            self.buffer = BufferRole(config, self.run, session=session)
            buffer = self.buffer
            for line in buffer.recovery_report():  # also in the buffer's metric line
                self.say(line)
            if config.run.learner:
                self.learner = LearnerRole(config, self.run, sampler=buffer,
                                           generated=lambda: buffer.stats()["positions_total"])
            if config.evaluation.enabled or config.evaluation.gate_threshold is not None:
                from selfplay.roles.evaluation import EvaluationRole

                self.evaluation = EvaluationRole(self.run, config)
            stats = buffer.stats(fresh=True)
            self.initial_games, self.initial_positions = stats["games_total"], stats["positions_total"]
            self.budget = GameBudget(config, self.initial_games, self.initial_positions,
                                     worker_count=config.run.workers or 1,
                                     lookahead=config.worker.games_in_parallel)
            for slot in range(config.run.workers or 1):
                self.workers.append(SelfPlayRole(
                    config, slot=slot, session=session, weights=self.snapshots.current, deliver=buffer.add_games,
                    metrics=self.run.metrics, game_limit=self.budget.limit_for(slot, ""),
                    background_swaps=False))  # one process: no compile thread
        except BaseException as exc:
            self.close(error_reason(exc), failed=True)
            raise
        self._stop_requested: Callable[[], str | None] = lambda: None
        self.status = LoopStatus(started_at=time.time(), games=self.initial_games, positions=self.initial_positions,
                                 learner_steps=self.learner.learner.step if self.learner else 0,
                                 snapshot_version=self.snapshots.version)

    # ---- convenience views -------------------------------------------------------------------
    @property
    def game(self) -> Any:
        return self.buffer.game

    @property
    def store(self) -> Any:
        """The run's snapshot store."""
        return self.snapshots.store

    def buffer_stats(self) -> dict[str, Any]:
        return self.buffer.stats()

    # ---- the phases --------------------------------------------------------------------------
    def generate(self, games: int) -> int:
        """Let the workers play until ``games`` more games are stored (or none may start);
        returns the positions stored."""
        stored = positions = 0
        while stored < games:
            progressed = False
            for w in self.workers:
                # a phase ends at the step that finishes its last game, whatever the clock says,
                # so the data of a seeded run does not depend on the machine's speed
                rep = w.play(self.config.worker.report_seconds, game_limit=self.budget.limit_for(w.slot, w.tag),
                             until_finished=games - stored)
                self.budget.report(w.slot, w.tag, rep["finished"], len(rep["added"]), rep["positions"])
                stored += len(rep["added"])
                positions += rep["positions"]
                progressed = progressed or rep["finished"] > 0 or rep["games_in_flight"] > 0
            if not progressed or self._stop_condition() or self._stop_requested():
                break
        self.status.games, self.status.positions = self.budget.stored_games, self.budget.stored_positions
        return positions

    def train(self, max_steps: int | None = None) -> int:
        """Every optimiser step the reuse ratio allows now (at most ``max_steps``); returns steps."""
        if self.learner is None:
            return 0
        st = self.learner.train(3600.0, wait=False, max_steps=max_steps or self.loop.max_steps_per_phase)
        self.status.learner_steps = st["step"]
        self.status.snapshot_version = self.store.latest_version()
        return int(st["steps"])

    def _stop_condition(self) -> str | None:
        return stop_reached(self.config, self.budget.stored_games, self.budget.stored_positions,
                            time.time() - self.status.started_at)

    def run_until(self, stop: Callable[[LoopStatus], bool] | None = None,
                  stop_requested: Callable[[], str | None] = lambda: None,
                  on_phase: Callable[["LocalRun"], None] | None = None) -> str:
        """Alternate generation and training until a stop condition, ``stop(status)`` or
        ``stop_requested()`` (a signal's reason); returns the stop reason."""
        self._stop_requested = stop_requested
        rs = self.config.run
        if self.learner is not None and (rs.positions or rs.games):
            try:
                self.learner.check_reachable(rs.positions or rs.games * self.game.max_moves)
            except ConfigError as exc:
                self.say(f"note: {exc}")  # the run still makes its data
        while True:
            reason = self._stop_condition()
            if reason is None and stop is not None and stop(self.status):
                reason = "stopped by the caller"
            reason = reason or stop_requested()
            if reason:
                self.status.stopped_because = reason
                return reason
            self.generate(self.loop.games_per_phase)
            self.train()
            if self.evaluation is not None:
                if self.config.evaluation.gate_threshold is not None:
                    self.evaluation.gate_pending()  # the newest snapshot against the accepted one
                if self.config.evaluation.enabled:
                    self.evaluation.step()  # a bounded rated round when one is due
            self.snapshots.refresh()  # the learner's new snapshot (gated), or one a user published
            for w in self.workers:
                w.pickup()
            self.status.phases += 1
            if on_phase is not None:
                on_phase(self)

    # ---- stopping ----------------------------------------------------------------------------
    def close(self, reason: str = "stopped by the caller", *, failed: bool = False) -> dict[str, Any]:
        """Stop every role (each writes its final line; the buffer writes its waiting games, the
        learner checkpoints unless ``failed``), write the run's stop line, release the lock.
        Returns the buffer's last counters."""
        if self.closed:
            return {}
        self.closed = True
        stats: dict[str, Any] = {}
        try:
            for w in self.workers:
                w.close()
            if self.learner is not None:
                self.learner.close(save=not failed)
        finally:
            try:
                if self.buffer is not None:
                    stats = self.buffer.close()
                if self.snapshots is not None:
                    self.snapshots.close()
            finally:
                if self.runlog is not None:
                    self.runlog.stop(reason, **({"games_total": stats["games_total"],
                                                 "positions_total": stats["positions_total"]} if stats else {}))
                if self._own_lock:
                    self.lock.release()
        return stats


def run_local_loop(config: RunConfig, run_dir: str | os.PathLike[str], stop: Callable[[LoopStatus], bool] | None = None,
                   loop: LoopConfig | None = None,
                   on_phase: Callable[[LocalRun], None] | None = None) -> LoopStatus:
    """Run in this process until a stop condition holds (``run.games`` / ``run.positions`` /
    ``run.minutes`` or ``stop(status)``); ``on_phase(run)`` is called after each training
    phase. Returns the final :class:`LoopStatus`."""
    run = LocalRun(config, run_dir, loop)
    try:
        reason = run.run_until(stop, on_phase=on_phase)
    except BaseException as exc:
        run.close(error_reason(exc), failed=True)
        raise
    run.close(reason)
    return run.status


def execute_in_process(config: RunConfig, run: RunDir, lock: RunLock, *,
                       say: Callable[[str], None] | None = None) -> int:
    """``selfplay run --in-process``: the run in this process until a stop condition or a signal;
    prints the closing summary. Returns 0."""
    from selfplay.roles.run import StopSignals

    say = say or (lambda line: print(line, file=sys.stderr, flush=True))
    local = LocalRun(config, run.root, lock=lock, say=say)
    say(f"run {run.root} (in-process): game {config.game.name} {config.game.options}, "
        f"{len(local.workers)} worker(s) x {config.worker.games_in_parallel} games, "
        f"learner {'on' if local.learner is not None else 'off'}, snapshot v{local.snapshots.version}, "
        f"{local.initial_games} games already in the run")
    reason = "error: unknown"
    try:
        with StopSignals() as signals:
            reason = local.run_until(stop_requested=signals.requested)
    except KeyboardInterrupt:
        reason = "interrupted"
        raise
    except BaseException as exc:
        stop = write_failure(exc)  # a full or read-only disk: a clean stop with one line
        reason = error_reason(stop or exc)
        if stop is not None and stop is not exc:
            raise stop from None
        raise
    finally:
        failed = reason.startswith("error")
        stats = local.close(reason, failed=failed)
        if stats and not failed:  # an error stop says its one line (the error) instead
            say(closing_summary(run, reason, stats, elapsed=local.status.elapsed, initial_games=local.initial_games,
                                initial_positions=local.initial_positions,
                                snapshot_version=local.store.latest_version(),
                                learner=local.learner.status() if local.learner else None))
    return 0


__all__ = ["LocalRun", "LoopConfig", "LoopStatus", "execute_in_process", "network_from_run_config", "run_local_loop"]
