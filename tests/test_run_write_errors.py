"""A run whose disk fills stops cleanly: one line naming the cause, stop reason "error: ...", and
every game the store accepted is there afterwards, exactly once (docs/reliability.md).

Real processes on a real full file system (a small tmpfs, mounted here; skipped with a message
where this user cannot mount one)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from cluster_support import catalog_ids, metric_rows, tiny_config
from selfplay.config import dump_config

REPO = str(Path(__file__).resolve().parent.parent)

pytestmark = pytest.mark.slow


@pytest.fixture()
def small_disk(tmp_path):
    """A 3 MiB tmpfs (needs CAP_SYS_ADMIN; skipped with a message otherwise)."""
    mnt = tmp_path / "disk"
    mnt.mkdir()
    res = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=3m", "tmpfs", str(mnt)], capture_output=True, text=True)
    if res.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here ({res.stderr.strip()}); run as root to test a full disk")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], check=False)


def _fill_leaving(disk: Path, free_bytes: int) -> Path:
    """A file that takes all but ``free_bytes`` of the disk (what a user deletes afterwards)."""
    st = os.statvfs(disk)
    filler = disk / "filler.bin"
    filler.write_bytes(b"\0" * max(0, st.f_bavail * st.f_frsize - free_bytes))
    return filler


def _selfplay(*args: str, timeout: float = 300) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": REPO, "RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER": "0"}
    env.pop("RAY_ADDRESS", None)
    return subprocess.run([sys.executable, "-m", "selfplay.cli", *args], capture_output=True, text=True,
                          timeout=timeout, env=env)


def _check_nothing_accepted_was_lost(run: Path, filler: Path) -> int:
    """After the stop: every game the catalog or the buffer's lines counted is in a shard once."""
    counted = catalog_ids(run)
    logged = max((int(r["games_total"]) for r in metric_rows(run, "buffer")), default=0)
    filler.unlink()  # space again
    verify = _selfplay("verify", str(run), "--json")
    assert verify.returncode == 0, verify.stderr
    found = json.loads(verify.stdout)
    assert found["shards_quarantined"] == [] and found["games_lost"] == 0
    ids = catalog_ids(run)
    assert len(ids) == len(set(ids))
    assert set(counted) <= set(ids) and len(ids) >= logged
    from selfplay.replay.reader import RunReader

    on_disk = [r.game_id for r in RunReader(run, on_corrupt="raise").records()]
    assert sorted(on_disk) == sorted(ids)
    return len(ids)


def test_in_process_run_on_a_full_disk_stops_with_one_line_and_keeps_every_game(small_disk, tmp_path):
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(dump_config(tiny_config(run__learner=False, replay__shard_max_age_seconds=600.0)))
    run = small_disk / "run"
    filler = _fill_leaving(small_disk, 700 * 1024)
    proc = _selfplay("run", "--in-process", "--config", str(cfg), "--out", str(run), "--minutes", "4")
    assert proc.returncode == 2, proc.stderr[-2000:]
    assert "Traceback" not in proc.stderr, proc.stderr[-2000:]
    errors = [ln for ln in proc.stderr.splitlines() if ln.startswith("selfplay run: error:")]
    assert len(errors) == 1 and "disk is full" in errors[0] and "kept" in errors[0], proc.stderr[-2000:]
    assert "record store of" not in errors[0]  # the first failure is named, not the refusals after it
    stops = [r for r in metric_rows(run, "run") if r.get("event") == "stop"]
    assert stops and stops[-1]["stop_reason"] == "error: " + errors[0].removeprefix("selfplay run: error: "), stops
    assert _check_nothing_accepted_was_lost(run, filler) > 0


@pytest.mark.ray
def test_ray_run_on_a_full_disk_stops_with_one_line_and_keeps_every_game(small_disk, tmp_path):
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(dump_config(tiny_config(run__learner=False, replay__shard_max_age_seconds=600.0)))
    run = small_disk / "run"
    filler = _fill_leaving(small_disk, 700 * 1024)
    proc = _selfplay("run", "--config", str(cfg), "--out", str(run), "--workers", "1", "--minutes", "4")
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert "Traceback" not in proc.stderr, proc.stderr[-3000:]
    errors = [ln for ln in proc.stderr.splitlines() if ln.startswith("selfplay run: error:")]
    assert len(errors) == 1 and "disk is full" in errors[0] and "kept" in errors[0], proc.stderr[-3000:]
    assert "record store of" not in errors[0]  # the first failure is named, not the refusals after it
    stops = [r for r in metric_rows(run, "run") if r.get("event") == "stop"]
    assert stops and stops[-1]["stop_reason"] == "error: " + errors[0].removeprefix("selfplay run: error: ")
    assert _check_nothing_accepted_was_lost(run, filler) > 0


def test_in_process_run_with_its_learner_on_a_full_disk_stops_with_one_line(small_disk, tmp_path):
    """With the learner on, a snapshot, a checkpoint or the journal may be the first write to fail:
    whichever it is, one line, stop reason "error: ...", nothing accepted lost."""
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(dump_config(tiny_config(replay__shard_max_age_seconds=600.0)))
    run = small_disk / "run"
    filler = _fill_leaving(small_disk, 400 * 1024)
    proc = _selfplay("run", "--in-process", "--config", str(cfg), "--out", str(run), "--minutes", "4")
    assert proc.returncode == 2, proc.stderr[-2000:]
    assert "Traceback" not in proc.stderr, proc.stderr[-2000:]
    errors = [ln for ln in proc.stderr.splitlines() if ln.startswith("selfplay run: error:")]
    assert len(errors) == 1 and "disk is full" in errors[0] and "kept" in errors[0], proc.stderr[-2000:]
    assert "journal" in errors[0] or str(run) in errors[0]  # it names what could not be written
    stops = [r for r in metric_rows(run, "run") if r.get("event") == "stop"]
    assert stops and stops[-1]["stop_reason"] == "error: " + errors[0].removeprefix("selfplay run: error: ")
    assert _check_nothing_accepted_was_lost(run, filler) > 0
