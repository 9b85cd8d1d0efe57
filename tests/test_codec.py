"""Record format: round trip, checksums, bounded decoding, and a reader written from the spec."""

from __future__ import annotations

import math
import struct
import tracemalloc
import zlib

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from selfplay.errors import FormatError
from selfplay.games.registry import make_game
from selfplay.replay import codec, synthetic
from selfplay.replay.shards import scan_shard, write_shard

TTT = make_game("tictactoe")
GO9 = make_game("go", size=9)

FIELDS = ("game_id", "game", "game_options", "worker_id", "seed", "search", "result", "resigned",
          "resign_disabled", "resign_would_have", "started_at", "finished_at", "extra", "num_actions")
ARRAYS = tuple(codec.ARRAY_DTYPES)


def ttt_record(i: int = 0, seed: int = 1):
    rng = np.random.default_rng(seed + i)
    return synthetic.random_record(TTT, rng, f"ttt-{i}", game_name="tictactoe", game_options={},
                                   snapshot=i, started_at=100.0 + i, finished_at=200.5 + i)


def go_record(i: int = 0, seed: int = 7):
    rng = np.random.default_rng(seed + i)
    rec = synthetic.random_record(GO9, rng, f"go-{i}", game_name="go", game_options=GO9.options(),
                                  snapshot=3, max_moves=40)
    rec.resign_disabled, rec.resign_would_have = True, 1
    rec.extra = {"note": "ü", "nested": {"a": [1, 2.5, None]}}
    rec.root_values = rec.root_values.copy()
    rec.root_values[0] = np.nan  # "not searched"
    return rec


def shard_bytes(records, flags=codec.FLAG_DEFLATE) -> bytes:
    out = codec.encode_header(flags)
    for r in records:
        out += codec.encode_frame(codec.encode_record(r), flags)
    return out


def assert_same(a, b):
    for f in FIELDS:
        assert getattr(a, f) == getattr(b, f), f
    for f in ARRAYS:
        x, y = np.asarray(getattr(a, f)), np.asarray(getattr(b, f))
        assert x.shape == y.shape, f
        assert x.dtype == np.dtype(codec.ARRAY_DTYPES[f]), f
        np.testing.assert_array_equal(x, y, err_msg=f)


@pytest.mark.parametrize("flags", [0, codec.FLAG_DEFLATE])
def test_round_trip_of_every_field(flags):
    recs = [ttt_record(0), ttt_record(1), go_record(0)]
    recs[1].resigned, recs[1].search = True, {"simulations": 64, "c_puct": 1.25, "gumbel": False}
    data = shard_bytes(recs, flags)
    back = codec.decode_shard_bytes(data)
    assert len(back) == 3
    for a, b in zip(recs, back):
        assert_same(a, b)
    assert math.isnan(back[2].root_values[0])


def test_empty_game_round_trips():
    rec = synthetic.random_record(TTT, np.random.default_rng(0), "empty", game_name="tictactoe",
                                  game_options={}, max_moves=0)
    assert rec.num_positions == 0
    back = codec.decode_record(codec.encode_record(rec, num_actions=9))
    assert back.num_positions == 0 and back.game_id == "empty"


def test_crc32_is_the_standard_crc():
    # CRC-32/ISO-HDLC check value 0xCBF43926 for b"123456789" (the CRC RevEng catalogue)
    frame = codec.encode_frame(b"123456789", 0)
    assert struct.unpack("<II", frame[:8]) == (9, 0xCBF43926)


def test_flipped_byte_is_caught_by_the_crc():
    data = bytearray(shard_bytes([ttt_record(0), ttt_record(1)]))
    first_len = struct.unpack_from("<I", data, codec.HEADER.size)[0]
    data[codec.HEADER.size + 8 + first_len // 2] ^= 0x10
    with pytest.raises(FormatError, match="CRC32 mismatch"):
        codec.decode_shard_bytes(bytes(data))


def test_huge_claimed_length_is_refused_without_allocating():
    data = codec.encode_header(0) + struct.pack("<II", 0xFFFFFFF0, 0) + b"x" * 100
    tracemalloc.start()
    try:
        with pytest.raises(FormatError, match="over the frame limit"):
            codec.decode_shard_bytes(data)
        # a length under the limit but beyond the file: truncated, still no allocation
        data2 = codec.encode_header(0) + struct.pack("<II", 50_000_000, 0) + b"x" * 100
        with pytest.raises(FormatError, match="truncated shard"):
            codec.decode_shard_bytes(data2)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 1_000_000


def test_array_claiming_more_than_it_holds_is_refused():
    rec = ttt_record(0)
    doc = msgpack.unpackb(codec.encode_record(rec), raw=False)
    doc["positions"] = 90_000  # shapes no longer agree with the count
    with pytest.raises(FormatError, match="shape"):
        codec.decode_record(msgpack.packb(doc, use_bin_type=True))
    doc["positions"] = 10**9
    with pytest.raises(FormatError, match="positions"):
        codec.decode_record(msgpack.packb(doc, use_bin_type=True))


def test_wrong_magic_newer_schema_and_unknown_flags():
    good = shard_bytes([ttt_record(0)])
    with pytest.raises(FormatError, match="wrong magic"):
        codec.decode_shard_bytes(b"NOTASHRD" + good[8:])
    newer = struct.pack("<8sHH", codec.MAGIC, codec.SCHEMA_VERSION + 1, 0)
    newer += struct.pack("<I", zlib.crc32(newer))
    with pytest.raises(FormatError, match=r"schema version 2, newer .* upgrade"):
        codec.decode_shard_bytes(newer + good[16:])
    flagged = struct.pack("<8sHH", codec.MAGIC, 1, 0x8000)
    flagged += struct.pack("<I", zlib.crc32(flagged))
    with pytest.raises(FormatError, match="unknown header flags"):
        codec.decode_shard_bytes(flagged)
    damaged = bytearray(good)
    damaged[9] ^= 1
    with pytest.raises(FormatError, match="header"):
        codec.decode_shard_bytes(bytes(damaged))
    with pytest.raises(FormatError, match="shorter than"):
        codec.decode_shard_bytes(good[:5])


def test_inconsistent_record_is_refused_at_encode():
    rec = ttt_record(0)
    rec.outcomes = -rec.outcomes if rec.result != 0 else rec.outcomes + 1
    with pytest.raises(FormatError, match="outcomes"):
        codec.encode_record(rec)
    rec = ttt_record(1)
    rec.actions = rec.actions.copy()
    rec.actions[0] = 9
    with pytest.raises(FormatError, match="action"):
        codec.encode_record(rec)


def spec_reader(data: bytes) -> list[dict]:
    """A reader written only from docs/record-format.md (struct, zlib, msgpack, numpy)."""
    magic, version, flags, hcrc = struct.unpack_from("<8sHHI", data, 0)
    assert magic == b"\x89PLYREC\n" and version == 1 and hcrc == zlib.crc32(data[:12])
    pos, games = 16, []
    while pos < len(data):
        length, crc = struct.unpack_from("<II", data, pos)
        stored = data[pos + 8:pos + 8 + length]
        assert zlib.crc32(stored) == crc
        payload = zlib.decompress(stored) if flags & 1 else stored
        doc = msgpack.unpackb(payload, raw=False)
        for k, v in doc.items():
            if isinstance(v, dict) and set(v) == {"dtype", "shape", "data"}:
                doc[k] = np.frombuffer(v["data"], dtype=np.dtype(v["dtype"])).reshape(v["shape"])
        games.append(doc)
        pos += 8 + length
    return games


def test_a_reader_from_the_spec_agrees():
    recs = [ttt_record(3), go_record(1)]
    docs = spec_reader(shard_bytes(recs))
    for rec, doc in zip(recs, docs):
        assert doc["game_id"] == rec.game_id and doc["positions"] == rec.num_positions
        assert doc["num_actions"] == rec.num_actions
        np.testing.assert_array_equal(doc["boards"], rec.boards)
        # CSR layout: position t's targets are entries offsets[t]:offsets[t+1]
        t = rec.num_positions - 1
        lo, hi = doc["policy_offsets"][t], doc["policy_offsets"][t + 1]
        dense = np.zeros(rec.num_actions)
        dense[doc["policy_actions"][lo:hi]] = doc["policy_weights"][lo:hi]
        np.testing.assert_allclose(dense / dense.sum(), rec.policy_target(t, rec.num_actions))
        row = doc["legal"][t]
        legal = np.array([(row[a // 8] >> (7 - a % 8)) & 1 for a in range(rec.num_actions)], dtype=bool)
        np.testing.assert_array_equal(legal, rec.legal_mask(t, rec.num_actions))


# ---- fuzzing: random and mutated input gives FormatError, nothing else, and no big allocation ----

VALID = shard_bytes([ttt_record(0), go_record(0)])
VALID_RAW = shard_bytes([ttt_record(1)], flags=0)


def decode_only_format_errors(data: bytes) -> None:
    tracemalloc.start()
    try:
        try:
            codec.decode_shard_bytes(data)
        except FormatError:
            pass
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    # bounded by a small multiple of the input (decoded arrays are views of the payload)
    assert peak < 20 * len(data) + 2_000_000


FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@FUZZ
@given(st.binary(max_size=2000))
def test_fuzz_random_bytes(blob):
    decode_only_format_errors(blob)
    decode_only_format_errors(codec.encode_header(0) + blob)
    decode_only_format_errors(codec.encode_header(codec.FLAG_DEFLATE) + blob)


@FUZZ
@given(st.sampled_from([VALID, VALID_RAW]), st.lists(
    st.tuples(st.integers(0, 10**6), st.integers(0, 255)), min_size=1, max_size=8),
    st.integers(0, 10**6))
def test_fuzz_mutated_shards(base, edits, cut):
    data = bytearray(base)
    for pos, val in edits:
        data[pos % len(data)] = val
    decode_only_format_errors(bytes(data))
    decode_only_format_errors(bytes(data[:cut % len(data)]))


PAYLOAD = codec.encode_record(go_record(2))


@FUZZ
@given(st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)), min_size=1, max_size=6))
def test_fuzz_payload_behind_a_valid_crc(edits):
    # an adversary can write a correct CRC: the decoder must still check every size and value
    data = bytearray(PAYLOAD)
    for pos, val in edits:
        data[pos % len(data)] = val
    decode_only_format_errors(codec.encode_header(0) + codec.encode_frame(bytes(data), 0))


_values = st.recursive(
    st.none() | st.booleans() | st.integers(-2**63, 2**64 - 1) | st.floats() | st.text(max_size=8)
    | st.binary(max_size=16),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4),
    max_leaves=10)


@FUZZ
@given(st.sampled_from(sorted(msgpack.unpackb(PAYLOAD, raw=False))), _values,
       st.sampled_from(["dtype", "shape", "data", None]))
def test_fuzz_field_replaced(name, value, sub):
    doc = msgpack.unpackb(PAYLOAD, raw=False)
    if sub is not None and isinstance(doc[name], dict) and sub in doc[name]:
        doc[name][sub] = value
    else:
        doc[name] = value
    payload = msgpack.packb(doc, use_bin_type=True)
    decode_only_format_errors(codec.encode_header(0) + codec.encode_frame(payload, 0))


def test_deflate_bomb_is_bounded():
    bomb = zlib.compress(b"\0" * (codec.MAX_PAYLOAD_BYTES + 10), 9)
    data = codec.encode_header(codec.FLAG_DEFLATE) + struct.pack("<II", len(bomb), zlib.crc32(bomb)) + bomb
    with pytest.raises(FormatError, match="beyond the limit"):
        codec.decode_shard_bytes(data)


def test_scan_reports_games_before_damage(tmp_path):
    recs = [ttt_record(i) for i in range(4)]
    frames = [codec.encode_frame(codec.encode_record(r), 0) for r in recs]
    path = tmp_path / "main-00000000.plyrec"
    write_shard(path, frames, 0)
    data = path.read_bytes()
    path.write_bytes(data[:-5])
    scan = scan_shard(path)
    assert not scan.ok and "truncated" in str(scan.error)
    assert [r.game_id for _, r in scan.records] == [r.game_id for r in recs[:3]]
    with pytest.raises(FormatError, match="never rewritten"):
        write_shard(path, frames, 0)
    assert path.read_bytes() == data[:-5]
