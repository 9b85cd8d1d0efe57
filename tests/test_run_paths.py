"""The two run paths are one run: `selfplay run --in-process` (no Ray) and `selfplay run` (Ray)
compose the same roles, so with one worker, no learner and the same seed they store the same
games — same game ids, same moves, same policy targets — and the same metric lines (by the
metrics schema, selfplay/metrics_schema.py)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from cluster_support import check_run_consistent, metric_rows, tiny_config
from selfplay.config import dump_config
from selfplay.replay.reader import RunReader

pytestmark = [pytest.mark.slow]


def _env() -> dict:
    env = {k: v for k, v in os.environ.items() if k != "RAY_ADDRESS"}
    env["RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"] = "0"
    return env


def _run(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "selfplay.cli", "run", *args], capture_output=True, text=True,
                          timeout=600, env=_env(), cwd=cwd)


def _records(run: Path) -> dict:
    return {r.game_id: r for r in RunReader(run).records()}


@pytest.mark.ray
def test_in_process_and_ray_store_the_same_games(tmp_path):
    cfg = tmp_path / "one.toml"
    # 12 games for 8 slots: the game budget hands out all 12 at the start on both paths, so the
    # batches the network sees are the same too
    cfg.write_text(dump_config(tiny_config(run__workers=1, run__learner=False, run__seed=7,
                                           worker__games_in_parallel=8)))
    local = _run(["--config", str(cfg), "--out", str(tmp_path / "local"), "--games", "12", "--in-process"], tmp_path)
    assert local.returncode == 0, local.stderr[-3000:]
    ray_run = _run(["--config", str(cfg), "--out", str(tmp_path / "ray"), "--games", "12"], tmp_path)
    assert ray_run.returncode == 0, ray_run.stderr[-3000:]
    for proc in (local, ray_run):
        assert "stopped: games reached" in proc.stderr and "selfplay status" in proc.stderr  # the closing summary
    a, b = _records(tmp_path / "local"), _records(tmp_path / "ray")
    assert len(a) == 12 and sorted(a) == sorted(b)  # exactly --games: no game started beyond the budget
    for gid, ra in a.items():
        rb = b[gid]
        assert ra.seed == rb.seed
        np.testing.assert_array_equal(ra.actions, rb.actions)
        np.testing.assert_array_equal(ra.policy_offsets, rb.policy_offsets)
        np.testing.assert_array_equal(ra.policy_actions, rb.policy_actions)
        np.testing.assert_array_equal(ra.policy_weights, rb.policy_weights)
        np.testing.assert_array_equal(ra.root_values, rb.root_values)
    for path, mode in ((tmp_path / "local", "in-process"), (tmp_path / "ray", "ray")):
        check_run_consistent(path)  # includes: every metric line fits the schema
        runs = metric_rows(path, "run")
        assert runs[0]["event"] == "start" and runs[0]["mode"] == mode and runs[0]["pid"] > 0
        assert runs[-1]["event"] == "stop" and runs[-1]["stop_reason"] == "games reached"
        finals = {(r["component"], r["source"]) for c in ("worker", "buffer", "snapshot_server")
                  for r in metric_rows(path, c) if r.get("final")}
        assert finals == {("worker", "w0000"), ("buffer", "buffer0"), ("snapshot_server", "snapshots")}
        # the worker's and the buffer's final counts agree with what was stored
        w = [r for r in metric_rows(path, "worker") if r.get("final")][0]
        assert w["games_total"] == 12 and w["games_started_total"] == 12 and w["games_in_flight"] == 0


def test_in_process_run_stops_cleanly_on_sigterm(tmp_path):
    """SIGTERM: the run stops after the games in flight, every role writes its final line, the
    run's stop line says "terminated", and the closing summary names the next commands."""
    import signal

    from cluster_support import catalog_count, wait_for

    cfg = tmp_path / "one.toml"
    cfg.write_text(dump_config(tiny_config(run__workers=1)))
    log = tmp_path / "log.txt"
    p = subprocess.Popen([sys.executable, "-m", "selfplay.cli", "run", "--config", str(cfg), "--out",
                          str(tmp_path / "run"), "--in-process"], stdout=log.open("wb"), stderr=subprocess.STDOUT,
                         env=_env(), cwd=tmp_path)
    try:
        wait_for(lambda: catalog_count(tmp_path / "run") >= 10, 120, "10 stored games")
        p.send_signal(signal.SIGTERM)
        assert p.wait(timeout=120) == 0, log.read_text()[-3000:]
    finally:
        if p.poll() is None:
            p.kill()
    text = log.read_text()
    assert "stopped: terminated" in text and "selfplay status" in text
    facts = check_run_consistent(tmp_path / "run")
    runs = metric_rows(tmp_path / "run", "run")
    assert runs[0]["mode"] == "in-process" and runs[-1]["stop_reason"] == "terminated"
    assert runs[-1]["games_total"] == facts["games"]
    finals = {r["component"] for c in ("worker", "buffer", "learner", "snapshot_server")
              for r in metric_rows(tmp_path / "run", c) if r.get("final")}
    assert finals == {"worker", "buffer", "learner", "snapshot_server"}
    assert not (tmp_path / "run" / "run.lock").read_text()  # the lock was given back
