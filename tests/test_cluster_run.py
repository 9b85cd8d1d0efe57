"""`selfplay run` as a person runs it (a subprocess with its own local Ray on 127.0.0.1):
SIGTERM stops cleanly with every finished game stored; SIGKILL of the driver is followed by
`--resume` on the same run directory; `--no-learner` picks up a snapshot that a trainer of the
user's own publishes with `selfplay publish`."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from cluster_support import (
    alive,
    catalog_count,
    check_run_consistent,
    descendants,
    metric_rows,
    tiny_config,
    wait_for,
)
from selfplay.config import dump_config

pytestmark = [pytest.mark.ray, pytest.mark.slow]


def _start(args: list[str], log: Path) -> subprocess.Popen:
    env = dict(os.environ)
    env.pop("RAY_ADDRESS", None)
    env["RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"] = "0"
    return subprocess.Popen([sys.executable, "-m", "selfplay.cli", "run", *args], stdout=log.open("ab"),
                            stderr=subprocess.STDOUT, env=env, start_new_session=True)


def _reap(pids: set[int]) -> None:
    """End what a killed driver's Ray left behind (only processes this test started)."""
    for pid in pids:
        if alive(pid):
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass


def test_sigkill_then_resume_without_learner_then_sigterm(tmp_path):
    run = tmp_path / "run"
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(dump_config(tiny_config(run__workers=1)))
    log = tmp_path / "log.txt"

    # 1. SIGKILL of the driver mid-run.
    p = _start(["--config", str(cfg), "--out", str(run)], log)
    below: set[int] = set()
    try:
        wait_for(lambda: catalog_count(run) >= 20, 120, "20 games in the catalog")
        below = descendants(p.pid)
        os.kill(p.pid, signal.SIGKILL)
        p.wait(timeout=30)
        # Every process of the killed driver's Ray goes (the reaper ends what Ray itself leaves)
        wait_for(lambda: not [pid for pid in below if alive(pid)], 30, "the killed driver's Ray processes to exit")
    finally:
        _reap(below)
    killed = check_run_consistent(run)
    assert killed["games"] >= 20

    # 2. --resume on the same directory, generation only; a snapshot published by "the user's own
    #    trainer" reaches the workers; then SIGTERM stops cleanly with every finished game stored.
    p = _start(["--out", str(run), "--resume", "--no-learner"], log)
    below = set()
    try:
        wait_for(lambda: catalog_count(run) > killed["games"], 120, "the resumed run to store games")
        newest = max(r["version"] for r in metric_rows(run, "snapshots"))
        weights = run / "snapshots" / f"{newest:06d}.safetensors"
        pub = subprocess.run([sys.executable, "-m", "selfplay.cli", "publish", str(run), str(weights)],
                             capture_output=True, text=True, timeout=60)
        assert pub.returncode == 0, pub.stderr
        wait_for(lambda: any(r["snapshot_version"] > newest for r in metric_rows(run, "worker")), 60,
                 "a worker to play the published snapshot")
        below = descendants(p.pid)
        p.send_signal(signal.SIGTERM)
        assert p.wait(timeout=60) == 0, log.read_text()[-3000:]
        wait_for(lambda: not [pid for pid in below if alive(pid)], 30, "the run's Ray processes to exit")
    finally:
        if p.poll() is None:
            p.kill()
        _reap(below)
    text = log.read_text()
    assert "SIGTERM: stopping after the games in flight" in text and "stopped: terminated" in text
    assert "learner off" in text
    assert "took over the lock of pid" in text  # the killed driver's lock
    # a quiet start: no warning or error line from Ray (seen before: its token-authentication
    # notice, and actor constructor arguments that a restart could not recover)
    assert not [ln for ln in text.splitlines() if "WARNING" in ln or " ERROR " in ln or "Error" in ln], text[-3000:]
    runs = metric_rows(run, "run")
    assert [r["event"] for r in runs if r["event"] != "heartbeat"] == ["start", "start", "stop"]  # killed: no stop
    assert runs[-1]["stop_reason"] == "terminated" and {r["mode"] for r in runs if r["event"] == "start"} == {"ray"}
    final = check_run_consistent(run, buffer_restarted=True)  # the resumed run has a new buffer
    assert final["games"] > killed["games"]
    assert f"the run holds {final['games']:,} games" in text  # the closing summary counts what the catalog holds


def _cmd(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return ""
