"""Live pieces: ``status`` and ``watch`` commands (also through a pipe, not a terminal) and the
stop-condition progress bar's ETA arithmetic."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import pytest
from rich.console import Console

from selfplay.cli import main
from selfplay.errors import ConfigError
from selfplay.monitor.progress import StopProgress
from selfplay.monitor.watch import watch_run
from selfplay.rundir import RunDir


@pytest.fixture
def run(tmp_path: Path) -> Path:
    rd = RunDir.create(tmp_path / "run")
    rows = [
        {"t": 1000, "component": "worker", "source": "w0", "games_total": 0, "positions_total": 0,
         "snapshot_version": 0, "evals_per_second": 150.0},
        {"t": 1360, "component": "worker", "source": "w0", "games_total": 10, "positions_total": 90,
         "snapshot_version": 0, "evals_per_second": 150.0, "games_in_flight": 8},
        {"t": 1000, "component": "snapshots", "source": "store", "version": 0, "published_at": 1000.0},
    ]
    with open(rd.metrics, "w") as f:
        f.writelines(json.dumps(r) + "\n" for r in rows)
    return rd.root


class FakeClock:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t


def test_progress_eta_is_the_first_condition_met() -> None:
    # ETA = what is left / the rate seen so far, the run stopping at the first condition met
    # (common practice); figures computed by hand below
    clock, out = FakeClock(), io.StringIO()
    bar = StopProgress(games=100, minutes=1, console=Console(file=out, width=120), clock=clock,
                       plain_every=0)
    bar.start()
    clock.t = 10.0
    bar.update(games=20)
    # 20 games in 10 s = 2 per second → 80 left take 40 s; the minute has 50 s left → ETA 40 s
    assert bar.eta_seconds() == pytest.approx(40.0)
    clock.t = 40.0
    bar.update(games=50)
    # 50 games in 40 s = 1.25/s → 50 left take 40 s; time left 20 s → ETA 20 s
    assert bar.eta_seconds() == pytest.approx(20.0)
    assert not bar.finished()
    clock.t = 61.0
    assert bar.finished()
    bar.close()
    text = out.getvalue()
    assert "games 50/100 (50.0%)" in text and "ETA" in text


def test_progress_counts_from_a_resumed_run() -> None:
    clock = FakeClock()
    bar = StopProgress(positions=10_000, initial_positions=4_000, console=Console(file=io.StringIO()),
                       clock=clock)
    bar.start()
    clock.t = 100.0
    bar.update(positions=5_000)
    # 1,000 new positions in 100 s → 5,000 left take 500 s
    assert bar.eta_seconds() == pytest.approx(500.0)
    bar.close()


def test_progress_draws_rich_bars_in_a_terminal() -> None:
    out = io.StringIO()
    clock = FakeClock()
    with StopProgress(games=10, console=Console(file=out, force_terminal=True, width=100), clock=clock) as bar:
        clock.t = 5.0
        bar.update(games=5)
    assert "games" in out.getvalue()


def test_progress_refuses_bad_targets() -> None:
    with pytest.raises(ConfigError, match="--games"):
        StopProgress(games=0)
    with pytest.raises(ConfigError, match="--minutes"):
        StopProgress(minutes=-1)


def test_watch_once_through_a_pipe(run: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "selfplay.cli", "watch", str(run), "--once"],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert "games" in proc.stdout and "w0" in proc.stdout
    assert "\x1b[" not in proc.stdout  # plain text when not a terminal: no escape sequences


def test_watch_prints_successive_frames_when_not_a_terminal(run: Path) -> None:
    out = io.StringIO()
    seen = []
    frames = watch_run(run, interval=0.01, console=Console(file=out, width=100), max_frames=3,
                       on_summary=seen.append)
    assert frames == 3 and len(seen) == 3
    assert out.getvalue().count("selfplay status") == 3


def test_status_json_keys(run: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # keys promised by the issue and docs/metrics.md; rates computed by hand below
    assert main(["status", str(run), "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    for key in ("games", "positions", "games_per_hour", "positions_per_second", "latest_snapshot", "workers"):
        assert key in s
    assert s["games"] == 10
    # window [1060, 1360]: 10 games in 300 s → 120 per hour
    assert s["games_per_hour"] == pytest.approx(120.0)
    assert s["workers"][0]["evals_per_second"] == pytest.approx(150.0)
    assert s["latest_snapshot"]["version"] == 0


def test_status_of_missing_and_empty_runs(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["status", str(tmp_path / "missing")]) == 2
    assert "does not exist" in capsys.readouterr().err
    RunDir.create(tmp_path / "fresh")
    assert main(["status", str(tmp_path / "fresh")]) == 0
    assert "no data yet" in capsys.readouterr().out
    assert main(["watch", str(tmp_path / "fresh"), "--interval", "0"]) == 2
    assert "--interval" in capsys.readouterr().err


def _free_port() -> int:
    import socket
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def test_watch_serves_prometheus_standalone_until_interrupted(run: Path) -> None:
    import signal
    import time
    import urllib.error
    import urllib.request

    from prometheus_client.parser import text_string_to_metric_families

    port = _free_port()
    # Ctrl-C as from a terminal: a shell without job control starts background jobs with SIGINT
    # ignored, and a child inherits that (Python then never raises KeyboardInterrupt)
    proc = subprocess.Popen([sys.executable, "-m", "selfplay.cli", "watch", str(run), "--once",
                             "--metrics-port", str(port)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    try:
        body = None
        for _ in range(100):
            try:
                body = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=2).read().decode()
                break
            except (urllib.error.URLError, ConnectionError):
                time.sleep(0.1)
        assert body is not None, "endpoint never answered"
        games = {s.name: s.value for f in text_string_to_metric_families(body) for s in f.samples}
        assert games["selfplay_games_total"] == 10
    finally:
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=20)
    assert proc.returncode == 0, err
    assert f"127.0.0.1:{port}" in err


def test_watch_with_a_port_in_use_is_one_clear_line(run: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import socket
    blocker = socket.socket()
    blocker.bind(("127.0.0.1", 0))
    blocker.listen(1)
    port = blocker.getsockname()[1]
    try:
        assert main(["watch", str(run), "--once", "--metrics-port", str(port)]) == 2
    finally:
        blocker.close()
    err = capsys.readouterr().err
    assert f"metrics port {port} on 127.0.0.1 is already in use" in err
