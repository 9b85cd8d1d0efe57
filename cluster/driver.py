"""The driver behind ``selfplay run`` on Ray: it starts the actors, watches them and stops them.

:func:`execute_ray` starts or joins Ray, checks the cluster's CPUs, writes RUN/run.toml and runs a
:class:`Driver`: the snapshot store, buffer shards and learner on the head, workers spread over
the nodes (:mod:`cluster.placement`). The driver keeps one ``play`` call in flight per worker
(carrying the worker's game budget, :class:`selfplay.roles.run.GameBudget`) and one ``train``
call for the learner, tops up workers when the cluster grows and resubmits the calls of actors
that Ray restarts (``max_restarts=-1``). Everything else — shards, timers, snapshot pickup,
metric lines — happens inside the roles.
"""

from __future__ import annotations

import os
import re
import sys
import time
from collections import deque
from dataclasses import dataclass, field
from typing import Any, Callable

from selfplay.config import RunConfig
from selfplay.errors import SelfplayError
from selfplay.roles.run import (GameBudget, RunLog, StopSignals, closing_summary, error_reason, status_line,
                                stop_reached, write_failure)
from selfplay.roles.runlock import RunLock
from selfplay.rundir import RunDir


def execute_ray(plan: Any, lock: RunLock, *, say: Callable[[str], None],
                serve: Callable[[Callable[[], int]], int] = lambda body: body()) -> int:
    """Start or join Ray, run until a stop condition or a signal, clean up. Returns 0."""
    from cluster import session
    from selfplay.commands.run import check_worker_count, write_run_toml

    if plan.address is None:
        session.start_local(num_cpus=plan.local_cpus)
        # ended by the reaper when this process is gone, else by the next start (the lock names them)
        lock.update(helpers=sorted(session.note_helpers()))
    else:
        session.join_cluster(plan.address)
    try:
        check_worker_count(plan.config, session.cluster_cpus(), f"the cluster at {plan.address or 'local'}")
        write_run_toml(plan)
        for note in plan.notes:
            say(note)
        driver = Driver(plan.config, plan.run, say=say, lock=lock)
        return serve(lambda: driver.run_to_end())
    finally:
        session.shutdown()


@dataclass
class WorkerSlot:
    """The driver's view of one worker slot (the actor behind it may be restarted by Ray)."""

    slot: int
    handle: Any
    games_total: int = 0
    restarts_seen: int = 0
    last_tag: str = ""
    last_report: dict[str, Any] = field(default_factory=dict)


class Driver:
    """Runs the actors of one run on an already initialised Ray (local or cluster).

    Tests drive it directly: ``start()``, ``loop(...)`` with a ``tick`` callback, ``finish()``."""

    #: how many finished game ids and events the driver remembers (for tests and messages)
    REMEMBER = 10_000

    def __init__(self, config: RunConfig, run: RunDir, *, say: Callable[[str], None] | None = None,
                 lock: RunLock | None = None, progress: bool = True) -> None:
        self.config = config
        self.say = say or (lambda line: print(line, file=sys.stderr, flush=True))
        self.lock = lock or RunLock.acquire(run.root, say=self.say)
        self._own_lock = lock is None
        self.run = RunDir.create(run.root)
        self.session = self.lock.session
        self.names = f"plyfoundry-{os.getpid()}-{os.urandom(3).hex()}"
        self.config_data = config.model_dump(mode="json")
        self.show_progress = progress
        self.slots: dict[int, WorkerSlot] = {}
        self.inflight: dict[Any, tuple[str, int]] = {}
        self.buffer: Any = None
        self.snapshots: Any = None
        self.learner: Any = None
        self.evaluation: Any = None
        self.last_eval: dict[str, Any] | None = None
        self.buffer_stats: dict[str, Any] = {"games_total": 0, "positions_total": 0}
        self.learner_status: dict[str, Any] = {}
        self.snapshot_version = 0
        self.reported_game_ids: deque[str] = deque(maxlen=self.REMEMBER)
        self.events: deque[str] = deque(maxlen=1000)
        self.failing: dict[str, int] = {}
        self.started_at = 0.0
        self.initial_games = self.initial_positions = 0
        self.budget: GameBudget | None = None
        self.runlog: RunLog | None = None
        self.stopping = False
        self._finished = False

    # -- starting ---------------------------------------------------------------------------------
    def start(self) -> None:
        from cluster.actors import BufferActor, BufferClient, EvaluationActor, LearnerActor, SnapshotActor
        from cluster.placement import head_options

        root = os.fspath(self.run.root.resolve())
        self.runlog = RunLog(self.run, "ray", self.session, source="driver")
        restartable = dict(max_restarts=-1, max_task_retries=-1, **head_options())
        self.snapshots = SnapshotActor.options(name=f"{self.names}-snapshots", **restartable).remote(
            root, self.config_data)
        count = self.config.run.buffer_shards
        buffer_names = [f"{self.names}-buffer{i}" for i in range(count)]
        self.buffer = BufferClient([BufferActor.options(name=n, **restartable).remote(
            root, self.config_data, i, count, self.session) for i, n in enumerate(buffer_names)])
        self.buffer_names = buffer_names
        self.buffer_stats = self._started("the replay buffer", lambda: self.buffer.stats(timeout=600))
        for line in self.buffer.recovery_report(timeout=60):  # also in the buffer's metric line
            self.say(line)
        self.snapshot_version = self._started(
            "the snapshot store", lambda: self._get(self.snapshots.refresh.remote(), timeout=600))
        if self.config.run.learner:
            self.learner = LearnerActor.options(max_restarts=-1, max_task_retries=0, **head_options()).remote(
                root, self.config_data, buffer_names)
            self.learner_status = self._started("the learner", lambda: self._get(self.learner.status.remote(), 600))
        if self.config.evaluation.enabled or self.config.evaluation.gate_threshold is not None:
            self.evaluation = EvaluationActor.options(max_restarts=-1, max_task_retries=0, **head_options()).remote(
                root, self.config_data)
        self.started_at = time.time()
        self.initial_games = int(self.buffer_stats["games_total"])
        self.initial_positions = int(self.buffer_stats["positions_total"])
        self.budget = GameBudget(self.config, self.initial_games, self.initial_positions,
                                 worker_count=self.target_workers(),
                                 lookahead=self.config.worker.games_in_parallel)
        if stop_reached(self.config, self.initial_games, self.initial_positions, 0.0):
            self.say(f"the run already holds {self.initial_games} games: nothing to do "
                     "(raise --games/--positions to go on)")
            return
        self._top_up()
        if self.learner is not None:
            self._submit_learner()
        if self.evaluation is not None:
            self._submit_evaluation()
        self._note_helpers()
        self.say(f"run {self.run.root}: game {self.config.game.name} {self.config.game.options}, "
                 f"{len(self.slots)} worker(s) x {self.config.worker.games_in_parallel} games, "
                 f"learner {'on' if self.learner is not None else 'off'}, snapshot v{self.snapshot_version}, "
                 f"{self.initial_games} games already in the run")

    def _note_helpers(self) -> None:
        """The local Ray's processes as they are now that every actor started (see
        :func:`cluster.session.note_helpers`)."""
        from cluster import session

        if session.reaping():
            self.lock.update(helpers=sorted(session.note_helpers()))

    @staticmethod
    def _started(what: str, call: Callable[[], Any]) -> Any:
        """Wait for an actor's first answer; its constructor's error becomes one clear line."""
        import ray

        try:
            return call()
        except ray.exceptions.RayActorError as exc:
            raise startup_error(what, exc) from None
        except ray.exceptions.GetTimeoutError:
            raise SelfplayError(f"{what} did not start within 10 minutes (not enough resources on the head?)") from None

    @staticmethod
    def _get(ref: Any, timeout: float | None = None) -> Any:
        import ray

        return ray.get(ref, timeout=timeout)

    def target_workers(self) -> int:
        from cluster.session import cluster_cpus

        if self.config.run.workers:
            return self.config.run.workers
        return max(1, cluster_cpus() // self.config.worker.threads)

    def _top_up(self) -> int:
        """Start workers until the target count (one per CPU, or run.workers) is reached."""
        from cluster.actors import SelfPlayActor
        from cluster.placement import worker_options

        want = self.target_workers()
        self.budget.worker_count = max(self.budget.worker_count, want)
        added = 0
        while len(self.slots) < want:
            slot = len(self.slots)
            handle = SelfPlayActor.options(max_restarts=-1, max_task_retries=1,
                                           **worker_options(self.config.worker.threads)).remote(
                self.config_data, slot, self.session, self.buffer_names, f"{self.names}-snapshots",
                self.budget.limit_for(slot, None))
            self.slots[slot] = WorkerSlot(slot, handle)
            self._submit_worker(slot)
            added += 1
        if added and self.started_at and time.time() - self.started_at > 1:
            self.event(f"{added} worker(s) added: the cluster has room for {want}")
        return added

    def _submit_worker(self, slot: int) -> None:
        ws = self.slots[slot]
        limit = self.budget.limit_for(slot, ws.last_tag) if ws.last_tag else -1
        ref = ws.handle.play.remote(self.config.worker.report_seconds, limit)
        self.inflight[ref] = ("worker", slot)

    def _submit_learner(self) -> None:
        ref = self.learner.train.remote(self.config.worker.report_seconds)
        self.inflight[ref] = ("learner", 0)

    def _submit_evaluation(self) -> None:
        ref = self.evaluation.step.remote(self.config.worker.report_seconds)
        self.inflight[ref] = ("evaluation", 0)

    def event(self, text: str) -> None:
        self.events.append(text)
        self.say(text)

    # -- watching ---------------------------------------------------------------------------------
    def _on_worker(self, slot: int, result: dict[str, Any]) -> None:
        ws = self.slots[slot]
        if ws.last_tag and result["tag"] != ws.last_tag:
            ws.restarts_seen += 1
            self.event(f"worker {result['worker_id']} was restarted by Ray (now on node {result['node_id'][:8]})")
        ws.last_tag = result["tag"]
        ws.last_report = result
        self.reported_game_ids.extend(result["added"])
        ws.games_total += len(result["added"])
        self.budget.report(slot, result["tag"], result["finished"], len(result["added"]), result["positions"])

    def _poll(self, timeout: float) -> None:
        import ray

        if not self.inflight:
            time.sleep(timeout)
            return
        ready, _ = ray.wait(list(self.inflight), num_returns=len(self.inflight), timeout=timeout)
        for ref in ready:
            kind, slot = self.inflight.pop(ref)
            who = f"worker {slot}" if kind == "worker" else kind
            try:
                result = ray.get(ref)
            except Exception as exc:  # noqa: BLE001 - sorted out below
                result = None
                self._on_failure(who, exc)
            else:
                if who in self.failing:
                    self.event(f"{who} is back")
                self.failing.pop(who, None)
            if kind == "worker":
                if result is not None:
                    self._on_worker(slot, result)
                if not self.stopping:
                    self._submit_worker(slot)
            elif kind == "evaluation":
                if result is not None:
                    self.last_eval = result
                    if result.get("elo") is not None:
                        lo, hi = result.get("elo_low"), result.get("elo_high")
                        interval = f" [{lo:+.0f}, {hi:+.0f}]" if lo is not None and hi is not None else ""
                        self.event(f"evaluation: {result.get('player')} rated {result['elo']:+.0f} Elo{interval}")
                if not self.stopping:
                    self._submit_evaluation()
            else:
                if result is not None:
                    self.learner_status = result
                if not self.stopping:
                    self._submit_learner()

    #: a component whose calls fail this many times in a row, for another reason than its
    #: actor dying, stops the run (a bug or a bad input would otherwise repeat for ever)
    MAX_CONSECUTIVE_ERRORS = 5

    def _on_failure(self, who: str, exc: BaseException) -> None:
        """An actor died (Ray restarts it: carry on, say so once) or its call raised."""
        import ray

        if getattr(exc, "actor_init_failed", False):
            raise startup_error(who, exc) from None
        if actor_failure(exc):
            if who not in self.failing:
                self.event(f"{who} lost ({type(exc).__name__}); Ray restarts it and its call is resubmitted")
            self.failing[who] = self.failing.get(who, 0)
            return
        if not isinstance(exc, ray.exceptions.RayTaskError):
            raise exc
        cause = root_cause(exc)
        first = str(cause if cause is not None else exc).strip().splitlines()
        if self.stopping:  # the run is ending already: say it and collect the other calls
            self.event(f"{who} failed while stopping: {first[0] if first else type(exc).__name__}")
            return
        stop = write_failure(cause) if cause is not None else None
        if stop is not None:  # a full or read-only disk: stop cleanly with the store's one line
            raise stop from None
        if isinstance(cause, SelfplayError):
            raise SelfplayError(f"{who}: {cause}") from None
        self.failing[who] = self.failing.get(who, 0) + 1
        self.event(f"{who} failed: {first[-1] if first else type(exc).__name__}")
        if self.failing[who] >= self.MAX_CONSECUTIVE_ERRORS:
            raise RuntimeError(f"{who} failed {self.failing[who]} times in a row; last error: "
                               f"{first[-1] if first else type(exc).__name__}") from None

    def _watch(self) -> None:
        """Ask the buffer and the snapshot store how far the run is (nothing else)."""
        import ray

        try:
            self.buffer_stats = self.buffer.stats(timeout=60)
        except (ray.exceptions.RayError, TimeoutError) as exc:
            self.event(f"buffer did not answer ({type(exc).__name__}); retrying")
        try:
            info = ray.get(self.snapshots.info.remote(), timeout=60)
            self.snapshot_version = max(self.snapshot_version, int(info["version"]))
        except (ray.exceptions.RayError, TimeoutError):
            pass

    def stop_reached(self) -> str | None:
        b = self.budget
        return stop_reached(self.config, b.stored_games, b.stored_positions, time.time() - self.started_at)

    def status_line(self) -> str:
        return status_line(self.buffer_stats, elapsed=time.time() - self.started_at, initial_games=self.initial_games,
                           initial_positions=self.initial_positions, workers=len(self.slots),
                           snapshot_version=self.snapshot_version, learner=self.learner_status or None)

    def loop(self, *, stop_requested: Callable[[], str | None] = lambda: None,
             tick: Callable[["Driver"], bool | None] | None = None) -> str:
        """Run until a stop condition, ``stop_requested()`` (a signal's reason), or ``tick(self)``
        returning True. Returns the stop reason."""
        from selfplay.monitor.progress import StopProgress

        r = self.config.run
        bar = None
        if self.show_progress and self.config.has_stop_condition():
            bar = StopProgress(games=r.games or None, positions=r.positions or None, minutes=r.minutes or None,
                               initial_games=self.initial_games, initial_positions=self.initial_positions,
                               plain_every=r.status_seconds)
            bar.start()
        last_status = last_top_up = time.monotonic()
        try:
            while True:
                self._poll(timeout=0.5)
                self._watch()
                if bar is not None:
                    bar.update(games=self.budget.stored_games, positions=self.budget.stored_positions)
                now = time.monotonic()
                if now - last_status >= r.status_seconds:
                    last_status = now
                    if bar is not None:
                        bar.console.print(self.status_line(), highlight=False, soft_wrap=True)
                    else:
                        self.say(self.status_line())
                if not r.workers and now - last_top_up >= r.top_up_seconds:
                    last_top_up = now
                    self._top_up()
                reason = self.stop_reached() or stop_requested()
                if not reason and tick is not None and tick(self):
                    reason = "stopped by the caller"
                if reason:
                    break
        finally:
            if bar is not None:
                bar.close()
        self.say(f"{reason}; waiting for the games in flight")
        return reason

    # -- stopping ---------------------------------------------------------------------------------
    def finish(self, reason: str = "stopped by the caller", wait_seconds: float | None = None) -> dict[str, Any]:
        """Collect the calls in flight (their finished games reach the buffer), then stop every
        role (each writes its final line; the buffer writes its waiting games, the learner
        checkpoints), write the run's stop line and release the lock. Interrupted while waiting
        (a second Ctrl-C), it still stops the roles."""
        if self._finished:
            return self.buffer_stats
        self.stopping = True
        try:
            limit = wait_seconds if wait_seconds is not None else 3 * self.config.worker.report_seconds + 30
            deadline = time.monotonic() + limit
            while self.inflight and time.monotonic() < deadline:
                self._poll(timeout=min(1.0, max(0.05, deadline - time.monotonic())))
            if self.inflight:
                self.event(f"{len(self.inflight)} call(s) still running after {limit:.0f} s; their games are lost")
        finally:
            self._finished = True
            self._close_roles()
            if self.runlog is not None:
                self.runlog.stop(reason, games_total=int(self.buffer_stats["games_total"]),
                                 positions_total=int(self.buffer_stats["positions_total"]))
            if self._own_lock:
                self.lock.release()
        return self.buffer_stats

    def _close_roles(self) -> None:
        import ray

        calls = [("worker", ws.handle.close.remote()) for ws in self.slots.values()]
        if self.learner is not None:
            calls.append(("learner", self.learner.close.remote()))
        for who, ref in calls:
            try:
                answer = ray.get(ref, timeout=120)
            except ray.exceptions.RayError as exc:
                self.event(f"{who} did not stop cleanly: {type(exc).__name__}")
                continue
            if who == "learner" and isinstance(answer, int):  # the learner's closing snapshot
                self.snapshot_version = max(self.snapshot_version, answer)
        if self.buffer is not None:
            try:
                self.buffer_stats = self.buffer.close(timeout=120)
            except ray.exceptions.RayError as exc:
                self.event(f"buffer did not stop cleanly: {exc}")
        if self.snapshots is not None:
            try:
                ray.get(self.snapshots.close.remote(), timeout=60)
            except ray.exceptions.RayError:
                pass

    def run_to_end(self) -> int:
        """start, loop and finish with the stop signals installed; print the closing summary."""
        reason = "error: unknown"
        try:
            with StopSignals() as signals:
                self.start()
                reason = self.loop(stop_requested=signals.requested)
        except KeyboardInterrupt:
            reason = "interrupted"
            raise
        except BaseException as exc:
            reason = error_reason(exc)
            raise
        finally:
            try:
                self.finish(reason)
            finally:
                self.kill_actors()
        self.say(closing_summary(self.run, reason, self.buffer_stats, elapsed=time.time() - self.started_at,
                                 initial_games=self.initial_games, initial_positions=self.initial_positions,
                                 snapshot_version=self.snapshot_version, learner=self.learner_status or None))
        return 0

    def kill_actors(self) -> None:
        """End every actor of this run (after :meth:`finish`); a driver that exits does the same."""
        import ray

        handles = [ws.handle for ws in self.slots.values()]
        handles += list(self.buffer.handles) if self.buffer is not None else []
        handles += [h for h in (self.learner, self.snapshots) if h is not None]
        for h in handles:
            try:
                ray.kill(h, no_restart=True)
            except Exception:  # noqa: BLE001 - already gone
                pass


# ---- Ray's errors, sorted -----------------------------------------------------------------------


def _actor_failures() -> tuple[type[BaseException], ...]:
    import ray

    return tuple(getattr(ray.exceptions, name) for name in (
        "RayActorError", "ActorDiedError", "ActorUnavailableError", "ObjectLostError", "OwnerDiedError",
        "WorkerCrashedError", "NodeDiedError", "ActorUnschedulableError", "ObjectReconstructionFailedError")
        if hasattr(ray.exceptions, name))


def root_cause(exc: BaseException) -> BaseException | None:
    """The exception a task raised in the end: a worker's call fails with Ray's error wrapping
    the buffer's error that Ray wrapped in turn; unwrap every ``RayTaskError`` layer."""
    import ray

    cause: BaseException | None = exc
    for _ in range(16):  # layers: one per call between actors
        if not isinstance(cause, ray.exceptions.RayTaskError):
            break
        cause = getattr(cause, "cause", None)
    return cause


def actor_failure(exc: BaseException) -> bool:
    """True for the errors that mean an actor died or is restarting (the driver carries on);
    False for an actor whose constructor raised (Ray does not restart it: see :func:`startup_error`)."""
    return isinstance(exc, _actor_failures()) and not getattr(exc, "actor_init_failed", False)


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
