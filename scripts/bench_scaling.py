#!/usr/bin/env python
"""Scaling of `selfplay run` from 1 to 2 workers on one machine: games per hour of each, and the
scaling efficiency  E = games/h with 2 workers / (2 x games/h with 1 worker)  (target >= 0.9).

Both are measured in this one run, on one embedded local Ray (127.0.0.1) with the real actors
(SelfPlayActor, BufferActor, SnapshotActor), generation only (no learner, so the learner does
not take a core from the workers). Trials alternate 1, 2, 1, 2, ... so that a change in the
machine's background load hits both sides; each trial waits until every worker has reported
twice (imports and first snapshot done), then counts the games the buffer accepted in a fixed
window. Medians over the trials are reported.

    python scripts/bench_scaling.py --preset fourinrow --trials 3 --seconds 40
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from cluster import session  # noqa: E402


def cpu_seconds(pid: int) -> float:
    """User + system CPU seconds a process has used (from /proc/PID/stat)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def run_cpu_seconds() -> float:
    """CPU seconds used so far by this process and every process below it (the whole local Ray:
    driver, GCS, raylet, actors); processes that already exited are not counted."""
    total = cpu_seconds(os.getpid())
    parent: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            parent[int(stat.parent.name)] = int(stat.read_text().rsplit(")", 1)[1].split()[1])
        except (OSError, ValueError):
            continue
    seen, frontier = set(), {os.getpid()}
    while frontier:
        frontier = {p for p, pp in parent.items() if pp in frontier} - seen
        seen |= frontier
    for pid in seen:
        try:
            total += cpu_seconds(pid)
        except (OSError, ValueError):
            continue
    return total


def machine_busy_seconds() -> float:
    """CPU seconds the whole machine spent busy (every process), from /proc/stat."""
    vals = [int(v) for v in Path("/proc/stat").read_text().splitlines()[0].split()[1:]]
    idle = vals[3] + vals[4]
    return (sum(vals[:8]) - idle) / os.sysconf("SC_CLK_TCK")


def trial(config: Any, workers: int, seconds: float, root: Path, index: int) -> dict[str, float]:
    import ray

    from cluster.driver import Driver
    from selfplay.config import with_overrides
    from selfplay.rundir import RunDir

    cfg = with_overrides(config, {"run.workers": workers, "run.learner": False, "run.games": 0,
                                  "run.positions": 0, "run.minutes": 0})
    launcher = Driver(cfg, RunDir(root / f"trial{index}-w{workers}"), say=lambda line: None, progress=False)
    launcher.start()
    marks: dict[str, float] = {}
    pids = [ray.get(ws.handle.where.remote())["pid"] for ws in launcher.slots.values()]

    def tick(la: Driver) -> bool:
        now = time.monotonic()
        if "t0" not in marks:
            reports = [ws.games_total > 0 and len(ws.last_report) > 0 for ws in la.slots.values()]
            if "warm" not in marks and all(reports):
                marks.update(warm=now)
            if "warm" in marks and now - marks["warm"] >= 2 * cfg.worker.report_seconds:
                marks.update(t0=now, g0=la.buffer_stats["games_total"], p0=la.buffer_stats["positions_total"],
                             c0=sum(cpu_seconds(p) for p in pids), m0=machine_busy_seconds(),
                             r0=run_cpu_seconds())
            return False
        if now - marks["t0"] >= seconds:
            marks.update(t1=now, g1=la.buffer_stats["games_total"], p1=la.buffer_stats["positions_total"],
                         c1=sum(cpu_seconds(p) for p in pids), m1=machine_busy_seconds(),
                         r1=run_cpu_seconds())
            return True
        return False

    try:
        launcher.loop(tick=tick)
    finally:
        launcher.finish(wait_seconds=10)
        launcher.kill_actors()
    dt = marks["t1"] - marks["t0"]
    games = marks["g1"] - marks["g0"]
    worker_cpu = marks["c1"] - marks["c0"]
    return {"workers": workers, "games_per_hour": games / dt * 3600,
            "positions_per_second": (marks["p1"] - marks["p0"]) / dt, "seconds": dt,
            "worker_cpus_used": worker_cpu / dt, "machine_cpus_busy": (marks["m1"] - marks["m0"]) / dt,
            "run_cpus_used": (marks["r1"] - marks["r0"]) / dt,
            "games_per_worker_cpu_hour": games / max(worker_cpu, 1e-9) * 3600}


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--preset", default="fourinrow", help="preset to play (default fourinrow)")
    p.add_argument("--trials", type=int, default=3, help="trials per worker count (default 3)")
    p.add_argument("--seconds", type=float, default=40.0, help="measured seconds per trial (default 40)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    args = p.parse_args()

    from selfplay.config import load_preset

    config = load_preset(args.preset)
    session.start_local(num_cpus=2)
    results: list[dict[str, float]] = []
    try:
        with tempfile.TemporaryDirectory(prefix="plyfoundry-scaling-") as tmp:
            for i in range(args.trials):
                for workers in (1, 2):
                    r = trial(config, workers, args.seconds, Path(tmp), i)
                    results.append(r)
                    if not args.json:
                        print(f"trial {i + 1}: {workers} worker(s): {r['games_per_hour']:,.0f} games/h, "
                              f"{r['positions_per_second']:,.1f} positions/s, workers used "
                              f"{r['worker_cpus_used']:.2f} CPUs, the whole run {r['run_cpus_used']:.2f} "
                              f"(machine busy {r['machine_cpus_busy']:.2f} "
                              f"of {os.cpu_count()}), {r['games_per_worker_cpu_hour']:,.0f} games per worker "
                              "CPU-hour", flush=True)
    finally:
        session.shutdown()
    one = [r["games_per_hour"] for r in results if r["workers"] == 1]
    two = [r["games_per_hour"] for r in results if r["workers"] == 2]
    per_trial = [b / (2 * a) for a, b in zip(one, two)]
    cpu_one = [r["games_per_worker_cpu_hour"] for r in results if r["workers"] == 1]
    cpu_two = [r["games_per_worker_cpu_hour"] for r in results if r["workers"] == 2]
    used_two = [r["worker_cpus_used"] for r in results if r["workers"] == 2]
    out = {
        "preset": args.preset, "trials": args.trials, "seconds_per_trial": args.seconds,
        "games_per_hour_1_worker_median": round(statistics.median(one)),
        "games_per_hour_2_workers_median": round(statistics.median(two)),
        "scaling_efficiency": round(statistics.median(two) / (2 * statistics.median(one)), 3),
        "scaling_efficiency_per_trial": [round(e, 3) for e in per_trial],
        "target": 0.9,
        # where a shortfall comes from: the CPU the two workers got, and their work per CPU second
        "worker_cpus_used_2_workers_median": round(statistics.median(used_two), 2),
        "games_per_worker_cpu_hour_1_worker_median": round(statistics.median(cpu_one)),
        "games_per_worker_cpu_hour_2_workers_median": round(statistics.median(cpu_two)),
        "per_cpu_efficiency": round(statistics.median(cpu_two) / statistics.median(cpu_one), 3),
        "machine_cpus_busy_median": round(statistics.median(r["machine_cpus_busy"] for r in results), 2),
        "run_cpus_used_2_workers_median": round(statistics.median(
            r["run_cpus_used"] for r in results if r["workers"] == 2), 2),
        "run_cpus_used_1_worker_median": round(statistics.median(
            r["run_cpus_used"] for r in results if r["workers"] == 1), 2),
    }
    if args.json:
        print(json.dumps(out))
    else:
        for k, v in out.items():
            print(f"{k:34s} {v}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
