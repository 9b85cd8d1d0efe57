"""The Prometheus endpoint: text that prometheus_client's own parser reads back, names that follow
Prometheus' naming conventions (https://prometheus.io/docs/practices/naming/: base units in the
name, ``_total`` for counters), local-only binding and a clear error for a port in use."""

from __future__ import annotations

import json
import socket
import urllib.request
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from selfplay.errors import SelfplayError
from selfplay.monitor.prometheus import exposition_text, monitor_source, start_metrics_server
from selfplay.monitor.summary import compute_summary
from selfplay.rundir import RunDir


@pytest.fixture
def run(tmp_path: Path) -> Path:
    rd = RunDir.create(tmp_path / "run")
    rows = [
        {"t": 1000, "component": "worker", "source": "w0", "games_total": 0, "positions_total": 0,
         "evals_total": 0, "snapshot_version": 0},
        {"t": 1300, "component": "worker", "source": "w0", "games_total": 12, "positions_total": 108,
         "evals_total": 60000, "snapshot_version": 1, "games_in_flight": 16},
        {"t": 1300, "component": "worker", "source": "w1", "games_total": 6, "positions_total": 50,
         "evals_total": 30000, "snapshot_version": 0, "evals_per_second": 100.0},
        {"t": 1000, "component": "snapshots", "source": "store", "version": 0, "published_at": 990.0},
        {"t": 1200, "component": "snapshots", "source": "store", "version": 1, "published_at": 1200.0},
        {"t": 1290, "component": "learner", "source": "learner", "step": 400, "steps_per_second": 2.5,
         "loss": 1.5, "loss_policy": 1.0, "loss_value": 0.4, "loss_l2": 0.1, "reuse_ratio": 3.9},
        {"t": 1295, "component": "buffer", "source": "buffer", "games_total": 18, "positions_total": 158,
         "window_positions": 158, "window_capacity": 10000, "duplicates_total": 0, "shards_total": 2},
        {"t": 1299, "component": "eval", "source": "evaluator", "opponent": "mcts-200", "games": 40,
         "wins": 30, "draws": 4, "losses": 6, "elo": 191.0},
    ]
    with open(rd.metrics, "w") as f:
        f.writelines(json.dumps(r) + "\n" for r in rows)
    return rd.root


def samples(text: str) -> dict[tuple[str, tuple], float]:
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def test_text_parses_and_carries_the_status_figures(run: Path) -> None:
    summary = compute_summary(run)
    text = exposition_text(summary)
    got = samples(text)
    assert got[("selfplay_games_total", ())] == 18
    assert got[("selfplay_positions_total", ())] == 158
    assert got[("selfplay_games_per_hour", ())] == pytest.approx(summary["games_per_hour"])
    assert got[("selfplay_learner_steps_total", ())] == 400
    assert got[("selfplay_learner_loss", (("part", "value"),))] == pytest.approx(0.4)
    assert got[("selfplay_snapshot_lag_versions", ())] == 1
    # w1 plays version 0 published at 990; as of 1300 that is 310 s old
    assert got[("selfplay_data_age_seconds", ())] == pytest.approx(310.0)
    # w0: 60000 evaluations over the 300 s window → 200 per second
    assert got[("selfplay_worker_evals_per_second", (("worker", "w0"),))] == pytest.approx(200.0)
    assert got[("selfplay_worker_snapshot_version", (("worker", "w1"),))] == 0
    assert got[("selfplay_eval_elo", (("opponent", "mcts-200"),))] == pytest.approx(191.0)
    assert got[("selfplay_buffer_fill_ratio", ())] == pytest.approx(0.0158)


def test_names_follow_prometheus_conventions(run: Path) -> None:
    fams = list(text_string_to_metric_families(exposition_text(compute_summary(run))))
    assert fams
    for fam in fams:
        assert fam.name.startswith("selfplay_")
        for s in fam.samples:
            if fam.type == "counter":
                assert s.name.endswith("_total") or s.name.endswith("_created"), s.name
            else:
                assert not s.name.endswith("_total"), s.name


def test_endpoint_serves_on_loopback_and_refreshes(run: Path) -> None:
    with start_metrics_server(0, source=monitor_source(run)) as server:
        assert server.host == "127.0.0.1"
        body = urllib.request.urlopen(server.url, timeout=5).read().decode()
        assert samples(body)[("selfplay_games_total", ())] == 18
        with open(Path(run) / "metrics.jsonl", "a") as f:
            f.write(json.dumps({"t": 1310, "component": "buffer", "source": "buffer",
                                "games_total": 20, "positions_total": 170}) + "\n")
        body = urllib.request.urlopen(server.url, timeout=5).read().decode()
        assert samples(body)[("selfplay_games_total", ())] == 20


def test_port_in_use_is_a_clear_error(run: Path) -> None:
    blocker = socket.socket()
    blocker.bind(("127.0.0.1", 0))
    blocker.listen(1)
    port = blocker.getsockname()[1]
    try:
        with pytest.raises(SelfplayError, match=f"port {port} .*already in use"):
            start_metrics_server(port, source=monitor_source(run))
    finally:
        blocker.close()


def test_unreadable_run_reports_monitor_down(tmp_path: Path) -> None:
    def failing() -> dict:
        raise SelfplayError("run directory is gone")

    with start_metrics_server(0, source=failing) as server:
        body = urllib.request.urlopen(server.url, timeout=5).read().decode()
    assert samples(body)[("selfplay_monitor_up", ())] == 0
