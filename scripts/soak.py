"""Soak with faults: self-play (tic-tac-toe, a tiny network) for minutes while processes and nodes
are killed at seeded random times, then a check that nothing counted as stored was lost.

Each round has two parts on the same run directory:

1. **cluster part** — a multi-node Ray cluster simulated on this machine
   (``ray.cluster_utils.Cluster``, every node on 127.0.0.1, the head without CPUs, two 1-CPU
   worker nodes) runs the driver (:class:`cluster.driver.Driver`) in this process. At seeded
   random times it kills (SIGKILL) a random worker actor, the buffer actor or the learner actor,
   or removes a worker node and adds a fresh one. It ends with a clean stop, after which the
   buffer's counts must equal the catalog's.
2. **driver part** — ``selfplay run --resume`` in a subprocess (its own local Ray), killed with
   SIGKILL at a seeded random time once it has stored games; what it leaves behind is reaped.

Before every fault the catalog's game ids are read (what the run had counted as stored), and
the counts the run printed or reported are kept. At the end ``selfplay verify RUN`` opens the run
(sealing journals) and checks every shard frame by frame; then: game ids are unique, every id
ever counted is there, the final count is at least every count seen, the shard files hold exactly
the catalog's games, snapshot versions only increased (on disk, in the metric lines, per worker).

    python scripts/soak.py --out /tmp/soak --minutes 4 --json soak.json

It is CPU heavy: run it under ``flock /tmp/plyfoundry-bench.lock``.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import re
import signal
import sqlite3
import subprocess
import sys
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from selfplay.rundir import pid_alive  # noqa: E402

FAULT_KINDS = ("worker", "buffer", "learner", "node")

#: a run small enough for 2 busy cores: tic-tac-toe, an 8-channel net, 16 simulations
TINY = {
    "network.blocks": 1, "network.channels": 8, "network.value_hidden": 8,
    "search.simulations": 16, "search.reduced_simulations": 4,
    "worker.games_in_parallel": 8, "worker.report_seconds": 0.5, "worker.snapshot_poll_seconds": 0.3,
    "replay.window_positions": 4000, "replay.shard_max_age_seconds": 2.0,
    "learner.batch_size": 32, "learner.steps_per_snapshot": 5, "learner.min_buffer_positions": 60,
    "learner.target_reuse_ratio": 2.0,
    "run.status_seconds": 1.0, "run.top_up_seconds": 1.0,
    "run.games": 0,  # no game limit: the soak's own clock ends each part
}


@dataclass
class Fault:
    """One fault injected: its kind, when (seconds since the soak began), the round, and the
    games the catalog counted just before it."""

    kind: str
    at_seconds: float
    round: int
    counted_before: int
    detail: str = ""
    ids_before: set[str] = field(default_factory=set, repr=False)


@dataclass
class SoakResult:
    seconds: float = 0.0
    rounds: int = 0
    faults: list[Fault] = field(default_factory=list)
    counts_seen: list[int] = field(default_factory=list)
    ids_seen: set[str] = field(default_factory=set)
    buffer_catalog_agree: list[bool] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)
    final: dict[str, Any] = field(default_factory=dict)

    def figures(self) -> dict[str, Any]:
        by_kind = {k: sum(1 for f in self.faults if f.kind == k) for k in FAULT_KINDS + ("driver",)}
        return {
            "seconds": round(self.seconds, 1), "rounds": self.rounds, "faults_total": len(self.faults),
            "faults_by_kind": by_kind,
            "faults": [{k: v for k, v in asdict(f).items() if k != "ids_before"} for f in self.faults],
            "max_count_seen": max(self.counts_seen, default=0), "ids_counted": len(self.ids_seen),
            "buffer_catalog_agree": all(self.buffer_catalog_agree) and bool(self.buffer_catalog_agree),
            "games_lost": self.final.get("games_lost"), "problems": self.problems, **self.final,
        }


# ---- the run directory, read from outside --------------------------------------------------------


def catalog_ids(run: Path) -> list[str]:
    """Game ids the catalog holds now ([] before it exists)."""
    if not (run / "catalog.sqlite").exists():
        return []
    try:
        con = sqlite3.connect(f"file:{run / 'catalog.sqlite'}?mode=ro", uri=True, timeout=10)
        try:
            return [r[0] for r in con.execute("SELECT game_id FROM games")]
        finally:
            con.close()
    except sqlite3.OperationalError:
        return []


def metric_rows(run: Path, component: str) -> list[dict[str, Any]]:
    rows = []
    path = run / "metrics.jsonl"
    if not path.exists():
        return rows
    with open(path, "rb") as f:
        for line in f:
            if line.endswith(b"\n"):
                try:
                    row = json.loads(line)
                except ValueError:
                    continue
                if row.get("component") == component:
                    rows.append(row)
    return rows


def alive(pid: int) -> bool:
    """Process ``pid`` runs here (zombies count as gone): the run lock's own check."""
    return pid_alive(pid)


def descendants(root: int) -> set[int]:
    """Pids below ``root`` (from /proc)."""
    parent: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            parent[int(stat.parent.name)] = int(stat.read_text().rsplit(")", 1)[1].split()[1])
        except (OSError, IndexError, ValueError):
            continue
    out: set[int] = set()
    frontier = {root}
    while frontier:
        frontier = {pid for pid, pp in parent.items() if pp in frontier} - out
        out |= frontier
    return out


# ---- the soak ------------------------------------------------------------------------------------


class Soak:
    def __init__(self, out: Path, *, seed: int, say=print) -> None:
        from selfplay.config import dump_config, load_preset, with_overrides

        self.out = out
        self.run = out / "run"
        self.rng = random.Random(seed)
        self.say = say
        self.config = with_overrides(load_preset("tictactoe"), dict(TINY, **{"run.seed": seed}))
        out.mkdir(parents=True, exist_ok=True)
        self.config_path = out / "soak.toml"
        self.config_path.write_text(dump_config(self.config))
        from selfplay.rundir import RunDir, atomic_write_bytes

        atomic_write_bytes(RunDir.create(self.run).config, dump_config(self.config).encode())
        self.result = SoakResult()
        self.t0 = time.monotonic()

    def elapsed(self) -> float:
        return time.monotonic() - self.t0

    def _counted(self, kind: str, round_: int, extra_count: int = 0, detail: str = "") -> Fault:
        """Read what the catalog counts right before a fault."""
        ids = catalog_ids(self.run)
        self.result.ids_seen.update(ids)
        count = max(len(ids), extra_count)
        self.result.counts_seen.append(count)
        f = Fault(kind, round(self.elapsed(), 1), round_, count, detail, set(ids))
        self.result.faults.append(f)
        self.say(f"[{f.at_seconds:7.1f} s] round {round_}: kill {kind} {detail}(catalog counted {count})")
        return f

    # -- part 1: a simulated multi-node cluster, the driver in this process ------------------------
    def cluster_part(self, round_: int, seconds: float, faults: int) -> None:
        import ray
        from ray.cluster_utils import Cluster

        from cluster import session
        from cluster.driver import Driver
        from selfplay.rundir import RunDir

        session.local_only_environment()
        cluster = Cluster(initialize_head=True, connect=True,
                          head_node_args={"num_cpus": 0, "node_ip_address": "127.0.0.1", "include_dashboard": False})
        try:
            nodes = [cluster.add_node(num_cpus=1, node_ip_address="127.0.0.1") for _ in range(2)]
            cluster.wait_for_nodes()
            lines: list[str] = []
            driver = Driver(self.config, RunDir(self.run), say=lines.append, progress=False)
            driver.start()
            start = time.monotonic()
            # every kind at least once a round (when there is room), the rest drawn at random
            kinds = list(FAULT_KINDS)[:faults] + [self.rng.choice(FAULT_KINDS) for _ in range(faults - len(FAULT_KINDS))]
            self.rng.shuffle(kinds)
            times = sorted(self.rng.uniform(0.15 * seconds, 0.85 * seconds) for _ in kinds)
            plan = list(zip(times, kinds))

            def tick(la: Driver) -> bool:
                now = time.monotonic() - start
                while plan and now >= plan[0][0]:
                    _, kind = plan.pop(0)
                    if not self._inject(la, cluster, nodes, kind, round_) and now + 2 < seconds - 5:
                        plan.append((now + 2.0, kind))  # an actor still restarting: again in 2 s
                        plan.sort()
                        break
                return now >= seconds

            try:
                driver.loop(tick=tick)
            finally:
                stats = driver.finish()
                driver.kill_actors()
            ids = catalog_ids(self.run)
            self.result.counts_seen.append(int(stats["games_total"]))
            self.result.ids_seen.update(ids)
            agree = int(stats["games_durable"]) == len(ids) == int(stats["games_total"])
            self.result.buffer_catalog_agree.append(agree)
            if not agree:
                self.result.problems.append(f"round {round_}: buffer counts {stats['games_total']} games, "
                                            f"the catalog {len(ids)}")
            missing = set(driver.reported_game_ids) - set(ids)
            if missing:
                self.result.problems.append(f"round {round_}: {len(missing)} games reported by workers are missing")
            self.say(f"[{self.elapsed():7.1f} s] round {round_}: cluster part stopped cleanly: "
                     f"{len(ids)} games, buffer {'agrees' if agree else 'DISAGREES'}")
            for line in lines:
                if "failed" in line or "lost" in line:
                    self.say(f"    driver: {line}")
        finally:
            ray.shutdown()
            cluster.shutdown()

    def _inject(self, la: Any, cluster: Any, nodes: list[Any], kind: str, round_: int) -> bool:
        """Inject one fault of ``kind``; False if its actor could not be reached (restarting)."""
        import ray

        try:
            if kind == "node":
                victim = self.rng.randrange(len(nodes))
                self._counted("node", round_, int(la.buffer_stats["games_total"]), f"node {victim} ")
                cluster.remove_node(nodes[victim])
                nodes[victim] = cluster.add_node(num_cpus=1, node_ip_address="127.0.0.1")
                return True
            if kind == "worker":
                slot = self.rng.choice(sorted(la.slots))
                handle, detail = la.slots[slot].handle, f"worker {slot} "
            elif kind == "buffer":
                handle, detail = la.buffer.handles[0], ""
            else:
                handle, detail = la.learner, ""
            pid = int(ray.get(handle.where.remote(), timeout=30)["pid"])
        except Exception as exc:  # noqa: BLE001 - an actor still restarting: try the next time
            self.say(f"[{self.elapsed():7.1f} s] round {round_}: {kind} not reachable ({type(exc).__name__}); later")
            return False
        self._counted(kind, round_, int(la.buffer_stats["games_total"]), detail)
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        return True

    # -- part 2: `selfplay run --resume` killed with SIGKILL -----------------------------------------
    def driver_part(self, round_: int, seconds: float) -> None:
        env = dict(os.environ)
        env.pop("RAY_ADDRESS", None)
        env["RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"] = "0"
        env["PYTHONPATH"] = os.pathsep.join([str(REPO)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
        log_path = self.out / f"driver-{round_}.log"
        args = [sys.executable, "-m", "selfplay.cli", "run", "--out", str(self.run), "--resume", "--workers", "1"]
        before = len(catalog_ids(self.run))
        with open(log_path, "wb") as log:
            proc = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT, env=env, start_new_session=True)
        below: set[int] = set()
        try:
            deadline = time.monotonic() + 180
            while time.monotonic() < deadline and len(catalog_ids(self.run)) <= before and proc.poll() is None:
                time.sleep(0.3)
            time.sleep(self.rng.uniform(0.2, 1.0) * seconds)
            if proc.poll() is not None:
                self.result.problems.append(f"round {round_}: the run ended before it was killed "
                                            f"(status {proc.returncode}); see {log_path}")
                return
            printed = [int(m.replace(",", "")) for m in re.findall(r"games ([\d,]+) \(", log_path.read_text())]
            below = descendants(proc.pid)
            self._counted("driver", round_, max(printed, default=0))
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=60)
            deadline = time.monotonic() + 60  # the reaper ends what the killed driver's Ray leaves
            while time.monotonic() < deadline and any(alive(p) for p in below):
                time.sleep(0.5)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait(timeout=30)
            for pid in below:  # only processes this soak started
                if alive(pid):
                    try:
                        os.kill(pid, signal.SIGKILL)
                    except ProcessLookupError:
                        pass

    # -- the checks ------------------------------------------------------------------------------
    def check(self) -> None:
        from selfplay.commands.verify import verify_run
        from selfplay.replay.shards import read_shard
        from selfplay.snapshots import SnapshotStore

        res = self.result
        verify = subprocess.run([sys.executable, "-m", "selfplay.cli", "verify", str(self.run), "--json"],
                                capture_output=True, text=True, timeout=600,
                                env={**os.environ, "PYTHONPATH": str(REPO)})
        if verify.returncode != 0:
            res.problems.append(f"selfplay verify failed: {verify.stderr.strip()[-300:]}")
            first = {}
        else:
            first = json.loads(verify.stdout)
        again = verify_run(str(self.run))  # a second pass must find everything sound
        ids = catalog_ids(self.run)
        unique = len(ids) == len(set(ids))
        files = sorted((self.run / "shards").glob("*.plyrec")) + sorted((self.run / "shards").glob("*.journal"))
        on_disk = [rec.game_id for shard in files for _, rec in read_shard(shard, damaged=[])]
        missing = res.ids_seen - set(ids)
        per_fault = {id(f): len(f.ids_before - set(ids)) for f in res.faults}
        infos = list(SnapshotStore(self.run).iter_infos())
        versions = [i.version for i in infos]
        logged = [r["version"] for r in metric_rows(self.run, "snapshots")]
        by_worker: dict[str, list[int]] = {}
        for row in metric_rows(self.run, "worker"):
            by_worker.setdefault(row["source"], []).append(int(row["snapshot_version"]))
        from selfplay.metrics_schema import COMPONENTS, line_problems

        rows = [r for c in COMPONENTS for r in metric_rows(self.run, c)]
        bad_lines = sorted({p for r in rows for p in line_problems(r)})
        checks = {
            "game ids unique": unique,
            "every counted game present": not missing,
            "count >= every count seen": len(ids) >= max(res.counts_seen, default=0),
            "shards hold exactly the catalog's games": sorted(on_disk) == sorted(ids),
            "selfplay verify: nothing quarantined": bool(first) and not first.get("shards_quarantined")
            and not again["shards_quarantined"] and again["games_lost"] == 0 and first.get("games_lost") == 0,
            "buffer and catalog agree at every clean stop": all(res.buffer_catalog_agree) and bool(res.buffer_catalog_agree),
            "snapshot versions 1..n on disk, published in order": versions == list(range(1, len(versions) + 1))
            and [i.published_at for i in infos] == sorted(i.published_at for i in infos),
            "snapshot versions only increase (metric lines)": logged == sorted(logged),
            "snapshot versions only increase (per worker)": all(s == sorted(s) for s in by_worker.values()),
            "every metric line fits the schema": not bad_lines,
        }
        for name, ok in checks.items():
            if not ok:
                res.problems.append(f"check failed: {name}")
        for f in res.faults:
            f.detail = (f.detail + f"lost {per_fault[id(f)]}").strip()
        res.final = {
            "games_final": len(ids), "games_lost": len(missing) + max(0, max(res.counts_seen, default=0) - len(ids)),
            "positions_final": again["positions"], "shards_final": again["shards"], "snapshots_final": len(versions),
            "verify_first_pass": {k: first.get(k) for k in ("games", "shards", "journals_replayed",
                                                              "shards_quarantined", "games_lost", "notes")},
            "checks": checks, "duplicates_total": _duplicates(self.run),
            "schema_problems": bad_lines[:5],
            "recovery_lines_logged": sum(1 for r in metric_rows(self.run, "buffer") if r.get("event") == "recovery"),
        }


def _duplicates(run: Path) -> int:
    rows = metric_rows(run, "buffer")
    return max((int(r.get("duplicates_total", 0)) for r in rows), default=0)


def run_soak(out: Path, *, minutes: float, seed: int, rounds: int | None = None, faults_per_round: int = 6,
             cluster_seconds: float | None = None, driver_seconds: float | None = None,
             say=print) -> dict[str, Any]:
    """Rounds of (cluster part with faults, driver part killed with SIGKILL) for about ``minutes``
    (or parts of the given seconds), then the checks; returns the figures."""
    soak = Soak(out, seed=seed, say=say)
    total = minutes * 60
    n = rounds or max(1, round(total / 75))
    per_round = total / n
    for r in range(1, n + 1):
        soak.cluster_part(r, seconds=cluster_seconds or max(20.0, 0.7 * per_round - 15), faults=faults_per_round)
        soak.driver_part(r, seconds=driver_seconds or max(4.0, 0.3 * per_round - 10))
    soak.result.rounds = n
    soak.check()
    soak.result.seconds = soak.elapsed()
    return soak.result.figures()


def print_table(fig: dict[str, Any], say=print) -> None:
    say("")
    say(f"{'fault':<10} {'injected':>8} {'games lost':>10}")
    lost_by_kind: dict[str, int] = {}
    for f in fig["faults"]:
        m = re.search(r"lost (\d+)", f["detail"])
        lost_by_kind[f["kind"]] = lost_by_kind.get(f["kind"], 0) + (int(m.group(1)) if m else 0)
    for kind, count in fig["faults_by_kind"].items():
        say(f"{kind:<10} {count:>8} {lost_by_kind.get(kind, 0):>10}")
    say(f"{'total':<10} {fig['faults_total']:>8} {fig['games_lost']:>10}")
    say(f"{fig['games_final']:,} games ({fig['positions_final']:,} positions) in {fig['shards_final']} shards, "
        f"{fig['snapshots_final']} snapshots, {fig['rounds']} round(s), {fig['seconds']:.0f} s; "
        f"highest count seen before a fault {fig['max_count_seen']:,}")
    for name, ok in fig["checks"].items():
        say(f"  {'ok  ' if ok else 'FAIL'} {name}")
    for p in fig["problems"]:
        say(f"  problem: {p}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, required=True, help="a new folder for the soak (its run is OUT/run)")
    ap.add_argument("--minutes", type=float, default=4.0, help="about how long to soak")
    ap.add_argument("--rounds", type=int, help="rounds (default: one per 75 s)")
    ap.add_argument("--faults-per-round", type=int, default=6, help="faults in each cluster part (at least 4: one of each)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--json", type=Path, help="write the figures here")
    args = ap.parse_args(argv)
    if args.out.exists() and any(args.out.iterdir()):
        print(f"soak: --out {args.out} is not empty", file=sys.stderr)
        return 2

    def say(line: str) -> None:
        print(line, flush=True)

    fig = run_soak(args.out, minutes=args.minutes, seed=args.seed, rounds=args.rounds,
                   faults_per_round=args.faults_per_round, say=say)
    print_table(fig, say)
    if args.json:
        args.json.write_text(json.dumps(fig, indent=2, sort_keys=True))
    return 0 if fig["games_lost"] == 0 and not fig["problems"] else 1


if __name__ == "__main__":
    sys.exit(main())
