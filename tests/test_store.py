"""Record store: shards and catalog, exactly-once game ids, recovery, quarantine, concurrent readers."""

from __future__ import annotations

import json
import os
import struct
import subprocess
import sys
import zlib

import numpy as np
import pytest

from selfplay.errors import FormatError, RunDirError
from selfplay.games.registry import make_game
from selfplay.metrics import read_metrics
from selfplay.replay import codec, synthetic
from selfplay.replay.catalog import Catalog
from selfplay.replay.reader import RunReader
from selfplay.replay.shards import write_shard
from selfplay.replay.store import RecordStore
from selfplay.rundir import RunDir

TTT = make_game("tictactoe")


def records(n: int, start: int = 0, seed: int = 0):
    rng = np.random.default_rng(seed)
    return [synthetic.random_record(TTT, rng, f"g{start + i}", game_name="tictactoe", game_options={},
                                    snapshot=start + i, finished_at=1000.0 + start + i)
            for i in range(n)]


def ids_in_run(run) -> list[str]:
    return [r.game_id for r in RunReader(run, on_corrupt="raise").records()]


def test_games_batched_into_shards_and_catalogued(tmp_path):
    recs = records(25)
    with RecordStore(tmp_path, max_games=10) as store:
        added, dups = store.add_games(recs)
        assert (len(added), dups) == (25, [])
        assert store.pending_games == 0 and store.journal_games == 5  # durable, not yet sealed
        assert store.totals().games == 25  # counted at once
    cat = Catalog(tmp_path / "catalog.sqlite", readonly=True)
    t = cat.totals()
    assert (t.games, t.shards, t.duplicates) == (25, 3, 0)
    assert t.positions == sum(r.num_positions for r in recs)
    assert t.newest_snapshot == 24
    rows = cat.shards()
    assert [r.games for r in rows] == [10, 10, 5]
    assert rows[0].snapshot_min == 0 and rows[0].snapshot_max == 9
    row = cat.con.execute("SELECT worker, positions, length, result, finished_at FROM games "
                          "WHERE game_id='g3'").fetchone()
    assert row == ("synthetic", recs[3].num_positions, recs[3].num_positions, recs[3].result, 1003.0)
    cat.close()
    assert ids_in_run(tmp_path) == [r.game_id for r in recs]
    assert not list((tmp_path / "shards").glob(".*.tmp"))


def test_duplicate_game_id_is_ignored_and_counted(tmp_path):
    recs = records(6)
    with RecordStore(tmp_path, max_games=4) as store:
        store.add_games(recs[:4])                   # flushed
        added, dups = store.add_games(recs[2:6] + recs[5:6])  # 2 committed, 1 repeated in-call
        assert added == ["g4", "g5"] and dups == ["g2", "g3", "g5"]
        added, dups = store.add_games(recs[4:5])    # waiting, not yet flushed
        assert added == [] and dups == ["g4"]
    with RecordStore(tmp_path) as store:            # across a reopen
        added, dups = store.add_games(recs[:1])
        assert dups == ["g0"]
        assert store.totals().duplicates == 5
        assert store.totals().games == 6
    assert sorted(ids_in_run(tmp_path)) == sorted(r.game_id for r in recs)


def test_a_second_writer_of_the_same_name_is_refused(tmp_path):
    with RecordStore(tmp_path):
        with pytest.raises(RunDirError, match="already has an open record store"):
            RecordStore(tmp_path)
        with RecordStore(tmp_path, writer="other") as other:  # another name is fine
            other.add_games(records(1, 50))


def test_a_bad_record_adds_nothing(tmp_path):
    recs = records(3)
    recs[1].to_play = recs[1].to_play + 5
    with RecordStore(tmp_path) as store:
        with pytest.raises(FormatError, match="to_play"):
            store.add_games(recs)
        assert store.pending_games == 0


def test_recovery_discards_temp_files_and_indexes_orphan_shards(tmp_path):
    with RecordStore(tmp_path) as store:
        store.add_games(records(3))
    shards = tmp_path / "shards"
    (shards / ".main-00000007.plyrec.tmp").write_bytes(b"half a shard")
    # a finished shard whose catalog commit never happened (crash between rename and commit)
    orphan = records(2, start=10)
    write_shard(shards / "main-00000005.plyrec",
                [codec.encode_frame(codec.encode_record(r), 0) for r in orphan], 0)
    with RecordStore(tmp_path) as store:
        rep = store.recovery
        assert rep.temp_files_removed == [".main-00000007.plyrec.tmp"]
        assert rep.shards_indexed == ["main-00000005.plyrec"]
        assert store.totals().games == 5
        store.add_games(records(1, start=20))
        name = store.flush()
        assert name == "main-00000008.plyrec"  # never reuses a number seen on disk
    assert sorted(ids_in_run(tmp_path)) == ["g0", "g1", "g10", "g11", "g2", "g20"]
    with RecordStore(tmp_path) as store:
        assert store.recovery.clean


def test_truncated_shard_is_quarantined_with_reason_and_the_rest_stays(tmp_path):
    with RecordStore(tmp_path, max_games=4) as store:
        store.add_games(records(8))
    first = tmp_path / "shards" / "main-00000000.plyrec"
    data = first.read_bytes()
    first.write_bytes(data[:-20])  # the last frame of the first shard is cut
    with RecordStore(tmp_path) as store:
        rep = store.recovery
        assert rep.shards_quarantined == ["main-00000000.plyrec"]
        assert rep.games_salvaged == 3 and rep.games_lost == 1
        assert store.totals().games == 7
    q = tmp_path / "quarantine"
    assert (q / "main-00000000.plyrec").read_bytes() == data[:-20]  # moved, not rewritten
    reason = json.loads((q / "main-00000000.plyrec.reason.json").read_text())
    assert "size" in reason["reason"] and reason["games_lost"] == 1
    assert reason["games_salvaged"] == 3 and reason["salvaged_into"]
    assert sorted(ids_in_run(tmp_path)) == sorted(f"g{i}" for i in range(8) if i != 3)
    cat = Catalog(tmp_path / "catalog.sqlite", readonly=True)
    assert cat.quarantined_names() == {"main-00000000.plyrec"}
    cat.close()


def test_flipped_byte_found_by_full_verification(tmp_path):
    with RecordStore(tmp_path, max_games=4, compress=False) as store:
        store.add_games(records(8))
    path = tmp_path / "shards" / "main-00000001.plyrec"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))
    reader = RunReader(tmp_path)  # a reader skips the damage and says so
    got = [r.game_id for r in reader.records()]
    assert set(got) >= {"g0", "g1", "g2", "g3"} and len(got) < 8
    assert reader.problems and "CRC32" in reader.problems[0]
    with pytest.raises(FormatError, match="CRC32"):
        list(RunReader(tmp_path, on_corrupt="raise").records())
    with RecordStore(tmp_path, verify="full") as store:
        assert store.recovery.shards_quarantined == ["main-00000001.plyrec"]
    assert "CRC32" in json.loads((tmp_path / "quarantine" / "main-00000001.plyrec.reason.json").read_text())["reason"]
    assert {"g0", "g1", "g2", "g3"} <= set(ids_in_run(tmp_path))


def test_shard_of_a_newer_schema_is_quarantined_not_read(tmp_path):
    with RecordStore(tmp_path) as store:
        store.add_games(records(2))
    head = struct.pack("<8sHH", codec.MAGIC, codec.SCHEMA_VERSION + 1, 0)
    newer = head + struct.pack("<I", zlib.crc32(head)) + b"\0" * 8
    (tmp_path / "shards" / "main-00000009.plyrec").write_bytes(newer)
    with RecordStore(tmp_path) as store:
        assert store.recovery.shards_quarantined == ["main-00000009.plyrec"]
    reason = json.loads((tmp_path / "quarantine" / "main-00000009.plyrec.reason.json").read_text())
    assert "newer than this reader" in reason["reason"]
    assert ids_in_run(tmp_path) == ["g0", "g1"]


def test_metrics_line_has_the_agreed_fields(tmp_path):
    with RecordStore(tmp_path) as store:
        store.add_games(records(3))
        store.flush()
        store.add_games(records(1))
        store.log_metrics(window_positions=10, window_capacity=100)
    (line,) = list(read_metrics(tmp_path / "metrics.jsonl"))
    assert line["component"] == "buffer"
    assert line["games_total"] == 3 and line["duplicates_total"] == 1 and line["shards_total"] == 1
    assert line["window_positions"] == 10 and line["window_capacity"] == 100
    assert {"t", "source", "positions_total", "newest_snapshot_in_data"} <= set(line)


def test_catalog_is_readable_from_another_process_during_a_write(tmp_path):
    with RecordStore(tmp_path) as store:
        store.add_games(records(2))
        store.flush()
        con = store.catalog.con
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        con.execute("BEGIN IMMEDIATE")  # the writer holds the write lock, uncommitted rows
        con.execute("INSERT INTO counters VALUES ('probe', 1)")
        code = ("import sqlite3, sys; c = sqlite3.connect(f'file:{sys.argv[1]}?mode=ro', uri=True, timeout=1);"
                "print(c.execute('SELECT count(*) FROM games').fetchone()[0])")
        out = subprocess.run([sys.executable, "-c", code, str(tmp_path / "catalog.sqlite")],
                             capture_output=True, text=True, timeout=60)
        con.execute("ROLLBACK")
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "2"


def test_not_a_run_directory(tmp_path):
    (tmp_path / "plain").mkdir()
    with pytest.raises(RunDirError, match="not a run directory"):
        RunReader(tmp_path / "plain")
    with pytest.raises(RunDirError, match="does not exist"):
        RunReader(tmp_path / "missing")
    garbage = tmp_path / "bad"
    RunDir.create(garbage)
    (garbage / "catalog.sqlite").write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(FormatError, match="catalog"):
        RecordStore(garbage)
    assert (garbage / "catalog.sqlite").read_bytes() == b"this is not sqlite" * 100
    assert os.path.isdir(garbage / "shards")


def test_verify_while_open_quarantines_a_damaged_shard(tmp_path):
    with RecordStore(tmp_path, max_games=3, compress=False) as store:
        store.add_games(records(6))
        store.flush()
        path = tmp_path / "shards" / "main-00000000.plyrec"
        data = bytearray(path.read_bytes())
        data[-3] ^= 0xFF  # inside the last frame's payload: the first two games survive
        path.write_bytes(bytes(data))
        assert store.verify(full=False).clean  # same size: only a full check sees it
        rep = store.verify()
        assert rep.shards_quarantined == ["main-00000000.plyrec"]
        assert (rep.games_salvaged, rep.games_lost) == (2, 1)
        assert store.totals().games == 5
    assert sorted(ids_in_run(tmp_path)) == ["g0", "g1", "g3", "g4", "g5"]


def test_a_lost_catalog_is_rebuilt_from_the_shards(tmp_path):
    with RecordStore(tmp_path, max_games=4) as store:
        store.add_games(records(10))
    for p in tmp_path.glob("catalog.sqlite*"):
        p.unlink()
    with RecordStore(tmp_path) as store:
        assert len(store.recovery.shards_indexed) == 3
        assert store.totals().games == 10
        # and it says so (issue 12: the rebuild happened silently)
        assert store.recovery.catalog_rebuilt and store.recovery.games_found == 10
        assert "rebuilt it from the shards, found 10 games" in store.recovery.lines()[0]
    assert ids_in_run(tmp_path) == [f"g{i}" for i in range(10)]


from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_BASE = records(6, seed=3)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.integers(0, 10**6), st.sampled_from(["flip", "cut", "zero"]), st.booleans())
def test_any_damage_to_a_shard_is_contained(tmp_path_factory, where, how, compress):
    root = tmp_path_factory.mktemp("run")
    with RecordStore(root, max_games=3, compress=compress) as store:
        store.add_games(_BASE)
    path = root / "shards" / "main-00000001.plyrec"
    data = bytearray(path.read_bytes())
    i = where % len(data)
    if how == "flip":
        data[i] ^= 0x5A
    elif how == "cut":
        del data[i:]
    else:
        data[i:i + 16] = bytes(len(data[i:i + 16]))
    path.write_bytes(bytes(data))
    with RecordStore(root, verify="full") as store:  # only SelfplayErrors are handled inside
        rep = store.recovery
        assert rep.shards_quarantined in ([], ["main-00000001.plyrec"])
        total = store.totals().games
    got = ids_in_run(root)  # the whole run stays readable
    assert {"g0", "g1", "g2"} <= set(got) and len(got) == total == 6 - rep.games_lost
