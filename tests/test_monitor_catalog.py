"""The status counters agree with the catalog: a synthetic run written by the replay store
(real shards, real SQLite), checked against plain SQL over catalog.sqlite and against
hand-computed rates from the known finish times."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pytest

from selfplay.games.registry import make_game
from selfplay.monitor.data import GameNotFoundError, find_record, newest_records
from selfplay.monitor.summary import compute_summary
from selfplay.replay.store import RecordStore
from selfplay.replay.synthetic import random_record, with_id

T0 = 1_000_000.0


def write_run(root: Path, n: int = 30) -> list:
    """n tic-tac-toe games, game i finished at T0 + 20 i (started 15 s before), two workers."""
    game = make_game("mnk")
    rng = np.random.default_rng(7)
    recs = []
    for i in range(n):
        rec = random_record(game, rng, f"g{i:03d}", game_name="mnk", game_options={},
                            worker_id=f"w{i % 2}", started_at=T0 + 20 * i - 15, finished_at=T0 + 20 * i)
        recs.append(rec)
    # resignation probes: four resign-disabled games, three with a would-have-resigned player;
    # a false positive when that player did not lose (result is from player 0's view)
    def probe(i: int, would: int, result: int) -> None:
        r = recs[i]
        outcomes = np.where(r.to_play == 0, result, -result).astype(np.int8)
        recs[i] = with_id(r, r.game_id, resign_disabled=True, resign_would_have=would, result=result,
                          outcomes=outcomes)

    probe(1, 0, 1)    # player 0 would have resigned but won: a false positive
    probe(2, 0, -1)   # player 0 would have resigned and lost: right
    probe(3, 1, 1)    # player 1 would have resigned and lost: right
    probe(4, -1, 0)   # nobody would have resigned
    with RecordStore(root, writer="main", max_games=8) as store:
        store.add_games(recs)
        store.add_games(recs[:5])  # a retried write: ignored by the catalog's unique game id
        store.flush()
    return recs


def sql(root: Path, q: str):
    con = sqlite3.connect(root / "catalog.sqlite")
    try:
        return con.execute(q).fetchone()
    finally:
        con.close()


def test_counts_agree_with_the_catalog(tmp_path: Path) -> None:
    # reference: plain SQL over catalog.sqlite (SQLite's own count and sum)
    root = tmp_path / "run"
    recs = write_run(root)
    with RecordStore(root, writer="main") as store:  # reopened: the buffer line of its counts
        store.log_metrics(window_positions=100, window_capacity=1000)
    s = compute_summary(root)
    games, positions = sql(root, "SELECT count(*), sum(positions) FROM games")
    assert s["counts_source"] == "catalog"
    assert s["games"] == games == len(recs)
    assert s["positions"] == positions == sum(r.num_positions for r in recs)
    assert s["counts"]["catalog"]["shards"] == sql(root, "SELECT count(*) FROM shards")[0]
    # the buffer line the store wrote agrees with the catalog as well; nothing is waiting
    assert s["counts"]["buffer"]["games"] == games and s["pending_games"] == 0
    assert s["buffer"]["duplicates"] == 5


def test_rates_from_catalog_finish_times(tmp_path: Path) -> None:
    root = tmp_path / "run"
    recs = write_run(root)
    now = T0 + 20 * 29  # the last game's finish
    s = compute_summary(root, now=now)
    # run start = first started_at = T0 - 15. Window (now - 300, now]: games finished at
    # T0 + 20 i for i = 15..29 (i = 14 sits exactly on the window's start, counted before it) → 15
    assert s["started_at"] == pytest.approx(T0 - 15)
    assert s["games_per_hour"] == pytest.approx(15 / 300 * 3600)
    # since start: 30 games in 580 + 15 = 595 s
    assert s["games_per_hour_since_start"] == pytest.approx(30 / 595 * 3600, rel=1e-4)
    pos_recent = sum(r.num_positions for r in recs[15:])
    assert s["positions_per_second"] == pytest.approx(pos_recent / 300, abs=1e-3)


def test_resignation_false_positives_from_the_catalog(tmp_path: Path) -> None:
    # the false-positive measure of AlphaGo Zero (Silver et al., Nature 2017): among games played
    # with resignation disabled, those the would-have-resigned player did not lose
    root = tmp_path / "run"
    write_run(root)
    r = compute_summary(root)["resignation"]
    assert r["from"] == "catalog"
    assert (r["disabled_games"], r["would_resign_games"], r["false_positives"]) == (4, 3, 1)
    assert r["false_positive_rate"] == pytest.approx(1 / 3, abs=1e-4)


def test_records_are_read_back_from_the_shards(tmp_path: Path) -> None:
    root = tmp_path / "run"
    recs = write_run(root)
    rec = find_record(root, "g017")
    assert np.array_equal(rec.actions, recs[17].actions)
    assert np.allclose(rec.root_values, recs[17].root_values)
    assert len(newest_records(root, max_games=10)) == 10
    with pytest.raises(GameNotFoundError, match="'nope' is not in the catalog"):
        find_record(root, "nope")


def test_a_real_local_run_agrees_with_its_catalog(tmp_path: Path) -> None:
    """Self-play through the one-process loop (real worker, search, record store), then the
    status read back from the run directory against plain SQL over its catalog and the
    worker's own metric lines."""
    import json

    from selfplay.config import load_preset, with_overrides
    from selfplay.loop import run_local_loop

    cfg = with_overrides(load_preset("tictactoe"), {"run.games": 24, "search.simulations": 16, "run.learner": False})
    root = tmp_path / "local"
    run_local_loop(cfg, root)
    s = compute_summary(root)
    games, positions = sql(root, "SELECT count(*), sum(positions) FROM games")
    assert games >= 24
    assert (s["games"], s["positions"]) == (games, positions)
    lines = [json.loads(x) for x in (root / "metrics.jsonl").read_text().splitlines()]
    last = [r for r in lines if r["component"] == "worker"][-1]
    assert (last["games_total"], last["positions_total"]) == (games, positions)
    assert s["counts"]["workers"] == {"games": games, "positions": positions}
    # the whole run is shorter than the window: games per hour = games / run time * 3600
    span = s["as_of"] - s["started_at"]
    assert s["games_per_hour"] == pytest.approx(games / span * 3600, rel=1e-3)
    assert s["workers"][0]["snapshot_version"] == s["latest_snapshot"]["version"]
