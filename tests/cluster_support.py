"""Helpers of the Ray tests: a tiny run config and the checks every fault test ends with."""

from __future__ import annotations

import json
import sqlite3
import time
from pathlib import Path
from typing import Any

from selfplay.config import RunConfig, load_preset, with_overrides
from selfplay.rundir import pid_alive

#: a run small enough for 2 busy cores: tic-tac-toe, an 8-channel net, 16 simulations
TINY = {
    "network.blocks": 1, "network.channels": 8, "network.value_hidden": 8,
    "search.simulations": 16, "search.reduced_simulations": 4,
    "worker.games_in_parallel": 8, "worker.report_seconds": 0.5, "worker.snapshot_poll_seconds": 0.3,
    "replay.window_positions": 4000, "replay.shard_max_age_seconds": 0.5,
    "learner.batch_size": 32, "learner.steps_per_snapshot": 5, "learner.min_buffer_positions": 60,
    "learner.target_reuse_ratio": 2.0,
    "run.status_seconds": 5.0, "run.top_up_seconds": 1.0,
}


def tiny_config(**overrides: Any) -> RunConfig:
    values = dict(TINY)
    values.update({k.replace("__", "."): v for k, v in overrides.items()})
    return with_overrides(load_preset("tictactoe"), values)


def catalog_ids(run: Path) -> list[str]:
    con = sqlite3.connect(f"file:{run / 'catalog.sqlite'}?mode=ro", uri=True)
    try:
        return [r[0] for r in con.execute("SELECT game_id FROM games")]
    finally:
        con.close()


def catalog_count(run: Path) -> int:
    if not (run / "catalog.sqlite").exists():
        return 0
    try:
        return len(catalog_ids(run))
    except sqlite3.OperationalError:
        return 0


def metric_rows(run: Path, component: str) -> list[dict[str, Any]]:
    rows = []
    with open(run / "metrics.jsonl", "rb") as f:
        for line in f:
            if line.endswith(b"\n"):
                try:
                    row = json.loads(line)
                except ValueError:  # half a line left by a full disk, as the monitor skips it
                    continue
                if row.get("component") == component:
                    rows.append(row)
    return rows


def check_run_consistent(run: Path, reported: list[str] | None = None,
                         buffer_stats: dict[str, Any] | None = None,
                         buffer_restarted: bool = False) -> dict[str, Any]:
    """The checks after every fault: each game reported finished is in the catalog exactly once;
    the shard files and unsealed journals hold exactly the catalog's games; the buffer's counts
    agree with the catalog; the buffer's logged totals never go down while one buffer lives (a
    fall would read as a restart to the monitor); snapshot versions only increase (on disk, in
    the metrics, and per worker)."""
    from selfplay.replay.shards import read_shard
    from selfplay.snapshots import SnapshotStore

    ids = catalog_ids(run)
    assert len(ids) == len(set(ids)), "a game id appears twice in the catalog"
    if reported is not None:
        assert len(reported) == len(set(reported)), "a game was reported finished twice"
        missing = set(reported) - set(ids)
        assert not missing, f"{len(missing)} reported games are not in the catalog, e.g. {sorted(missing)[:3]}"
    # shards and unsealed journals (a killed buffer's games are durable in its journal until the
    # next open seals it; a torn last append is skipped)
    files = sorted((run / "shards").glob("*.plyrec")) + sorted((run / "shards").glob("*.journal"))
    on_disk = [rec.game_id for shard in files for _, rec in read_shard(shard, damaged=[])]
    assert sorted(on_disk) == sorted(ids), "shard files and catalog disagree"
    if buffer_stats is not None:
        assert buffer_stats["pending_games"] == 0
        assert buffer_stats["games_durable"] == len(ids) == buffer_stats["games_total"]
    if not buffer_restarted:
        by_buffer: dict[str, list[int]] = {}
        for row in metric_rows(run, "buffer"):
            by_buffer.setdefault(row["source"], []).append(int(row["games_total"]))
        for source, seq in by_buffer.items():
            assert seq == sorted(seq), f"buffer {source} logged a games_total that went down: {seq}"
    # every metric line fits the metrics schema (selfplay/metrics_schema.py), and every role that
    # stopped wrote its final line
    from selfplay.metrics_schema import line_problems

    rows = [r for c in ("worker", "buffer", "learner", "snapshots", "snapshot_server", "run", "eval")
            for r in metric_rows(run, c)]
    problems = sorted({p for r in rows for p in line_problems(r)})
    assert not problems, problems[:5]
    infos = list(SnapshotStore(run).iter_infos())
    versions = [i.version for i in infos]
    assert versions == list(range(1, len(versions) + 1)), versions
    times = [i.published_at for i in infos]
    assert times == sorted(times)
    logged = [r["version"] for r in metric_rows(run, "snapshots")]
    assert logged == sorted(logged) and len(set(logged)) == len(logged)
    by_worker: dict[str, list[int]] = {}
    for row in metric_rows(run, "worker"):
        by_worker.setdefault(row["source"], []).append(int(row["snapshot_version"]))
    for source, seq in by_worker.items():
        assert seq == sorted(seq), f"worker {source} went back to an older snapshot: {seq}"
    return {"games": len(ids), "snapshots": len(versions), "workers": sorted(by_worker)}


def wait_for(predicate, timeout: float, what: str, poll: float = 0.2) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return
        time.sleep(poll)
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")


def descendants(root: int) -> set[int]:
    """Pids below ``root`` (from /proc)."""
    parent: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            text = stat.read_text()
        except OSError:
            continue
        parent[int(stat.parent.name)] = int(text.rsplit(")", 1)[1].split()[1])
    out: set[int] = set()
    frontier = {root}
    while frontier:
        frontier = {pid for pid, pp in parent.items() if pp in frontier} - out
        out |= frontier
    return out


def alive(pid: int) -> bool:
    """Process ``pid`` runs here (zombies count as gone): the run lock's own check."""
    return pid_alive(pid)
