"""``selfplay run``: the command line and the plan (no Ray here).

Order of work, so that bad input is refused before anything starts:

1. :func:`resolve_run` reads the preset or config file, applies the command-line overrides,
   checks the run directory (a new one, or ``--resume`` of one made with the same game and
   config) and the worker count against this machine's CPUs — nothing written.
2. :func:`execute` takes the run lock (a second run into a live directory is refused here,
   before anything is touched), then runs the roles: in this process (``--in-process``,
   :func:`selfplay.loop.execute_in_process`) or on Ray (:func:`cluster.driver.execute_ray`,
   imported only then).
"""

from __future__ import annotations

import argparse
import math
import os
import sys
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
from selfplay.rundir import RunDir, atomic_write_bytes



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
    p.add_argument("--in-process", action="store_true",
                   help="run every role in this process, without Ray (same run directory, same records)")
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
    in_process: bool = False
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

    in_process = bool(getattr(args, "in_process", False))
    address = args.address or (None if in_process else os.environ.get("RAY_ADDRESS")) or None
    if in_process and address is not None:
        raise ConfigError("--in-process runs without Ray; it cannot join a cluster (--address)")
    cpus = local_cpu_count()
    if address is None:
        check_worker_count(config, cpus, "this machine")
    if config.run.learner is False and args.resume is False:
        notes.append("generation only (--no-learner): publish snapshots with `selfplay publish RUN WEIGHTS`")
    port = getattr(args, "metrics_port", None)
    if port is not None and not 0 <= port <= 65535:
        raise ConfigError(f"--metrics-port {port} is not a port number (0..65535)")
    return RunPlan(config=config, run=run, resume=bool(args.resume), address=address, local_cpus=cpus,
                   metrics_port=port, metrics_host=getattr(args, "metrics_host", "127.0.0.1"),
                   in_process=in_process, notes=notes)


def write_run_toml(plan: RunPlan) -> None:
    RunDir.create(plan.run.root)
    text = dump_config(plan.config, comments=True,
                       header="Resolved configuration of this run, written by `selfplay run` "
                       "(every default written out).\nContinue the run with:   selfplay run --resume --out RUN")
    # the file must read back as the same config
    if config_from_toml(text, origin="run.toml being written").model_dump() != plan.config.model_dump():
        raise RuntimeError("the resolved config does not read back identically from TOML")  # a bug, not bad input
    atomic_write_bytes(plan.run.config, text.encode())



def check_worker_count(config: RunConfig, cpus: int, where: str) -> None:
    """ConfigError when ``run.workers`` asks for more workers than ``where`` has CPUs for."""
    need = config.run.workers * config.worker.threads
    if need > cpus:
        raise ConfigError(
            f"--workers {config.run.workers}: {where} has {cpus} CPU(s); each worker needs "
            f"{config.worker.threads} (worker.threads). Ask for at most {cpus // config.worker.threads}")


# ---- step 2: the lock, then the roles ----------------------------------------------------------


def execute(plan: RunPlan, *, out: Callable[[str], None] | None = None) -> int:
    """Take the run lock and run until a stop condition or a signal. Returns 0."""
    from selfplay.roles.runlock import RunLock

    say = out or (lambda line: print(line, file=sys.stderr, flush=True))
    existed = plan.run.root.exists()
    lock = RunLock.acquire(plan.run.root, say=say)
    try:
        if plan.in_process:
            from selfplay.loop import execute_in_process

            write_run_toml(plan)
            for note in plan.notes:
                say(note)
            return _with_metrics_server(plan, say, lambda: execute_in_process(plan.config, plan.run, lock, say=say))
        try:
            from cluster.driver import execute_ray

            return execute_ray(plan, lock, say=say, serve=lambda body: _with_metrics_server(plan, say, body))
        except ModuleNotFoundError as exc:
            if (exc.name or "").split(".")[0] not in ("ray", "cluster"):
                raise
            raise SelfplayError(f"Ray cannot be imported ({exc}); install it, or run without it: "
                                "selfplay run --in-process ...") from None
    finally:
        lock.release()
        if not existed and not plan.run.config.exists():
            _remove_unstarted(plan.run.root)


def _with_metrics_server(plan: RunPlan, say: Callable[[str], None], body: Callable[[], int]) -> int:
    """Run ``body`` with the Prometheus endpoint up when --metrics-port asks for it."""
    if plan.metrics_port is None:
        return body()
    from selfplay.monitor.prometheus import monitor_source, start_metrics_server

    server = start_metrics_server(plan.metrics_port, plan.metrics_host, source=monitor_source(plan.run.root))
    say(f"metrics at {server.url}")
    try:
        return body()
    finally:
        server.close()


def _remove_unstarted(root: Path) -> None:
    """A new run that failed before its run.toml was written leaves no directory behind."""
    from selfplay.roles.runlock import LOCK_NAME, SESSIONS_NAME

    for name in (LOCK_NAME, SESSIONS_NAME, "metrics.jsonl"):
        (root / name).unlink(missing_ok=True)
    for sub in ("snapshots", "shards", "quarantine", ""):
        try:
            (root / sub).rmdir()
        except OSError:
            pass
