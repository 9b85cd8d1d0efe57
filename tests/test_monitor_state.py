"""Run state (running / stopped / crashed) from the run lines, figures of a finished run, games
the catalog never got, worker rates that add up, and hostile metric lines.

The run lines follow the contract in docs/metrics.md (section 1, component ``run``); the tests
write them themselves, next to real catalog rows written by the replay store (real SQLite)."""

from __future__ import annotations

import json
import os
import pty
import select
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from selfplay.cli import main
from selfplay.games.registry import make_game
from selfplay.monitor.lifecycle import STALE_SECONDS
from selfplay.monitor.lines import line_problem
from selfplay.monitor.prometheus import exposition_text
from selfplay.monitor.summary import RunMonitor, compute_summary
from selfplay.monitor.watch import render_summary
from selfplay.replay.store import RecordStore
from selfplay.replay.synthetic import random_record
from selfplay.rundir import RunDir


def write_lines(run: Path, rows: list[dict]) -> None:
    with open(run / "metrics.jsonl", "a") as f:
        for r in rows:
            f.write(json.dumps(r) + "\n")


def run_line(t: float, event: str, **extra) -> dict:
    return {"t": t, "component": "run", "source": "driver", "event": event, **extra}


def worker(t: float, source: str, games: int, positions: int, **extra) -> dict:
    return {"t": t, "component": "worker", "source": source, "games_total": games,
            "positions_total": positions, **extra}


def frame_text(s: dict) -> str:
    from rich.console import Console

    con = Console(width=140, record=True, file=open(os.devnull, "w"))
    con.print(render_summary(s))
    return con.export_text()


@pytest.fixture
def run(tmp_path: Path) -> Path:
    RunDir.create(tmp_path / "run")
    return tmp_path / "run"


def base_rows(t0: float) -> list[dict]:
    return [
        run_line(t0, "start", pid=123, host="here", mode="in-process"),
        worker(t0 + 5, "w0", 10, 90, snapshot_version=0, games_in_flight=8),
        worker(t0 + 10, "w0", 20, 180, snapshot_version=0, games_in_flight=8),
        run_line(t0 + 10, "heartbeat"),
        {"t": t0, "component": "snapshots", "source": "store", "version": 0, "published_at": t0},
    ]


def test_running_run(run: Path) -> None:
    t0 = time.time() - 20
    write_lines(run, base_rows(t0))
    s = compute_summary(run)
    assert (s["state"], s["stop_reason"], s["mode"]) == ("running", None, "in-process")
    assert s["active_workers"] == 1 and s["workers_at_stop"] is None
    text = frame_text(s)
    assert "running" in text and "active workers" in text and "ago" in text


def test_stopped_run_reads_at_stop(run: Path, capsys: pytest.CaptureFixture[str]) -> None:
    t0 = time.time() - 3600  # stopped an hour ago: nothing may read as live
    write_lines(run, base_rows(t0) + [
        worker(t0 + 12, "w0", 24, 216, snapshot_version=0, games_in_flight=0, final=True),
        run_line(t0 + 12.5, "stop", stop_reason="games reached"),
    ])
    assert main(["status", str(run), "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert (s["state"], s["stop_reason"]) == ("stopped", "games reached")
    assert s["stopped_at"] == pytest.approx(t0 + 12.5)
    # nothing is active in a stopped run; the worker reported until the stop
    assert s["active_workers"] == 0 and s["workers_at_stop"] == 1
    assert s["workers"][0]["active"] is False and s["workers"][0]["final"] is True
    text = frame_text(s)
    assert "stopped (games reached)" in text and "at stop" in text
    assert "active workers" not in text and " ago" not in text.split("\n", 3)[3]
    assert "before stop" in text  # the snapshot was published 12.5 s before the stop
    prom = exposition_text(s)
    assert 'selfplay_run_state{state="stopped"} 1.0' in prom and "selfplay_run_up 0.0" in prom


def test_crashed_run_has_no_stop_line_and_no_heartbeat(run: Path) -> None:
    t0 = time.time() - 600
    write_lines(run, base_rows(t0))
    s = compute_summary(run)
    assert s["state"] == "crashed" and s["stop_reason"] is None
    assert s["stopped_at"] == pytest.approx(t0 + 10)  # last sign of life
    assert "crashed" in frame_text(s)
    assert 'selfplay_run_state{state="crashed"} 1.0' in exposition_text(s)


def test_state_boundary_is_thirty_seconds_of_silence(run: Path) -> None:
    t0 = time.time() - 1000
    write_lines(run, base_rows(t0))  # newest line at t0 + 10
    mon = RunMonitor(run)
    mon.refresh()
    assert mon.summary(wall_now=t0 + 10 + STALE_SECONDS - 1)["state"] == "running"
    assert mon.summary(wall_now=t0 + 10 + STALE_SECONDS + 1)["state"] == "crashed"


def test_a_killed_driver_on_this_host_reads_as_crashed_without_waiting_for_silence(run: Path) -> None:
    """A start line naming this host and a process that has exited: crashed at once, though the
    run wrote 2 s ago; the same lines naming a live process (this one) or another host: running
    until the silence rule decides."""
    import socket

    gone = subprocess.Popen([sys.executable, "-c", "pass"])
    gone.wait()
    t0 = time.time() - 12
    rows = base_rows(t0)
    rows[0] = run_line(t0, "start", pid=gone.pid, host=socket.gethostname(), mode="ray")
    write_lines(run, rows)
    s = compute_summary(run)
    assert s["state"] == "crashed" and s["stopped_at"] == pytest.approx(t0 + 10)
    for pid, host in ((os.getpid(), socket.gethostname()), (gone.pid, "another-host")):
        other = run.parent / f"run-{pid}-{host}"
        RunDir.create(other)
        rows[0] = run_line(t0, "start", pid=pid, host=host, mode="ray")
        write_lines(other, rows)
        assert compute_summary(other)["state"] == "running"


def test_a_resumed_run_is_running_again_after_its_stop(run: Path) -> None:
    t0 = time.time() - 100
    write_lines(run, base_rows(t0) + [run_line(t0 + 20, "stop", stop_reason="interrupted"),
                                      run_line(t0 + 90, "start", pid=9, host="here", mode="ray"),
                                      run_line(t0 + 95, "heartbeat")])
    s = compute_summary(run)
    assert (s["state"], s["mode"]) == ("running", "ray")


def test_runs_without_run_lines_are_judged_by_freshness(run: Path) -> None:
    t0 = time.time()
    write_lines(run, [worker(t0 - 5, "w0", 3, 27)])
    assert compute_summary(run)["state"] == "running"
    old = run.parent / "old"
    RunDir.create(old)
    write_lines(old, [worker(t0 - 500, "w0", 3, 27)])
    s = compute_summary(old)
    assert (s["state"], s["state_basis"], s["stop_reason"]) == ("stopped", "freshness", None)
    assert "no run lines" in frame_text(s)


def store_games(root: Path, n: int, t0: float, worker_id: str = "w0", first: int = 0) -> list:
    game = make_game("mnk")
    rng = np.random.default_rng(first)
    recs = [random_record(game, rng, f"{worker_id}-{first + i}", game_name="mnk", game_options={},
                          worker_id=worker_id, started_at=t0 + i, finished_at=t0 + i + 1) for i in range(n)]
    with RecordStore(root, writer="buffer0") as store:
        store.add_games(recs)
        store.flush()
    return recs


def buffer(t: float, games: int, positions: int) -> dict:
    return {"t": t, "component": "buffer", "source": "buffer0", "games_total": games, "positions_total": positions}


def test_games_the_catalog_lacks_are_waiting_only_while_running(run: Path) -> None:
    now = time.time()
    recs = store_games(run, 10, now - 15)
    pos = sum(r.num_positions for r in recs)
    # the buffer reported 13 games; the catalog holds 10
    write_lines(run, [run_line(now - 20, "start", pid=1, host="h", mode="ray"),
                      buffer(now - 2, 13, pos + 27), run_line(now - 1, "heartbeat")])
    s = compute_summary(run)
    assert s["counts_source"] == "catalog" and s["games"] == 10
    assert (s["pending_games"], s["unstored_games"]) == (3, None)
    assert "not yet in the catalog" in frame_text(s)
    # the same run after a crash: the 3 are not waiting for anything any more
    mon = RunMonitor(run)
    mon.refresh()
    crashed = mon.summary(wall_now=now + 300)
    assert crashed["state"] == "crashed"
    assert (crashed["pending_games"], crashed["unstored_games"]) == (None, 3)
    text = frame_text(crashed)
    assert "waiting" not in text and "never stored" in text
    assert "selfplay_unstored_games 3.0" in exposition_text(crashed)


def test_a_stopped_runs_buffer_and_learner_figures_are_what_it_stored(run: Path) -> None:
    now = time.time() - 1000
    recs = store_games(run, 6, now)
    pos = sum(r.num_positions for r in recs)
    (run / "snapshots" / "000002.json").write_text(json.dumps(
        {"version": 2, "published_at": now + 9, "training_steps": 50, "samples_seen": 6400}))
    write_lines(run, [run_line(now, "start", pid=1, host="h", mode="ray"),
                      buffer(now + 3, 4, pos - 10),  # last periodic line, before the last games
                      {"t": now + 4, "component": "learner", "source": "learner", "step": 40,
                       "samples_trained_total": 5120, "loss": 1.0},
                      run_line(now + 10, "stop", stop_reason="positions reached")])
    s = compute_summary(run)
    assert s["state"] == "stopped"
    assert (s["buffer"]["games"], s["buffer"]["positions"]) == (6, pos)  # the catalog's
    assert s["learner"]["step"] == 50 and s["learner"]["samples_trained"] == 6400  # the final snapshot's


def test_worker_rates_over_their_own_lives_add_up_to_the_run(run: Path) -> None:
    # two workers, each finishing one game every 2 s from t0; each reports only every 20 s, so
    # its first line (t0 + 20, 10 games already) is far later than its start. Worker w1 joins
    # 100 s later. Reference: games / seconds each worker lived, by hand.
    t0 = time.time() - 400
    for wid, start in (("w0", t0), ("w1", t0 + 100)):
        game = make_game("mnk")
        rng = np.random.default_rng(1)
        recs = [random_record(game, rng, f"{wid}-{i}", game_name="mnk", game_options={}, worker_id=wid,
                              started_at=start + 2 * i, finished_at=start + 2 * i + 2) for i in range(150)]
        recs = [r for r in recs if r.finished_at <= t0 + 300]
        with RecordStore(run, writer=f"b{wid}") as store:
            store.add_games(recs)
        rows = [worker(start + k, wid, k // 2, 9 * (k // 2)) for k in range(20, int(t0 + 300 - start) + 1, 20)]
        write_lines(run, rows)
    s = compute_summary(run)
    per = {w["id"]: w for w in s["workers"]}
    # each worker: 1 game per 2 s = 1800 per hour, over its own life
    assert per["w0"]["games_per_hour_since_start"] == pytest.approx(1800, rel=0.02)
    assert per["w1"]["games_per_hour_since_start"] == pytest.approx(1800, rel=0.02)
    assert per["w0"]["started_at"] == pytest.approx(t0) and per["w1"]["started_at"] == pytest.approx(t0 + 100)
    # the last 5 minutes (the whole run here): w0 150 games, w1 100 → 250 in 300 s = 3000 per
    # hour; the workers' rates over the same window sum to it
    assert s["games_per_hour"] == pytest.approx(3000, rel=0.01)
    assert per["w0"]["games_per_hour"] + per["w1"]["games_per_hour"] == pytest.approx(s["games_per_hour"], rel=0.1)


@pytest.mark.parametrize("line, why", [
    ({"t": 9e18, "component": "worker", "source": "w0", "games_total": 5}, "'t'"),
    ({"t": float("nan"), "component": "worker"}, "'t'"),
    ({"t": -5, "component": "worker"}, "'t'"),
    ({"t": 1000, "component": "worker", "games_total": float("inf")}, "games_total"),
    ({"t": 1000, "component": "worker", "games_total": 10 ** 30}, "games_total"),
    ({"t": 1000, "component": 7}, "component"),
    ({"t": 1000, "component": "worker", "source": ["w"]}, "source"),
    ([1, 2], "object"),
])
def test_line_problems_are_named(line, why) -> None:
    assert why in line_problem(line, wall_now=2_000_000_000.0)


def test_hostile_metric_lines_are_skipped_and_counted(run: Path, capsys: pytest.CaptureFixture[str]) -> None:
    t0 = time.time() - 20
    write_lines(run, base_rows(t0))
    with open(run / "metrics.jsonl", "a") as f:
        f.write('{"t": 9e18, "component": "worker", "source": "w0", "games_total": 99}\n')
        f.write('{"t": 1e400, "component": "worker", "source": "w0"}\n')  # parses as infinity
        f.write('{"t": %f, "component": "worker", "source": "w0", "games_total": NaN}\n' % t0)
        f.write('{"t": %f, "component": "snapshots", "version": 5, "published_at": 9e18}\n' % (t0 + 1))
    assert main(["status", str(run)]) == 0  # used to crash on the first line
    out = capsys.readouterr().out
    assert "3 malformed line(s)" in out
    s = compute_summary(run)
    assert s["metrics_bad_lines"] == 3 and s["games"] == 20
    assert s["as_of"] < time.time() + 1
    assert main(["watch", str(run), "--once"]) == 0


def test_watch_quits_on_q_in_a_terminal(run: Path) -> None:
    # a real pseudo-terminal (POSIX pty): the watch redraws until q is typed
    write_lines(run, base_rows(time.time() - 20))
    leader, follower = pty.openpty()
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1]), "COLUMNS": "120", "LINES": "60"}
    proc = subprocess.Popen([sys.executable, "-m", "selfplay.cli", "watch", str(run), "--interval", "0.5"],
                            stdin=follower, stdout=follower, stderr=follower, env=env, close_fds=True)
    os.close(follower)
    seen = b""
    try:
        deadline = time.monotonic() + 60
        while b"selfplay status" not in seen and time.monotonic() < deadline:
            if select.select([leader], [], [], 0.5)[0]:
                seen += os.read(leader, 65536)
        assert b"selfplay status" in seen, seen[-500:]
        os.write(leader, b"q")
        rc = proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
        os.close(leader)
    assert rc == 0


def test_loss_row_adds_up_with_area_heads() -> None:
    """The status's loss line is a sum that holds: with the ownership and score heads training,
    the weighted area terms are shown as what the total has beyond policy + value + l2, and the
    unweighted parts get a row of their own (no run shows a sum that does not add up)."""
    from selfplay.monitor.watch import _loss_row

    plain = _loss_row({"loss": 4.0, "loss_policy": 3.0, "loss_value": 0.9, "loss_l2": 0.1})
    assert plain == ("loss = policy + value + l2", "4 = 3 + 0.9 + 0.1")
    label, text = _loss_row({"loss": 5.11, "loss_policy": 3.56, "loss_value": 0.627, "loss_l2": 0.101,
                             "loss_ownership": 0.535, "loss_score": 0.0174})
    assert label == "loss = policy + value + l2 + area"
    total, parts = text.split(" = ")
    assert abs(sum(float(p) for p in parts.split(" + ")) - float(total)) < 0.01
