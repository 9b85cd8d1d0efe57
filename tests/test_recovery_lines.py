"""What a store's recovery did is shown when a run starts: printed, and written into the buffer's
metric line (``event: "recovery"``), on both run paths. The run here resumes a directory left as a
killed writer leaves it: an unsealed journal with a torn last append, and a stale temporary file."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from cluster_support import catalog_ids, metric_rows, tiny_config
from selfplay.config import dump_config
from selfplay.games.registry import make_game
from selfplay.metrics_schema import line_problems
from selfplay.replay import synthetic
from selfplay.replay.store import RecordStore

REPO = str(Path(__file__).resolve().parent.parent)


def _selfplay(*args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": REPO, "RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER": "0"}
    env.pop("RAY_ADDRESS", None)
    return subprocess.run([sys.executable, "-m", "selfplay.cli", *args], capture_output=True, text=True,
                          timeout=300, env=env)


def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def _left_by_a_killed_writer(run: Path, games: int) -> tuple[str, list[str]]:
    """Games in an unsealed journal of writer ``buffer0`` whose last append was torn, and a stale
    temporary file: what SIGKILL of a run leaves. Returns the journal's name and the game ids."""
    config = tiny_config()
    game = make_game(config.game.name, **config.game.options)
    rng = np.random.default_rng(3)
    recs = [synthetic.random_record(game, rng, f"killed-{i}", game_name=config.game.name,
                                    game_options=dict(config.game.options)) for i in range(games)]
    store = RecordStore(run, writer="buffer0", max_age_seconds=600)
    store.ingest(recs)
    journal = store._journal.path
    os.close(store._journal.fd)  # the process dies: nothing sealed, the lock released
    store.catalog.close()
    os.close(store._lock_fd)
    with open(journal, "ab") as f:
        f.write(b"\x00\x01\x02" * 7)  # half of a frame that was being appended
    stale = run / f".run.toml.tmp-{_dead_pid()}"
    stale.write_bytes(b"x")
    old = time.time() - 3600
    os.utime(stale, (old, old))
    return journal.name, [r.game_id for r in recs]


def _check(run: Path, stderr: str, journal: str, killed_ids: list[str]) -> None:
    printed = [ln for ln in stderr.splitlines() if ln.startswith("buffer0 recovered the run: ")]
    assert f"buffer0 recovered the run: replayed journal {journal} (cut a torn tail of 21 bytes)" in printed, stderr
    assert "buffer0 recovered the run: removed 1 stale temporary file(s)" in printed, stderr
    rows = [r for r in metric_rows(run, "buffer") if r.get("event") == "recovery"]
    assert len(rows) == 1 and rows[0]["source"] == "buffer0"
    assert f"replayed journal {journal} (cut a torn tail of 21 bytes)" in rows[0]["recovery"]
    assert "removed 1 stale temporary file(s)" in rows[0]["recovery"]
    assert line_problems(rows[0]) == []
    assert rows[0]["games_total"] >= len(killed_ids)
    assert set(killed_ids) <= set(catalog_ids(run))


@pytest.mark.slow
def test_in_process_run_shows_what_recovery_did(tmp_path):
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(dump_config(tiny_config(run__learner=False)))
    run = tmp_path / "run"
    first = _selfplay("run", "--in-process", "--config", str(cfg), "--out", str(run), "--games", "10")
    assert first.returncode == 0, first.stderr[-2000:]
    assert "recovered the run" not in first.stderr  # a new run: nothing to recover
    journal, ids = _left_by_a_killed_writer(run, 5)
    again = _selfplay("run", "--in-process", "--out", str(run), "--resume", "--games", "30")
    assert again.returncode == 0, again.stderr[-2000:]
    _check(run, again.stderr, journal, ids)


@pytest.mark.slow
@pytest.mark.ray
def test_ray_run_shows_what_recovery_did(tmp_path):
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(dump_config(tiny_config(run__learner=False, run__workers=1)))
    run = tmp_path / "run"
    first = _selfplay("run", "--in-process", "--config", str(cfg), "--out", str(run), "--games", "10")
    assert first.returncode == 0, first.stderr[-2000:]
    journal, ids = _left_by_a_killed_writer(run, 5)
    again = _selfplay("run", "--out", str(run), "--resume", "--games", "30")
    assert again.returncode == 0, again.stderr[-2000:]
    _check(run, again.stderr, journal, ids)
