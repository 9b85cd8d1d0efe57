"""``selfplay games``: the committed games of a run, checked against plain SQL over the catalog
(SQLite's own answer) for games written by the replay store."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import numpy as np
import pytest

from selfplay.cli import main
from selfplay.games.registry import make_game
from selfplay.replay.catalog import Catalog
from selfplay.replay.store import RecordStore
from selfplay.replay.synthetic import random_record, with_id
from selfplay.rundir import RunDir

T0 = 1_700_000_000.0


@pytest.fixture
def run(tmp_path: Path) -> Path:
    game = make_game("mnk")
    rng = np.random.default_rng(3)
    recs = [random_record(game, rng, f"g{i:02d}", game_name="mnk", game_options={}, worker_id=f"w{i % 3}",
                          snapshot=i // 4, started_at=T0 + i, finished_at=T0 + i + 0.5) for i in range(12)]
    recs[5] = with_id(recs[5], "g05", resigned=True)
    with RecordStore(tmp_path / "run", writer="b", max_games=5) as store:
        store.add_games(recs)
    return tmp_path / "run"


def test_json_rows_agree_with_the_catalog(run: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["games", str(run), "--json"]) == 0
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    con = sqlite3.connect(run / "catalog.sqlite")
    ref = con.execute("SELECT game_id, worker, snapshot_min, snapshot_max, length, result, resigned, finished_at "
                      "FROM games ORDER BY seq").fetchall()
    con.close()
    assert [(r["game_id"], r["worker"], r["snapshot_min"], r["snapshot_max"], r["length"], r["result"],
             int(r["resigned"]), r["finished_at"]) for r in rows] == ref
    assert len(rows) == 12 and rows[5]["resigned"] is True


def test_last_n_is_the_newest_in_commit_order(run: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["games", str(run), "--last", "3", "--json"]) == 0
    ids = [json.loads(x)["game_id"] for x in capsys.readouterr().out.splitlines()]
    assert ids == ["g09", "g10", "g11"]
    cat = Catalog(run / "catalog.sqlite", readonly=True)
    try:
        assert [g.game_id for g in cat.game_rows(3)] == ids
    finally:
        cat.close()


def test_table_and_errors(run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["games", str(run), "--last", "2"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].split()[:2] == ["game", "id"] and len(out) == 3
    assert out[2].startswith("g11") and "UTC" in out[2]
    RunDir.create(tmp_path / "fresh")
    assert main(["games", str(tmp_path / "fresh")]) == 0
    assert "no committed games" in capsys.readouterr().out
    assert main(["games", str(tmp_path / "nowhere")]) == 2
    assert "does not exist" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["games", str(run), "--last", "0"])
