"""Games-per-hour arithmetic on synthetic metrics files with known timestamps.

Expected figures are computed by hand in the comments from the step-function definition in
docs/metrics.md (a counter's value at t is its newest sample at or before t; a drop is a
restart and is folded in, as Prometheus' rate() does: common practice)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from selfplay.errors import RunDirError
from selfplay.monitor.rates import CounterSeries, window_rate_per_second
from selfplay.monitor.summary import RunMonitor, compute_summary
from selfplay.rundir import RunDir


def write_lines(run: Path, rows: list[dict]) -> None:
    with open(run / "metrics.jsonl", "a") as f:
        for r in rows:
            f.write(json.dumps(r) + "\n")


def worker(t: float, source: str, games: int, positions: int, **extra) -> dict:
    return {"t": t, "component": "worker", "source": source, "games_total": games,
            "positions_total": positions, **extra}


@pytest.fixture
def run(tmp_path: Path) -> Path:
    RunDir.create(tmp_path / "run")
    (tmp_path / "run" / "run.toml").write_text('[game]\nname = "mnk"\n')
    return tmp_path / "run"


def two_worker_rows() -> list[dict]:
    # w1 steady; w2 crashes after t=1500 and restarts its counter from 0 at t=1550
    return [
        worker(1000, "w1", 0, 0), worker(1000, "w2", 0, 0),
        worker(1200, "w2", 5, 45),
        worker(1300, "w1", 10, 90),
        worker(1500, "w2", 5, 45),
        worker(1550, "w2", 2, 18),
        worker(1600, "w1", 30, 270), worker(1600, "w2", 4, 36),
    ]


def test_counter_reset_is_folded_in() -> None:
    s = CounterSeries()
    for t, v in [(0, 0), (10, 5), (20, 2), (30, 4)]:
        s.add(t, v)
    # 5 before the restart + 4 after it = 9; one restart seen
    assert s.value_at(30) == 9
    assert s.value_at(25) == 7
    assert s.value_at(-1) == 0
    assert s.resets == 1


def test_games_per_hour_last_window_and_since_start(run: Path) -> None:
    write_lines(run, two_worker_rows())
    s = compute_summary(run)
    assert s["as_of"] == 1600 and s["started_at"] == 1000
    assert s["counts_source"] == "workers"
    # totals at 1600: w1 30, w2 5 + 4 = 9 → 39 games; positions 270 + 81 = 351
    assert s["games"] == 39 and s["positions"] == 351
    # window [1300, 1600]: w1 30-10 = 20, w2 9-5 = 4 → 24 games in 300 s = 288 per hour
    assert s["games_per_hour"] == pytest.approx(288.0)
    # since start: 39 games in 600 s = 234 per hour
    assert s["games_per_hour_since_start"] == pytest.approx(234.0)
    # positions: w1 270-90 = 180, w2 81-45 = 36 → 216 / 300 s = 0.72 per second
    assert s["positions_per_second"] == pytest.approx(0.72)
    assert s["positions_per_second_since_start"] == pytest.approx(351 / 600, abs=1e-3)
    per = {w["id"]: w for w in s["workers"]}
    # w1: 20 games / 300 s = 240/h; since its first line (t=1000): 30/600 s = 180/h
    assert per["w1"]["games_per_hour"] == pytest.approx(240.0)
    assert per["w1"]["games_per_hour_since_start"] == pytest.approx(180.0)
    # w2: 4 games / 300 s = 48/h; 9 / 600 s = 54/h; one restart
    assert per["w2"]["games_per_hour"] == pytest.approx(48.0)
    assert per["w2"]["games_per_hour_since_start"] == pytest.approx(54.0)
    assert per["w2"]["restarts"] == 1


def test_window_shorter_than_five_minutes_at_the_start(run: Path) -> None:
    write_lines(run, two_worker_rows())
    s = compute_summary(run, now=1200)
    # window clipped to [1000, 1200] = 200 s; games at 1200: w1 0, w2 5 → 5 / 200 s = 90 per hour
    assert s["games_per_hour"] == pytest.approx(90.0)
    assert s["games"] == 5


def test_buffer_counts_take_precedence_over_workers(run: Path) -> None:
    write_lines(run, two_worker_rows() + [
        {"t": 1000, "component": "buffer", "source": "buffer", "games_total": 0, "positions_total": 0,
         "window_positions": 0, "window_capacity": 1000},
        {"t": 1310, "component": "buffer", "source": "buffer", "games_total": 12, "positions_total": 108,
         "window_positions": 108, "window_capacity": 1000},
        {"t": 1590, "component": "buffer", "source": "buffer", "games_total": 36, "positions_total": 324,
         "window_positions": 324, "window_capacity": 1000, "duplicates_total": 1},
    ])
    s = compute_summary(run)
    assert s["counts_source"] == "buffer" and s["rates_source"] == "buffer"
    assert s["games"] == 36 and s["positions"] == 324
    # window [1300, 1600]: value_at(1300) = 0 (the 1310 sample is later), value_at(1600) = 36
    assert s["games_per_hour"] == pytest.approx(36 / 300 * 3600)
    assert s["buffer"]["fill"] == pytest.approx(0.324)
    assert s["buffer"]["duplicates"] == 1
    assert s["counts"]["workers"]["games"] == 39


def test_snapshot_lag_and_data_age(run: Path) -> None:
    rows = two_worker_rows()
    rows[-2]["snapshot_version"] = 3  # w1 at 1600
    rows[-1]["snapshot_version"] = 1  # w2 at 1600
    rows += [{"t": 900, "component": "snapshots", "source": "store", "version": 1, "published_at": 900.0},
             {"t": 1400, "component": "snapshots", "source": "store", "version": 3, "published_at": 1400.0}]
    write_lines(run, rows)
    s = compute_summary(run)
    assert s["latest_snapshot"]["version"] == 3
    assert s["latest_snapshot"]["age_seconds"] == pytest.approx(200.0)
    per = {w["id"]: w for w in s["workers"]}
    assert per["w1"]["snapshot_lag_versions"] == 0 and per["w1"]["data_age_seconds"] == pytest.approx(200.0)
    # w2 plays version 1, two behind version 3; published at 900 → 700 s old at 1600
    assert per["w2"]["snapshot_lag_versions"] == 2 and per["w2"]["data_age_seconds"] == pytest.approx(700.0)
    assert s["snapshot_lag_versions"] == 2 and s["data_age_seconds"] == pytest.approx(700.0)


def test_snapshot_metadata_files_are_read(run: Path) -> None:
    write_lines(run, [worker(1000, "w1", 0, 0, snapshot_version=0), worker(1100, "w1", 1, 9, snapshot_version=0)])
    (run / "snapshots" / "000000.json").write_text(json.dumps({"version": 0, "published_at": 950.0}))
    (run / "snapshots" / "000001.json").write_text(json.dumps({"version": 1, "published_at": 1050.0}))
    s = compute_summary(run)
    assert s["latest_snapshot"]["version"] == 1
    assert s["workers"][0]["snapshot_lag_versions"] == 1


def test_resignation_false_positive_rate_from_metrics(run: Path) -> None:
    # AlphaGo Zero's measure (Silver et al., Nature 2017): false positives among resign-disabled
    # games in which a player would have resigned
    write_lines(run, [worker(1000, "w1", 0, 0), worker(1100, "w1", 40, 400, resign_disabled_games_total=4,
                                                      resign_probe_triggered_total=3,
                                                      resign_false_positives_total=1)])
    r = compute_summary(run)["resignation"]
    # 1 false positive among the 3 resign-disabled games with a would-have-resigned player
    assert r["false_positive_rate"] == pytest.approx(1 / 3, abs=1e-4)
    assert r["denominator"] == "would_resign_games"


def test_incremental_refresh_reads_only_new_lines_and_skips_torn_line(run: Path) -> None:
    mon = RunMonitor(run)
    write_lines(run, [worker(1000, "w1", 0, 0)])
    with open(run / "metrics.jsonl", "a") as f:
        f.write('{"t": 1100, "component": "worker", "source": "w1", "games_tot')  # torn
    mon.refresh()
    assert mon.summary()["games"] == 0
    with open(run / "metrics.jsonl", "a") as f:
        f.write('al": 3, "positions_total": 30}\n')
    mon.refresh()
    s = mon.summary()
    assert s["games"] == 3 and s["as_of"] == 1100


def test_empty_and_missing_run_directories(run: Path, tmp_path: Path) -> None:
    s = compute_summary(run)
    assert s["empty"] is True and s["games"] == 0 and s["games_per_hour"] is None
    with pytest.raises(RunDirError, match="does not exist"):
        compute_summary(tmp_path / "nowhere")
    assert window_rate_per_second([], 1000.0, 1000.0) is None  # an empty window has no rate
    (tmp_path / "plain").mkdir()
    with pytest.raises(RunDirError, match="not a run directory"):
        compute_summary(tmp_path / "plain")


def test_garbage_metric_lines_are_counted_and_a_corrupt_catalog_is_named(run: Path) -> None:
    write_lines(run, [worker(1000, "w1", 0, 0)])
    with open(run / "metrics.jsonl", "a") as f:
        f.write("not json at all\n")
        f.write('["a list", "not an object"]\n')
        f.write(json.dumps(worker(1100, "w1", 2, 20)) + "\n")
    s = compute_summary(run)
    assert s["games"] == 2 and s["metrics_bad_lines"] == 2
    (run / "catalog.sqlite").write_bytes(b"this is not a database" * 100)
    s = compute_summary(run)  # the monitor keeps going on the metric lines and says why
    assert "catalog" in s["catalog_error"] and "not a database" in s["catalog_error"]
    assert s["counts_source"] == "workers" and s["games"] == 2


def test_buffer_shards_report_the_shared_total_not_a_share(run: Path) -> None:
    # two buffer shards each report the whole catalog's committed games plus their own waiting
    # games (100 committed; shard 0 has 3 waiting, shard 1 has 5): the total is read as the
    # largest report, never the sum (which would count the 100 twice)
    write_lines(run, [
        {"t": 1000, "component": "buffer", "source": "buffer0", "games_total": 0, "positions_total": 0},
        {"t": 1000, "component": "buffer", "source": "buffer1", "games_total": 0, "positions_total": 0},
        {"t": 1300, "component": "buffer", "source": "buffer0", "games_total": 103, "positions_total": 927,
         "window_positions": 500, "window_capacity": 1000},
        {"t": 1300, "component": "buffer", "source": "buffer1", "games_total": 105, "positions_total": 945,
         "window_positions": 450, "window_capacity": 1000},
    ])
    s = compute_summary(run)
    assert s["games"] == 105
    assert s["games_per_hour"] == pytest.approx(105 / 300 * 3600)
    assert s["buffer"]["window_positions"] == 950 and s["buffer"]["fill"] == pytest.approx(0.475)
