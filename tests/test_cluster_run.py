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
        # Ray's processes share the driver's fate (the kernel kills them with it); the buffer's
        # writer lock must be free before the run can be resumed.
        wait_for(lambda: not any(alive(pid) and "BufferActor" in _cmd(pid) for pid in below), 30,
                 "the killed driver's buffer to exit")
    finally:
        _reap(below)
    killed = check_run_consistent(run)
    assert killed["games"] >= 20

    # 2. --resume on the same directory, generation only; a snapshot published by "the user's own
    #    trainer" reaches the workers; then SIGTERM stops cleanly with every finished game stored.
    p = _start(["--out", str(run), "--resume", "--no-learner"], log)
    try:
        wait_for(lambda: catalog_count(run) > killed["games"], 120, "the resumed run to store games")
        newest = max(r["version"] for r in metric_rows(run, "snapshots"))
        weights = run / "snapshots" / f"{newest:06d}.safetensors"
        pub = subprocess.run([sys.executable, "-m", "selfplay.cli", "publish", str(run), str(weights)],
                             capture_output=True, text=True, timeout=60)
        assert pub.returncode == 0, pub.stderr
        wait_for(lambda: any(r["snapshot_version"] > newest for r in metric_rows(run, "worker")), 60,
                 "a worker to play the published snapshot")
        p.send_signal(signal.SIGTERM)
        assert p.wait(timeout=60) == 0, log.read_text()[-3000:]
    finally:
        if p.poll() is None:
            p.kill()
    text = log.read_text()
    assert "SIGTERM: stopping after the games in flight" in text and "stop requested" in text
    assert "learner off" in text
    final = check_run_consistent(run, buffer_restarted=True)  # the resumed run has a new buffer
    assert final["games"] > killed["games"]
    last_status = [ln for ln in text.splitlines() if " · games " in ln][-1]
    assert f"games {final['games']:,} " in last_status  # the driver's last count is what the catalog holds


def _cmd(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return ""
