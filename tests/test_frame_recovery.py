"""One damaged frame costs one game: readers resynchronise, export and the buffer refill skip and
report, resume and `selfplay verify` quarantine exactly the damaged games, a foreign shard is
quarantined, and a damaged catalog gets one line and `selfplay repair`.

Real shards, real SQLite, the real command line."""

from __future__ import annotations

import json
import zlib

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from selfplay.cli import main as cli_main
from selfplay.config import RunConfig, dump_config
from selfplay.games.registry import make_game
from selfplay.replay import codec, synthetic
from selfplay.replay.buffer import ReplayBuffer
from selfplay.replay.catalog import Catalog
from selfplay.replay.export import export_npz
from selfplay.replay.reader import RunReader
from selfplay.replay.shards import read_shard, scan_shard, write_shard
from selfplay.replay.store import RecordStore
from selfplay.rundir import atomic_write_bytes

TTT = make_game("tictactoe")
FOUR = make_game("fourinrow")


def records(n: int, start: int = 0, seed: int = 0, game=TTT, name="tictactoe"):
    rng = np.random.default_rng(seed)
    return [synthetic.random_record(game, rng, f"g{start + i}", game_name=name, game_options={},
                                    snapshot=1, finished_at=1000.0 + start + i)
            for i in range(n)]


def ttt_run(path):
    """A run directory whose run.toml declares tic-tac-toe (m,n,k = 3,3,3)."""
    path.mkdir(parents=True, exist_ok=True)
    atomic_write_bytes(path / "run.toml", dump_config(RunConfig()).encode())
    return path


def frame_offsets(path):
    return [off for off, _ in read_shard(path)]


def flip(path, start, n=8):
    data = bytearray(path.read_bytes())
    for i in range(start, start + n):
        data[i] ^= 0xFF
    path.write_bytes(bytes(data))


@pytest.fixture(scope="module")
def big_run(tmp_path_factory):
    """A run with one shard of 512 games (as the default shard size), frame 100 damaged."""
    root = ttt_run(tmp_path_factory.mktemp("big") / "run")
    with RecordStore(root, max_games=512) as store:
        store.ingest(records(512))
    shard = root / "shards" / "main-00000000.plyrec"
    offsets = frame_offsets(shard)
    flip(shard, offsets[100] + 40)  # 8 bytes inside frame 100's payload
    return root


def test_the_reader_skips_one_damaged_frame_and_reads_the_rest(big_run):
    reader = RunReader(big_run)
    ids = [r.game_id for r in reader.records()]
    assert len(ids) == 511 and "g100" not in ids  # not 100 (the old reader dropped 412)
    assert reader.games_skipped == 1 and "CRC32" in reader.problems[0]
    with pytest.raises(Exception, match="CRC32"):
        list(RunReader(big_run, on_corrupt="raise").records())


def test_export_skips_and_reports_the_damaged_game(big_run, tmp_path, capsys):
    out = tmp_path / "x.npz"
    assert cli_main(["export", str(big_run), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "left out 1 game(s)" in text and "selfplay verify" in text
    with np.load(out) as z:
        assert len(z["game_ids"]) == 511 and "g100" not in set(z["game_ids"])
        assert z["planes"].shape[0] == int(np.sum([1 for _ in z["game_index"]]))


def test_the_buffer_refill_skips_the_damaged_game(big_run):
    buf = ReplayBuffer(TTT, 100_000, seed=0)
    added = buf.refill_from(big_run)
    assert buf.games_added == 511 and added == len(buf)
    assert buf.refill_report.games_skipped == 1


def test_resume_notices_a_damaged_frame_of_a_same_size_shard_and_quarantines_only_it(tmp_path):
    root = ttt_run(tmp_path / "run")
    with RecordStore(root, max_games=64) as store:
        store.ingest(records(64))
    shard = root / "shards" / "main-00000000.plyrec"
    flip(shard, frame_offsets(shard)[10] + 30)
    with RecordStore(root) as store:  # the default check at open: each file's CRC32
        rep = store.recovery
        assert rep.shards_quarantined == ["main-00000000.plyrec"]
        assert (rep.games_salvaged, rep.games_lost) == (63, 1)
    assert (root / "quarantine" / "main-00000000.plyrec").exists()
    reason = json.loads((root / "quarantine" / "main-00000000.plyrec.reason.json").read_text())
    assert "CRC32" in reason["reason"] and reason["salvaged_into"] == "main-00000001.plyrec"
    ids = [r.game_id for r in RunReader(root, on_corrupt="raise").records()]
    assert sorted(ids) == sorted(f"g{i}" for i in range(64) if i != 10)


def test_a_damaged_length_field_costs_that_frame_only(tmp_path):
    """The length of frame 3 is garbage: the scan resynchronises on frame 4."""
    recs = records(8)
    frames = [codec.encode_frame(codec.encode_record(r), codec.FLAG_DEFLATE) for r in recs]
    path = tmp_path / "main-00000000.plyrec"
    write_shard(path, frames, codec.FLAG_DEFLATE)
    off = frame_offsets(path)[3]
    data = bytearray(path.read_bytes())
    data[off:off + 4] = (0x00FFFFFF).to_bytes(4, "little")  # a length far past the end
    path.write_bytes(bytes(data))
    scan = scan_shard(path)
    assert [r.game_id for _, r in scan.records] == ["g0", "g1", "g2", "g4", "g5", "g6", "g7"]
    assert len(scan.damaged) == 1 and scan.damaged[0].index == 3 and not scan.damaged[0].at_end


def test_verify_quarantines_exactly_the_damaged_games(tmp_path, capsys):
    root = ttt_run(tmp_path / "run")
    with RecordStore(root, max_games=20, compress=False) as store:
        store.ingest(records(40))
    a = root / "shards" / "main-00000000.plyrec"
    offs = frame_offsets(a)
    flip(a, offs[4] + 50)
    flip(a, offs[15] + 50)
    size_before = a.stat().st_size
    assert cli_main(["verify", str(root), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["shards_quarantined"] == ["main-00000000.plyrec"]
    assert (result["games_salvaged"], result["games_lost"], result["games"]) == (18, 2, 38)
    assert (root / "quarantine" / "main-00000000.plyrec").stat().st_size == size_before  # moved as it was
    ids = {r.game_id for r in RunReader(root, on_corrupt="raise").records()}
    assert ids == {f"g{i}" for i in range(40)} - {"g4", "g15"}
    assert cli_main(["verify", str(root)]) == 0
    assert capsys.readouterr().out.startswith("sound: 38 games")


def test_a_foreign_shard_is_quarantined_on_resume_and_export_works(tmp_path):
    root = ttt_run(tmp_path / "run")
    with RecordStore(root) as store:
        store.ingest(records(5))
    # a four-in-a-row shard copied in by hand
    four = records(3, start=100, game=FOUR, name="fourinrow")
    write_shard(root / "shards" / "main-00000007.plyrec",
                [codec.encode_frame(codec.encode_record(r), 0) for r in four], 0)
    with RecordStore(root) as store:
        rep = store.recovery
        assert rep.shards_quarantined == ["main-00000007.plyrec"]
        assert "fourinrow" in rep.reasons["main-00000007.plyrec"] and "run.toml" in rep.reasons["main-00000007.plyrec"]
        assert store.totals().games == 5
        with pytest.raises(Exception, match="run.toml"):  # and it is refused at the door too
            store.ingest(records(1, start=200, game=FOUR, name="fourinrow"))
    summary = export_npz(root, tmp_path / "x.npz")
    assert summary.games == 5 and summary.game == "mnk"


def test_export_leaves_out_foreign_records_already_indexed(tmp_path):
    """A run indexed by an older version (the foreign shard is in the catalog): export still
    succeeds with the run's own game and says what it left out."""
    root = ttt_run(tmp_path / "run")
    with RecordStore(root) as store:
        store.ingest(records(4))
    (root / "run.toml").rename(tmp_path / "run.toml.keep")
    with RecordStore(root, writer="copy") as store:  # without run.toml nothing stops the copy
        store.ingest(records(2, start=50, game=FOUR, name="fourinrow"))
    (tmp_path / "run.toml.keep").rename(root / "run.toml")
    summary = export_npz(root, tmp_path / "x.npz")
    assert summary.games == 4 and summary.games_skipped == 2
    assert "fourinrow" in summary.problems[0]


def _damage_catalog(root):
    path = root / "catalog.sqlite"
    for p in root.glob("catalog.sqlite-*"):
        p.unlink()
    data = bytearray(path.read_bytes())
    data[:100] = b"\x17" * 100  # the SQLite header is gone
    path.write_bytes(bytes(data))


def test_a_damaged_catalog_gives_one_line_and_repair_rebuilds_it(tmp_path, capsys):
    root = ttt_run(tmp_path / "run")
    with RecordStore(root, max_games=10) as store:
        store.ingest(records(25))
    _damage_catalog(root)
    for argv in (["export", str(root), "--out", str(tmp_path / "x.npz")],
                 ["report", str(root), "--out", str(tmp_path / "r")],
                 ["show", str(root), "--game", "g1", "--move", "0", "--out", str(tmp_path / "p.png")]):
        code = cli_main(argv)
        err = capsys.readouterr().err
        assert code == 2, argv
        assert "selfplay repair" in err and "Traceback" not in err and err.count("\n") == 1, (argv, err)
    assert cli_main(["repair", str(root)]) == 0
    out = capsys.readouterr().out
    assert "found 25 games" in out and "damaged-" in out
    assert list(root.glob("catalog.sqlite.damaged-*"))
    assert export_npz(root, tmp_path / "y.npz").games == 25
    assert cli_main(["repair", str(root)]) == 0
    assert "catalog is sound: 25 games" in capsys.readouterr().out


def test_repair_refuses_while_a_writer_runs(tmp_path, capsys):
    root = ttt_run(tmp_path / "run")
    with RecordStore(root):
        assert cli_main(["repair", str(root)]) == 2
    assert "running writer" in capsys.readouterr().err


# ---- fuzz: any damage to any shard is contained ---------------------------------------------

_BASE = records(6, seed=3)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(st.integers(0, 10**6), st.sampled_from(["flip", "zero", "insert", "cut"])),
                min_size=1, max_size=3), st.booleans())
def test_the_scanner_never_fails_and_keeps_every_untouched_frame(tmp_path_factory, edits, compress):
    flags = codec.FLAG_DEFLATE if compress else 0
    frames = [codec.encode_frame(codec.encode_record(r), flags) for r in _BASE]
    path = tmp_path_factory.mktemp("s") / "main-00000000.plyrec"
    write_shard(path, frames, flags)
    data = bytearray(path.read_bytes())
    touched: list[tuple[int, int]] = []
    for where, how in edits:
        if len(data) <= codec.HEADER.size:
            break  # cut down to the header: nothing left to damage
        i = codec.HEADER.size + where % (len(data) - codec.HEADER.size)
        if how == "flip":
            data[i] ^= 0x5A
            touched.append((i, i + 1))
        elif how == "zero":
            data[i:i + 16] = bytes(len(data[i:i + 16]))
            touched.append((i, i + 16))
        elif how == "insert":
            data[i:i] = b"\x00\x01garbage"
            touched.append((i, len(data) + 1))  # everything after moves: only earlier frames count
        else:
            del data[i:]
            touched.append((i, len(data) + 1))
    path.write_bytes(bytes(data))
    scan = scan_shard(path)  # never raises
    got = {r.game_id for _, r in scan.records}
    assert got <= {r.game_id for r in _BASE}
    # a frame no edit touched is kept: before the first edit always; after it too when no edit
    # moved the bytes (flips and zeroed stretches: the scan resynchronises on the next frame)
    in_place = all(how in ("flip", "zero") for _, how in edits)
    first = min((a for a, _ in touched), default=len(data))
    off = codec.HEADER.size
    for r, fr in zip(_BASE, frames):
        lo, hi = off, off + len(fr)
        untouched = all(hi <= a or lo >= b for a, b in touched)
        if hi <= first or (in_place and untouched):
            assert r.game_id in got, (r.game_id, edits)
        off += len(fr)
    assert zlib.crc32(path.read_bytes()) == scan.crc32
