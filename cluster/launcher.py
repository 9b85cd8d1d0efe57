"""``selfplay run``: one command for a laptop (an embedded Ray bound to 127.0.0.1) or a cluster.

Order of work, so that bad input is refused before anything starts:

1. :func:`resolve_run` reads the preset or config file, applies the command-line overrides,
   checks the run directory (a new one, or ``--resume`` of one made with the same game and
   config) and the worker count against this machine's CPUs — no Ray yet.
2. Ray is started locally or joined (an unreachable ``--address`` fails here, in seconds);
   a cluster's CPU count is checked against ``--workers``.
3. RUN/run.toml is written; the actors start: snapshot store, buffer and learner on the head,
   workers spread over the nodes (:mod:`cluster.placement`).
4. :class:`Launcher.loop` keeps one ``play`` call in flight per worker and one ``train`` call
   for the learner, writes worker metric lines, flushes the buffer, tops up workers when the
   cluster grows, and replaces nothing by hand: Ray restarts dead actors (``max_restarts=-1``);
   the loop only resubmits their calls.
5. A stop condition, Ctrl-C or SIGTERM ends the loop; in-flight games are awaited (at most one
   report interval), the buffer is flushed, the learner checkpoints, Ray is shut down.
"""

from __future__ import annotations

import argparse
import math
import os
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from selfplay.config import (
    RunConfig,
    config_from_toml,
    dump_config,
    identity_differences,
    load_config,
    load_preset,
    with_overrides,
)
from selfplay.errors import ConfigError, RunDirError, SelfplayError
from selfplay.metrics import MetricsLog
from selfplay.rundir import RunDir, atomic_write_bytes

# ---- the command line ----------------------------------------------------------------------------


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "run", help="generate self-play data (and train) on this machine or a Ray cluster",
        description="Run self-play workers, the replay buffer, the learner and the snapshot store "
        "on an embedded local Ray (bound to 127.0.0.1) or on a Ray cluster (--address).")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--preset", help="a shipped preset (see `selfplay config show`)")
    src.add_argument("--config", help="a TOML config file (start from `selfplay config show PRESET`)")
    p.add_argument("--out", required=True, help="run directory (created; with --resume, continued)")
    p.add_argument("--games", type=int, help="stop when the run holds this many games")
    p.add_argument("--positions", type=int, help="stop when the run holds this many positions")
    p.add_argument("--minutes", type=float, help="stop after this many minutes")
    p.add_argument("--workers", type=int, help="self-play workers (default: one per CPU)")
    p.add_argument("--resume", action="store_true", help="continue the run in --out")
    p.add_argument("--no-learner", action="store_true",
                   help="generate only; snapshots come from your own trainer via `selfplay publish`")
    p.add_argument("--address", help="join the Ray cluster at host:port (or 'auto'); default: the "
                   "RAY_ADDRESS variable, else an embedded local Ray")
    p.add_argument("--metrics-port", type=int, help="serve Prometheus metrics on 127.0.0.1:PORT")
    p.add_argument("--metrics-host", default="127.0.0.1", help="address for --metrics-port (default 127.0.0.1)")
    p.set_defaults(func=run_command)


def run_command(args: argparse.Namespace) -> int:
    plan = resolve_run(args)
    return execute(plan)


# ---- step 1: resolve everything without Ray --------------------------------------------------------


@dataclass
class RunPlan:
    """What `selfplay run` will do, fully checked."""

    config: RunConfig
    run: RunDir
    resume: bool
    address: str | None  # None = embedded local Ray
    local_cpus: int
    metrics_port: int | None = None
    metrics_host: str = "127.0.0.1"
    notes: list[str] = field(default_factory=list)


def local_cpu_count() -> int:
    """CPUs this process may use."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


def _overrides(args: argparse.Namespace) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name in ("games", "positions", "minutes", "workers"):
        value = getattr(args, name, None)
        if value is None:
            continue
        if name == "minutes":
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise ConfigError(f"--minutes {value!r} must be a positive number")
        elif value < 1:
            raise ConfigError(f"--{name} {value!r} must be a positive whole number")
        out[f"run.{name}"] = value
    if getattr(args, "no_learner", False):
        out["run.learner"] = False
    return out


def _is_empty_dir(path: Path) -> bool:
    return path.is_dir() and not any(path.iterdir())


def resolve_run(args: argparse.Namespace) -> RunPlan:
    """Check the command line, the config and the run directory; raise a SelfplayError naming
    what is wrong. Nothing is written and Ray is not touched."""
    out = Path(args.out)
    run = RunDir(out)
    notes: list[str] = []
    given: RunConfig | None = None
    if args.preset:
        given = load_preset(args.preset)
    elif args.config:
        given = load_config(args.config)

    if args.resume:
        if not out.exists():
            raise RunDirError(f"--resume: run directory {str(out)!r} does not exist; nothing to resume")
        if not run.config.exists():
            raise RunDirError(f"--resume: {str(out)!r} has no run.toml, so it is not a run made by `selfplay run`")
        stored = load_config(run.config)
        if given is not None:
            diffs = identity_differences(stored, given)
            if diffs:
                sd, gd = stored.model_dump(mode="json"), given.model_dump(mode="json")
                shown = []
                for name in diffs[:4]:
                    a, b = sd, gd
                    for key in name.split("."):
                        a = a.get(key) if isinstance(a, dict) else None
                        b = b.get(key) if isinstance(b, dict) else None
                    shown.append(f"{name} is {a!r} there, {b!r} here")
                more = f" (and {len(diffs) - 4} more)" if len(diffs) > 4 else ""
                raise RunDirError(
                    f"--resume: run directory {str(out)!r} is from another "
                    f"{'game' if any(d.startswith('game.') for d in diffs) else 'config'}: "
                    + "; ".join(shown) + more + ". Resume without --preset/--config to use its run.toml, "
                    "or choose a new --out")
            config = given
        else:
            config = stored
    else:
        if given is None:
            raise ConfigError("give --preset NAME or --config FILE (or --resume to continue --out)")
        if out.exists() and not _is_empty_dir(out):
            what = "holds a run (run.toml)" if run.config.exists() else "is not empty"
            raise RunDirError(f"--out {str(out)!r} {what}; pass --resume to continue it, or choose another directory")
        if out.exists() and not out.is_dir():
            raise RunDirError(f"--out {str(out)!r} is a file, not a directory")
        config = given

    config = with_overrides(config, _overrides(args))

    address = args.address or os.environ.get("RAY_ADDRESS") or None
    cpus = local_cpu_count()
    if address is None:
        check_worker_count(config, cpus, "this machine")
    if config.run.learner is False and args.resume is False:
        notes.append("generation only (--no-learner): publish snapshots with `selfplay publish RUN WEIGHTS`")
    port = getattr(args, "metrics_port", None)
    if port is not None and not 0 <= port <= 65535:
        raise ConfigError(f"--metrics-port {port} is not a port number (0..65535)")
    return RunPlan(config=config, run=run, resume=bool(args.resume), address=address, local_cpus=cpus,
                   metrics_port=port, metrics_host=getattr(args, "metrics_host", "127.0.0.1"), notes=notes)


def write_run_toml(plan: RunPlan) -> None:
    RunDir.create(plan.run.root)
    text = dump_config(plan.config, comments=True,
                       header="Resolved configuration of this run, written by `selfplay run` "
                       "(every default written out).\nContinue the run with:   selfplay run --resume --out RUN")
    # the file must read back as the same config
    if config_from_toml(text, origin="run.toml being written").model_dump() != plan.config.model_dump():
        raise ConfigError("internal: the resolved config does not read back identically from TOML")
    atomic_write_bytes(plan.run.config, text.encode())


# ---- step 2-5: Ray ------------------------------------------------------------------------------


def execute(plan: RunPlan, *, out: Callable[[str], None] | None = None) -> int:
    """Start or join Ray, run until a stop condition or a signal, clean up. Returns 0."""
    from cluster import session

    say = out or (lambda line: print(line, file=sys.stderr, flush=True))
    if plan.address is None:
        sess = session.start_local(num_cpus=plan.local_cpus)
    else:
        sess = session.join_cluster(plan.address)
    try:
        check_worker_count(plan.config, session.cluster_cpus(), f"the cluster at {sess.address}")
        write_run_toml(plan)
        for note in plan.notes:
            say(note)
        launcher = Launcher(plan.config, plan.run, say=say)
        server = None
        if plan.metrics_port is not None:
            from selfplay.monitor.prometheus import monitor_source, start_metrics_server

            server = start_metrics_server(plan.metrics_port, plan.metrics_host,
                                          source=monitor_source(plan.run.root))
            say(f"metrics at {server.url}")
        try:
            with _StopSignals() as signals:
                launcher.start()
                launcher.loop(stop_requested=signals.requested)
                launcher.finish()  # inside: a second signal cuts the wait short, the flush still runs
        finally:
            launcher.finish()  # after an error: flush what there is (a no-op after a clean stop)
            if server is not None:
                server.close()
    finally:
        session.shutdown()
    return 0


def check_worker_count(config: RunConfig, cpus: int, where: str) -> None:
    """ConfigError when ``run.workers`` asks for more workers than ``where`` has CPUs for."""
    need = config.run.workers * config.worker.threads
    if need > cpus:
        raise ConfigError(
            f"--workers {config.run.workers}: {where} has {cpus} CPU(s); each worker needs "
            f"{config.worker.threads} (worker.threads). Ask for at most {cpus // config.worker.threads}")


class _StopSignals:
    """Turns the first SIGINT/SIGTERM into a clean-stop request; a second one interrupts."""

    def __init__(self) -> None:
        self.event = threading.Event()
        self._old: dict[int, Any] = {}

    def requested(self) -> bool:
        return self.event.is_set()

    def _handle(self, signum: int, frame: Any) -> None:
        if self.event.is_set():
            raise KeyboardInterrupt
        self.event.set()
        print(f"\nselfplay run: {signal.Signals(signum).name}: stopping after the games in flight "
              "(again to stop at once)", file=sys.stderr, flush=True)

    def __enter__(self) -> "_StopSignals":
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM):
                self._old[sig] = signal.signal(sig, self._handle)
        return self

    def __exit__(self, *exc: object) -> None:
        for sig, old in self._old.items():
            signal.signal(sig, old)


@dataclass
class WorkerSlot:
    """The driver's view of one worker slot (the actor behind it may be restarted by Ray)."""

    slot: int
    handle: Any
    games_total: int = 0
    positions_total: int = 0
    evals_total: int = 0
    restarts_seen: int = 0
    last_tag: str = ""
    last_stats: dict[str, Any] = field(default_factory=dict)
    tag_evals: int = 0


class Launcher:
    """Runs the actors of one run on an already initialised Ray (local or cluster).

    Tests drive it directly: ``start()``, ``loop(...)`` with a ``tick`` callback, ``finish()``."""

    def __init__(self, config: RunConfig, run: RunDir, *, say: Callable[[str], None] | None = None,
                 session_tag: str | None = None, progress: bool = True) -> None:
        self.config = config
        self.run = RunDir.create(run.root)
        self.say = say or (lambda line: print(line, file=sys.stderr, flush=True))
        self.session_tag = session_tag or os.urandom(2).hex()
        self.config_data = config.model_dump(mode="json")
        self.show_progress = progress
        self.slots: dict[int, WorkerSlot] = {}
        self.inflight: dict[Any, tuple[str, int]] = {}
        self.buffer: Any = None
        self.snapshots: Any = None
        self.learner: Any = None
        self.buffer_stats: dict[str, Any] = {"games_total": 0, "positions_total": 0}
        self.learner_status: dict[str, Any] = {}
        self.snapshot_version = 0
        self.reported_game_ids: list[str] = []
        self.duplicate_reports = 0
        self.events: list[str] = []
        self.started_at = 0.0
        self.worker_metrics: dict[int, MetricsLog] = {}
        self.failing: dict[str, int] = {}
        self.initial_games = 0
        self.initial_positions = 0
        self._finished = False

    # -- actors -------------------------------------------------------------------------------
    def start(self) -> None:
        from cluster.actors import BufferActor, LearnerActor, SnapshotActor, SnapshotClient
        from cluster.placement import head_options

        from cluster.actors import BufferClient

        root = os.fspath(self.run.root.resolve())
        self.snapshots = SnapshotActor.options(max_restarts=-1, max_task_retries=-1,
                                               **head_options()).remote(root, self.config_data)
        count = self.config.run.buffer_shards
        self.buffer = BufferClient([
            BufferActor.options(max_restarts=-1, max_task_retries=-1, **head_options()).remote(
                root, self.config_data, i, count) for i in range(count)])
        self.buffer_stats = self._started("the replay buffer", lambda: self.buffer.stats(timeout=600))
        self.snapshot_version = self._started(
            "the snapshot store", lambda: self._get(self.snapshots.refresh.remote(), timeout=600))
        if self.config.run.learner:
            self.learner = LearnerActor.options(max_restarts=-1, max_task_retries=0,
                                                **head_options()).remote(root, self.config_data, self.buffer,
                                                                         SnapshotClient(self.snapshots))
            self.learner_status = self._started("the learner", lambda: self._get(self.learner.status.remote(), 600))
        self.started_at = time.time()
        self.initial_games = int(self.buffer_stats["games_total"])
        self.initial_positions = int(self.buffer_stats["positions_total"])
        already = self.stop_reached()
        if already:
            self.say(f"the run already holds {already}: nothing to do (raise --games/--positions to go on)")
            return
        self._top_up()
        if self.learner is not None:
            self._submit_learner()
        self.say(f"run {self.run.root}: game {self.config.game.name} {self.config.game.options}, "
                 f"{len(self.slots)} worker(s) x {self.config.worker.games_in_parallel} games, "
                 f"learner {'on' if self.learner is not None else 'off'}, snapshot v{self.snapshot_version}, "
                 f"{self.initial_games} games already in the run")

    @staticmethod
    def _started(what: str, call: Callable[[], Any]) -> Any:
        """Wait for an actor's first answer; its constructor's error becomes one clear line."""
        import ray

        from cluster.actors import startup_error

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
        from cluster.actors import SelfPlayActor, SnapshotClient
        from cluster.placement import worker_options

        want = self.target_workers()
        added = 0
        while len(self.slots) < want:
            slot = len(self.slots)
            handle = SelfPlayActor.options(max_restarts=-1, max_task_retries=1,
                                           **worker_options(self.config.worker.threads)).remote(
                self.config_data, slot, self.session_tag, self.buffer, SnapshotClient(self.snapshots))
            self.slots[slot] = WorkerSlot(slot, handle)
            self._submit_worker(slot)
            added += 1
        if added and self.started_at and time.time() - self.started_at > 1:
            self.event(f"{added} worker(s) added: the cluster has room for {want}")
        return added

    def _submit_worker(self, slot: int) -> None:
        ref = self.slots[slot].handle.play.remote(self.config.worker.report_seconds)
        self.inflight[ref] = ("worker", slot)

    def _submit_learner(self) -> None:
        ref = self.learner.train.remote(self.config.worker.report_seconds)
        self.inflight[ref] = ("learner", 0)

    def event(self, text: str) -> None:
        self.events.append(text)
        self.say(text)

    # -- results ------------------------------------------------------------------------------
    def _on_worker(self, slot: int, result: dict[str, Any]) -> None:
        ws = self.slots[slot]
        if ws.last_tag and result["tag"] != ws.last_tag:
            ws.restarts_seen += 1
            ws.tag_evals = 0
            self.event(f"worker {result['worker_id']} was restarted by Ray (now on node {result['node_id'][:8]})")
        ws.last_tag = result["tag"]
        added = result["added"]
        self.reported_game_ids.extend(added)
        self.duplicate_reports += int(result["duplicates"])
        stats = result.get("stats", {})
        ws.games_total += len(added)
        ws.positions_total += int(result["positions"])
        evals = int(stats.get("evals_total", 0))
        ws.evals_total += max(0, evals - ws.tag_evals)
        ws.tag_evals = evals
        ws.last_stats = stats
        fields = {k: v for k, v in stats.items() if isinstance(v, (int, float)) and not isinstance(v, bool)}
        fields.update(games_total=ws.games_total, positions_total=ws.positions_total,
                      evals_total=ws.evals_total, snapshot_version=result["snapshot_version"])
        log = self.worker_metrics.get(slot)
        if log is None:
            log = self.worker_metrics[slot] = MetricsLog(self.run.metrics, "worker", result["worker_id"])
        log.write(**fields)

    def _poll(self, timeout: float) -> None:
        import ray

        if not self.inflight:
            time.sleep(timeout)
            return
        ready, _ = ray.wait(list(self.inflight), num_returns=len(self.inflight), timeout=timeout)
        for ref in ready:
            kind, slot = self.inflight.pop(ref)
            who = f"worker {slot}" if kind == "worker" else "learner"
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

        from cluster.actors import actor_failure, startup_error

        if getattr(exc, "actor_init_failed", False):
            raise startup_error(who, exc) from None
        if actor_failure(exc):
            if who not in self.failing:
                self.event(f"{who} lost ({type(exc).__name__}); Ray restarts it and its call is resubmitted")
            self.failing[who] = self.failing.get(who, 0)
            return
        if not isinstance(exc, ray.exceptions.RayTaskError):
            raise exc
        cause = getattr(exc, "cause", None)
        if isinstance(cause, SelfplayError):
            raise SelfplayError(f"{who}: {cause}") from None
        first = str(cause if cause is not None else exc).strip().splitlines()
        self.failing[who] = self.failing.get(who, 0) + 1
        self.event(f"{who} failed: {first[-1] if first else type(exc).__name__}")
        if self.failing[who] >= self.MAX_CONSECUTIVE_ERRORS:
            raise SelfplayError(f"{who} failed {self.failing[who]} times in a row; last error: "
                                f"{first[-1] if first else type(exc).__name__}") from None

    def _refresh_counts(self) -> None:
        import ray

        try:
            self.buffer_stats = self.buffer.tick(timeout=60)
        except (ray.exceptions.RayError, TimeoutError) as exc:
            self.event(f"buffer did not answer ({type(exc).__name__}); retrying")
        try:
            self.snapshot_version = max(self.snapshot_version,
                                        ray.get(self.snapshots.refresh.remote(), timeout=60))
        except (ray.exceptions.RayError, TimeoutError):
            pass

    def stop_reached(self) -> str | None:
        r = self.config.run
        if r.games and self.buffer_stats["games_total"] >= r.games:
            return f"{r.games} games"
        if r.positions and self.buffer_stats["positions_total"] >= r.positions:
            return f"{r.positions} positions"
        if r.minutes and time.time() - self.started_at >= r.minutes * 60:
            return f"{r.minutes:g} minutes"
        return None

    def status_line(self) -> str:
        b = self.buffer_stats
        elapsed = max(1e-9, time.time() - self.started_at)
        games_new = b["games_total"] - self.initial_games
        pos_new = b["positions_total"] - self.initial_positions
        parts = [time.strftime("%H:%M:%S"),
                 f"games {b['games_total']:,} ({games_new / elapsed * 3600:,.0f}/h)",
                 f"positions {b['positions_total']:,} ({pos_new / elapsed:,.1f}/s)",
                 f"workers {len(self.slots)}", f"snapshot v{self.snapshot_version}"]
        if self.learner_status:
            loss = self.learner_status.get("loss")
            parts.append(f"learner step {self.learner_status.get('step', 0):,}"
                         + (f" loss {loss:.3f}" if isinstance(loss, (int, float)) else ""))
        parts.append(f"window {b.get('window_positions', 0):,}/{b.get('window_capacity', 0):,}")
        return " · ".join(parts)

    def loop(self, *, stop_requested: Callable[[], bool] = lambda: False,
             tick: Callable[["Launcher"], bool | None] | None = None) -> str:
        """Run until a stop condition, ``stop_requested()``, or ``tick(self)`` returning True.
        Returns why it stopped."""
        from selfplay.monitor.progress import StopProgress

        self.stopping = False
        r = self.config.run
        bar = None
        if self.show_progress and self.config.has_stop_condition():
            bar = StopProgress(games=r.games or None, positions=r.positions or None, minutes=r.minutes or None,
                               initial_games=self.initial_games, initial_positions=self.initial_positions,
                               plain_every=r.status_seconds)
            bar.start()
        last_status = time.monotonic()
        last_top_up = time.monotonic()
        reason = ""
        try:
            while True:
                self._poll(timeout=0.5)
                self._refresh_counts()
                if bar is not None:
                    bar.update(games=self.buffer_stats["games_total"], positions=self.buffer_stats["positions_total"])
                now = time.monotonic()
                if now - last_status >= r.status_seconds:
                    last_status = now
                    line = self.status_line()
                    if bar is not None:
                        bar.console.print(line, highlight=False, soft_wrap=True)
                    else:
                        self.say(line)
                if not r.workers and now - last_top_up >= r.top_up_seconds:
                    last_top_up = now
                    self._top_up()
                done = self.stop_reached()
                if done:
                    reason = f"stop condition met: {done}"
                    break
                if stop_requested():
                    reason = "stop requested"
                    break
                if tick is not None and tick(self):
                    reason = "stopped by the caller"
                    break
        finally:
            if bar is not None:
                bar.close()
        self.say(f"{reason}; waiting for the games in flight")
        return reason

    def finish(self, wait_seconds: float | None = None) -> dict[str, Any]:
        """Collect the calls in flight (their finished games reach the buffer), then flush every
        buffer shard and checkpoint the learner. Interrupted while waiting (a second Ctrl-C), it
        still flushes what the buffer holds."""
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
            self._flush_and_checkpoint()
        return self.buffer_stats

    def _flush_and_checkpoint(self) -> None:
        import ray

        if self.buffer is not None:
            try:
                self.buffer_stats = self.buffer.flush(timeout=120)
            except ray.exceptions.RayError as exc:
                self.event(f"buffer flush failed: {exc}")
        if self.learner is not None:
            try:
                ray.get(self.learner.checkpoint.remote(), timeout=120)
            except ray.exceptions.RayError as exc:
                self.event(f"learner checkpoint failed: {type(exc).__name__}")
        if self.buffer is not None:
            self.say(self.status_line())

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

    stopping = False
