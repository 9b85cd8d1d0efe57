"""The catalog's aggregate queries (what the monitor, the reader and the buffer's refill read
through the catalog module instead of their own SQL), checked against the records themselves:
a run written by the real record store (real shards, real SQLite)."""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.games.registry import make_game
from selfplay.replay.catalog import Catalog
from selfplay.replay.reader import newest_records
from selfplay.replay.store import RecordStore
from selfplay.replay.synthetic import random_record, with_id

T0 = 2_000_000.0


@pytest.fixture
def run(tmp_path):
    """24 games in 6 shards of 4; game i finished at T0 + 10 i; games 3 and 7 resign probes."""
    game = make_game("tictactoe")
    rng = np.random.default_rng(11)
    recs = [random_record(game, rng, f"g{i:03d}", started_at=T0 + 10 * i - 5, finished_at=T0 + 10 * i)
            for i in range(24)]
    for i, would, result in ((3, 0, 1), (7, 1, 1)):  # 3: would-have-resigned player 0 won (a false positive)
        r = recs[i]
        recs[i] = with_id(r, r.game_id, resign_disabled=True, resign_would_have=would, result=result,
                          outcomes=np.where(r.to_play == 0, result, -result).astype(np.int8))
    with RecordStore(tmp_path / "run", writer="t", max_games=4) as store:
        store.add_games(recs)
    return tmp_path / "run", recs


def test_summary_and_windows_agree_with_the_records(run):
    root, recs = run
    with Catalog.open_readonly(root / "catalog.sqlite") as cat:
        s = cat.summary()
        assert (s.games, s.positions, s.shards) == (24, sum(r.num_positions for r in recs), 6)
        assert (s.first_finished, s.last_finished, s.first_started) == (T0, T0 + 230, T0 - 5)
        assert (s.resign_disabled_games, s.resign_would_have_games, s.resign_false_positives) == (2, 2, 1)
        # (start, end]: games 5..9 finished at T0+50 .. T0+90
        assert cat.counts_between(T0 + 45, T0 + 90) == (5, sum(r.num_positions for r in recs[5:10]))
        times, positions = cat.finish_series()
        assert times == [T0 + 10 * i for i in range(24)] and positions == [r.num_positions for r in recs]
        assert cat.game_lengths() == [r.num_positions for r in recs]
        assert cat.positions_of_newest_games(3) == sum(r.num_positions for r in recs[-3:])
        with pytest.raises(Exception):
            cat.con.execute("DELETE FROM games")  # read-only connection


def test_one_newest_shard_selection(run):
    root, recs = run
    with Catalog.open_readonly(root / "catalog.sqlite") as cat:
        names = [s.name for s in cat.shards()]
        per_shard = [s.positions for s in cat.shards()]
        assert [s.name for s in cat.newest_shards()] == names
        # enough newest shards for the positions asked, oldest first
        need = per_shard[-1] + 1
        assert [s.name for s in cat.newest_shards(need)] == names[-2:]
        # two buffer shards split the newest shards between them, alternately from the newest
        assert [s.name for s in cat.newest_shards(None, (0, 2))] == names[-1::-2][::-1]
        assert [s.name for s in cat.newest_shards(None, (1, 2))] == names[-2::-2][::-1]
        with pytest.raises(ValueError):
            cat.newest_shards(None, (2, 2))
    # the reader's newest records: by positions (whole shards) or by games (exactly those games)
    assert [r.game_id for r in newest_records(root, per_shard[-1])] == [r.game_id for r in recs[-4:]]
    assert [r.game_id for r in newest_records(root, None, games=5)] == [r.game_id for r in recs[-5:]]
