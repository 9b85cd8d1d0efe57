"""Shard byte format: header, frames, and the msgpack encoding of one :class:`GameRecord`.

The layout is specified in ``docs/record-format.md`` (kept in step with this module). In short::

    shard   = header frame*
    header  = MAGIC (8 bytes) | schema version (u16 LE) | flags (u16 LE) | CRC32 of the first 12 bytes (u32 LE)
    frame   = payload length (u32 LE) | CRC32 of the payload (u32 LE) | payload
    payload = msgpack map of one game (zlib-compressed when flag bit 0 is set)

Decoding never trusts a size it reads: every length is checked against a fixed limit and against
the bytes actually present before anything is allocated, and every array's shape must agree with
the game's position and action counts. Any problem raises :class:`FormatError` naming the shard,
the frame and the reason.
"""

from __future__ import annotations

import math
import re
import struct
import zlib
from dataclasses import dataclass
from typing import Any, BinaryIO, Iterator

import msgpack
import numpy as np

from selfplay.errors import FormatError
from selfplay.records import GameRecord

#: first 8 bytes of every shard: a non-ASCII byte (catches 7-bit transfers), "PLYREC", and a
#: newline (catches newline conversion)
MAGIC = b"\x89PLYREC\n"
#: schema version this code writes and the newest it reads
SCHEMA_VERSION = 1
HEADER = struct.Struct("<8sHHI")
FRAME_HEADER = struct.Struct("<II")

#: flag bit 0: every frame payload is a zlib stream (RFC 1950) of the msgpack map
FLAG_DEFLATE = 0x0001
KNOWN_FLAGS = FLAG_DEFLATE

# ---- limits a decoder enforces (documented in docs/record-format.md) --------------------------
MAX_FRAME_BYTES = 64 * 1024 * 1024      # stored payload length
MAX_PAYLOAD_BYTES = 64 * 1024 * 1024    # msgpack map after decompression
MAX_POSITIONS = 100_000                 # positions per game
MAX_ACTIONS = 32_767                    # actions fit int16
MAX_BOARD_CELLS = 65_536                # product of the compact board shape
MAX_BOARD_DIMS = 3
MAX_STRING_BYTES = 4096
MAX_GAME_ID_BYTES = 256
MAX_CONTAINER_LEN = 65_536              # entries of any msgpack array or map

#: per-position array fields: name -> numpy dtype string (little-endian, as stored)
ARRAY_DTYPES: dict[str, str] = {
    "boards": "|i1",
    "to_play": "|i1",
    "actions": "<i2",
    "legal": "|u1",
    "policy_offsets": "<i4",
    "policy_actions": "<i2",
    "policy_weights": "<f4",
    "root_values": "<f4",
    "full_search": "|b1",
    "outcomes": "|i1",
    "snapshot": "<i4",
}
#: optional per-game area fields (games scored by area, e.g. Go), all three or none
FINAL_AREA_FIELDS = ("final_ownership", "final_margin", "final_area_scored")
FINAL_OWNERSHIP_DTYPE = "|i1"
#: bound of |final_margin|: a board's cells plus the largest komi a game accepts
MAX_FINAL_MARGIN = MAX_BOARD_CELLS + 1000
_STR_FIELDS = ("game_id", "game", "worker_id")
_MAP_FIELDS = ("game_options", "search", "extra")


def packed_width(num_actions: int) -> int:
    """Bytes of one packed legal-mask row: ceil(A / 8)."""
    return (num_actions + 7) // 8


# ---- header ------------------------------------------------------------------------------------

def encode_header(flags: int = 0) -> bytes:
    """The 16-byte shard header for the current schema version."""
    head = struct.pack("<8sHH", MAGIC, SCHEMA_VERSION, flags)
    return head + struct.pack("<I", zlib.crc32(head))


def decode_header(data: bytes, where: str = "shard") -> int:
    """Check a shard header; return its flags. Raises FormatError on a wrong magic, a newer
    schema, unknown flags or a damaged header."""
    if len(data) < HEADER.size:
        raise FormatError(f"{where}: file is {len(data)} bytes, shorter than the {HEADER.size}-byte header")
    magic, version, flags, crc = HEADER.unpack_from(data)
    if magic != MAGIC:
        raise FormatError(f"{where}: wrong magic {magic!r} (expected {MAGIC!r}); not a record shard")
    if zlib.crc32(data[:12]) != crc:
        raise FormatError(f"{where}: header checksum mismatch (damaged header)")
    if version > SCHEMA_VERSION:
        raise FormatError(
            f"{where}: written with record schema version {version}, newer than this reader "
            f"understands (up to {SCHEMA_VERSION}); upgrade plyfoundry to read it")
    if version < 1:
        raise FormatError(f"{where}: invalid record schema version {version}")
    if flags & ~KNOWN_FLAGS:
        raise FormatError(f"{where}: unknown header flags 0x{flags & ~KNOWN_FLAGS:04x}")
    return flags


# ---- one record <-> payload --------------------------------------------------------------------

def _array(a: np.ndarray, dtype: str) -> dict[str, Any]:
    arr = np.ascontiguousarray(a, dtype=np.dtype(dtype))
    return {"dtype": dtype, "shape": list(arr.shape), "data": arr.tobytes()}


def encode_record(rec: GameRecord, num_actions: int | None = None) -> bytes:
    """The msgpack payload of one record (uncompressed). The record is validated first with the
    same rules a decoder applies, so a shard never holds a record that cannot be read back.

    ``num_actions`` defaults to ``rec.num_actions``; when both are missing it is asked from the
    game registry."""
    a = int(num_actions or rec.num_actions or _registry_num_actions(rec.game, rec.game_options))
    doc: dict[str, Any] = {
        "game_id": rec.game_id,
        "game": rec.game,
        "game_options": dict(rec.game_options),
        "worker_id": rec.worker_id,
        "seed": int(rec.seed),
        "search": dict(rec.search),
        "result": int(rec.result),
        "resigned": bool(rec.resigned),
        "resign_disabled": bool(rec.resign_disabled),
        "resign_would_have": int(rec.resign_would_have),
        "started_at": float(rec.started_at),
        "finished_at": float(rec.finished_at),
        "extra": dict(rec.extra),
        "num_actions": a,
        "positions": rec.num_positions,
    }
    for name, dtype in ARRAY_DTYPES.items():
        doc[name] = _array(getattr(rec, name), dtype)
    if rec.final_ownership is not None:
        if rec.final_margin is None:
            raise FormatError(f"record {rec.game_id!r} has a final ownership but no final margin")
        doc["final_ownership"] = _array(rec.final_ownership, FINAL_OWNERSHIP_DTYPE)
        doc["final_margin"] = float(rec.final_margin)
        doc["final_area_scored"] = bool(rec.final_area_scored)
    if rec.num_positions == 0:  # an empty game: give its legal rows their width
        doc["legal"] = _array(np.zeros((0, packed_width(a)), dtype=np.uint8), ARRAY_DTYPES["legal"])
    try:
        payload = msgpack.packb(doc, use_bin_type=True)
    except (TypeError, ValueError, OverflowError) as exc:
        raise FormatError(f"record {rec.game_id!r} cannot be encoded: {exc}") from exc
    # validate exactly what a reader will see
    decode_record(payload, where=f"record {rec.game_id!r}")
    return payload


_NUM_ACTIONS_CACHE: dict[tuple[str, str], int] = {}


def _registry_num_actions(game: str, options: dict[str, Any]) -> int:
    key = (game, repr(sorted(options.items())))
    if key not in _NUM_ACTIONS_CACHE:
        from selfplay.games.registry import make_game
        _NUM_ACTIONS_CACHE[key] = make_game(game, **options).num_actions
    return _NUM_ACTIONS_CACHE[key]


def _unpack(payload: bytes, where: str) -> dict[str, Any]:
    try:
        doc = msgpack.unpackb(
            payload, raw=False, use_list=True, strict_map_key=True,
            max_bin_len=MAX_PAYLOAD_BYTES, max_str_len=MAX_STRING_BYTES,
            max_array_len=MAX_CONTAINER_LEN, max_map_len=MAX_CONTAINER_LEN, max_ext_len=0)
    except Exception as exc:  # msgpack raises several unrelated types for malformed input
        raise FormatError(f"{where}: payload is not a valid msgpack map ({type(exc).__name__}: {exc})") from None
    if not isinstance(doc, dict):
        raise FormatError(f"{where}: payload is a msgpack {type(doc).__name__}, expected a map")
    return doc


def _field(doc: dict[str, Any], name: str, types: type | tuple[type, ...], where: str) -> Any:
    if name not in doc:
        raise FormatError(f"{where}: missing field {name!r}")
    v = doc[name]
    if isinstance(v, bool) and bool not in (types if isinstance(types, tuple) else (types,)):
        raise FormatError(f"{where}: field {name!r} is a bool, expected {types}")
    if not isinstance(v, types):
        raise FormatError(f"{where}: field {name!r} has type {type(v).__name__}, expected "
                          f"{getattr(types, '__name__', types)}")
    return v


def _int_in(doc: dict[str, Any], name: str, lo: int, hi: int, where: str) -> int:
    v = _field(doc, name, int, where)
    if not lo <= v <= hi:
        raise FormatError(f"{where}: field {name!r} = {v} is outside {lo}..{hi}")
    return v


def _decode_array(doc: dict[str, Any], name: str, shape: tuple[int, ...], where: str) -> np.ndarray:
    spec = _field(doc, name, dict, where)
    dtype = spec.get("dtype")
    if dtype != ARRAY_DTYPES[name]:
        raise FormatError(f"{where}: array {name!r} has dtype {dtype!r}, expected {ARRAY_DTYPES[name]!r}")
    got = spec.get("shape")
    if not isinstance(got, list) or not all(isinstance(d, int) and not isinstance(d, bool) for d in got):
        raise FormatError(f"{where}: array {name!r} has a malformed shape {got!r}")
    if tuple(got) != shape:
        raise FormatError(f"{where}: array {name!r} has shape {tuple(got)}, expected {shape}")
    data = spec.get("data")
    if not isinstance(data, bytes):
        raise FormatError(f"{where}: array {name!r} has no binary 'data'")
    dt = np.dtype(dtype)
    expected = math.prod(shape) * dt.itemsize
    if len(data) != expected:
        raise FormatError(f"{where}: array {name!r} holds {len(data)} bytes, its shape {shape} needs {expected}")
    return np.frombuffer(data, dtype=dt).reshape(shape)


def _decode_final_area(doc: dict[str, Any], compact: tuple[int, ...], result: int,
                       where: str) -> tuple[np.ndarray | None, float | None, bool]:
    """The optional area fields: (ownership int8 ``compact``, margin, scored) or (None, None, False)."""
    present = [f for f in FINAL_AREA_FIELDS if f in doc]
    if not present:
        return None, None, False
    if len(present) != len(FINAL_AREA_FIELDS):
        missing = [f for f in FINAL_AREA_FIELDS if f not in doc]
        raise FormatError(f"{where}: field {present[0]!r} without {missing[0]!r} (the final area "
                          f"fields come together)")
    spec = _field(doc, "final_ownership", dict, where)
    if spec.get("dtype") != FINAL_OWNERSHIP_DTYPE:
        raise FormatError(f"{where}: array 'final_ownership' has dtype {spec.get('dtype')!r}, "
                          f"expected {FINAL_OWNERSHIP_DTYPE!r}")
    got = spec.get("shape")
    if not isinstance(got, list) or tuple(got) != compact:
        raise FormatError(f"{where}: array 'final_ownership' has shape {got!r}, expected the "
                          f"board shape {compact}")
    data = spec.get("data")
    if not isinstance(data, bytes) or len(data) != math.prod(compact):
        raise FormatError(f"{where}: array 'final_ownership' must hold {math.prod(compact)} bytes")
    own = np.frombuffer(data, dtype=np.int8).reshape(compact)
    if own.size and (own.min() < -1 or own.max() > 1):
        raise FormatError(f"{where}: final_ownership holds a value other than -1, 0 or 1")
    margin = _field(doc, "final_margin", (float, int), where)
    if not (math.isfinite(margin) and abs(margin) <= MAX_FINAL_MARGIN):
        raise FormatError(f"{where}: final_margin {margin!r} is not a finite number of at most "
                          f"{MAX_FINAL_MARGIN} points")
    scored = _field(doc, "final_area_scored", bool, where)
    if scored and (margin > 0) - (margin < 0) != result:
        raise FormatError(f"{where}: the game was scored on its final area, but final_margin "
                          f"{margin} disagrees with result {result}")
    return own, float(margin), scored


def decode_record(payload: bytes, where: str = "record") -> GameRecord:
    """Decode and validate one msgpack payload (already decompressed). Arrays of the result are
    read-only views of ``payload``."""
    doc = _unpack(payload, where)
    for f in _STR_FIELDS:
        v = _field(doc, f, str, where)
        limit = MAX_GAME_ID_BYTES if f == "game_id" else MAX_STRING_BYTES
        if len(v.encode()) > limit or (f in ("game_id", "game") and not v):
            raise FormatError(f"{where}: field {f!r} must be 1..{limit} bytes")
    gid = doc["game_id"]
    where = f"{where} (game {gid!r})"
    for f in _MAP_FIELDS:
        m = _field(doc, f, dict, where)
        if not all(isinstance(k, str) for k in m):
            raise FormatError(f"{where}: map {f!r} has a key that is not a string")
    if not all(v is None or isinstance(v, (str, int, float, bool)) for v in doc["game_options"].values()):
        raise FormatError(f"{where}: game_options values must be strings, numbers or booleans")
    seed = _field(doc, "seed", int, where)
    result = _int_in(doc, "result", -1, 1, where)
    for f in ("resigned", "resign_disabled"):
        _field(doc, f, bool, where)
    _int_in(doc, "resign_would_have", -1, 1, where)
    for f in ("started_at", "finished_at"):
        v = _field(doc, f, (float, int), where)
        if not math.isfinite(v):
            raise FormatError(f"{where}: field {f!r} is not finite")
    a = _int_in(doc, "num_actions", 1, MAX_ACTIONS, where)
    t = _int_in(doc, "positions", 0, MAX_POSITIONS, where)

    # the board shape comes from the boards array itself, bounded before use
    bspec = _field(doc, "boards", dict, where)
    bshape = bspec.get("shape")
    if (not isinstance(bshape, list) or not 2 <= len(bshape) <= MAX_BOARD_DIMS + 1
            or not all(isinstance(d, int) and not isinstance(d, bool) for d in bshape)):
        raise FormatError(f"{where}: array 'boards' has a malformed shape {bshape!r}")
    if not all(0 <= d <= MAX_BOARD_CELLS for d in bshape[1:]):
        raise FormatError(f"{where}: compact board shape {tuple(bshape[1:])} has a dimension outside 0..{MAX_BOARD_CELLS}")
    cells = math.prod(bshape[1:])
    if t > 0 and not 1 <= cells <= MAX_BOARD_CELLS:
        raise FormatError(f"{where}: compact board shape {tuple(bshape[1:])} is outside 1..{MAX_BOARD_CELLS} cells")
    boards = _decode_array(doc, "boards", (t, *bshape[1:]), where)

    to_play = _decode_array(doc, "to_play", (t,), where)
    actions = _decode_array(doc, "actions", (t,), where)
    legal = _decode_array(doc, "legal", (t, packed_width(a)), where)
    offsets = _decode_array(doc, "policy_offsets", (t + 1,), where)
    if offsets[0] != 0 or (t > 0 and np.any(np.diff(offsets) < 0)):
        raise FormatError(f"{where}: policy_offsets must start at 0 and never decrease")
    nnz = int(offsets[-1])
    if nnz > t * a:
        raise FormatError(f"{where}: {nnz} policy entries for {t} positions of {a} actions")
    pol_actions = _decode_array(doc, "policy_actions", (nnz,), where)
    pol_weights = _decode_array(doc, "policy_weights", (nnz,), where)
    root_values = _decode_array(doc, "root_values", (t,), where)
    full = _decode_array(doc, "full_search", (t,), where)
    outcomes = _decode_array(doc, "outcomes", (t,), where)
    snapshot = _decode_array(doc, "snapshot", (t,), where)

    if t:
        if np.any(boards.view(np.uint8) > 2):
            raise FormatError(f"{where}: a board cell holds a value other than 0, 1 or 2")
        if np.any((to_play != 0) & (to_play != 1)):
            raise FormatError(f"{where}: to_play holds a value other than 0 or 1")
        if actions.min() < 0 or actions.max() >= a:
            raise FormatError(f"{where}: an action is outside 0..{a - 1}")
        if np.any(full.view(np.uint8) > 1):
            raise FormatError(f"{where}: full_search holds a byte other than 0 or 1")
        if np.any(outcomes != np.where(to_play == 0, result, -result)):
            raise FormatError(f"{where}: outcomes disagree with result {result} seen from each mover")
        with np.errstate(invalid="ignore"):
            if np.any(np.isinf(root_values)) or np.any(np.abs(root_values) > 1.0 + 1e-4):
                raise FormatError(f"{where}: a root value is outside [-1, 1]")
        if snapshot.min() < -1:
            raise FormatError(f"{where}: a snapshot version is below -1")
    if nnz:
        if pol_actions.min() < 0 or pol_actions.max() >= a:
            raise FormatError(f"{where}: a policy action is outside 0..{a - 1}")
        if not np.all(np.isfinite(pol_weights)) or pol_weights.min() < 0:
            raise FormatError(f"{where}: a policy weight is negative or not finite")
    own, margin, scored = _decode_final_area(doc, tuple(bshape[1:]), result, where)

    return GameRecord(
        game_id=gid, game=doc["game"], game_options=doc["game_options"], worker_id=doc["worker_id"],
        seed=seed, search=doc["search"], result=result, boards=boards, to_play=to_play,
        actions=actions, legal=legal, policy_offsets=offsets, policy_actions=pol_actions,
        policy_weights=pol_weights, root_values=root_values, full_search=full, outcomes=outcomes,
        snapshot=snapshot, resigned=doc["resigned"], resign_disabled=doc["resign_disabled"],
        resign_would_have=doc["resign_would_have"], started_at=float(doc["started_at"]),
        finished_at=float(doc["finished_at"]), extra=doc["extra"], num_actions=a,
        final_ownership=own, final_margin=margin, final_area_scored=scored)


# ---- frames ------------------------------------------------------------------------------------

def encode_frame(payload: bytes, flags: int, level: int = 1) -> bytes:
    """One frame (length, CRC32, stored payload) for a shard with header ``flags``."""
    stored = zlib.compress(payload, level) if flags & FLAG_DEFLATE else payload
    if len(stored) > MAX_FRAME_BYTES:
        raise FormatError(f"a record of {len(stored)} bytes exceeds the frame limit of {MAX_FRAME_BYTES}")
    return FRAME_HEADER.pack(len(stored), zlib.crc32(stored)) + stored


def unpack_stored(stored: bytes, flags: int, where: str) -> bytes:
    """The msgpack payload of a frame's stored bytes (decompressed, bounded)."""
    if not flags & FLAG_DEFLATE:
        return stored
    d = zlib.decompressobj()
    try:
        out = d.decompress(stored, MAX_PAYLOAD_BYTES)
    except zlib.error as exc:
        raise FormatError(f"{where}: payload does not inflate ({exc})") from None
    if d.unconsumed_tail:
        raise FormatError(f"{where}: payload inflates beyond the limit of {MAX_PAYLOAD_BYTES} bytes")
    if not d.eof or d.unused_data:
        raise FormatError(f"{where}: compressed payload is truncated or has trailing bytes")
    return out


@dataclass
class Frame:
    """One frame found in a shard: its byte offset and the stored bytes (CRC already checked)."""

    index: int
    offset: int
    stored: bytes


def iter_frames(f: BinaryIO, size: int, where: str) -> Iterator[Frame]:
    """Frames of an open shard positioned after the header; ``size`` = file size in bytes.

    Checks each claimed length against the limit and the bytes left before reading it."""
    offset = HEADER.size
    index = 0
    while offset < size:
        loc = f"{where}: frame {index} at byte {offset}"
        if size - offset < FRAME_HEADER.size:
            raise FormatError(f"{loc}: truncated frame header ({size - offset} bytes left)")
        head = f.read(FRAME_HEADER.size)
        if len(head) != FRAME_HEADER.size:
            raise FormatError(f"{loc}: truncated frame header")
        length, crc = FRAME_HEADER.unpack(head)
        if length > MAX_FRAME_BYTES:
            raise FormatError(f"{loc}: claims {length} bytes, over the frame limit of {MAX_FRAME_BYTES}")
        left = size - offset - FRAME_HEADER.size
        if length > left:
            raise FormatError(f"{loc}: claims {length} bytes but only {left} remain (truncated shard)")
        stored = f.read(length)
        if len(stored) != length:
            raise FormatError(f"{loc}: truncated payload")
        if zlib.crc32(stored) != crc:
            raise FormatError(f"{loc}: CRC32 mismatch (damaged payload)")
        yield Frame(index, offset, stored)
        offset += FRAME_HEADER.size + length
        index += 1


def decode_shard_bytes(data: bytes, where: str = "shard") -> list[GameRecord]:
    """Decode a whole shard held in memory; raise FormatError at the first problem."""
    import io
    flags = decode_header(data[:HEADER.size], where)
    buf = io.BytesIO(data)
    buf.seek(HEADER.size)
    out = []
    for fr in iter_frames(buf, len(data), where):
        loc = f"{where}: frame {fr.index} at byte {fr.offset}"
        out.append(decode_record(unpack_stored(fr.stored, flags, loc), loc))
    return out


# ---- tolerant scanning: skip a damaged frame, resynchronise on the next sound one -------------

#: a resynchronisation candidate's payload must be at least this long (a game's msgpack map is
#: far longer; this keeps runs of zero bytes from reading as empty frames)
MIN_RESYNC_FRAME_BYTES = 16
#: first bytes a stored payload can start with: a zlib stream (CMF 0x78, RFC 1950) when the
#: shard deflates its frames, else a msgpack map (fixmap 0x80-0x8f, map16 0xde, map32 0xdf)
_FIRST_BYTE = {True: re.compile(rb"\x78", re.DOTALL),
               False: re.compile(rb"[\x80-\x8f\xde\xdf]", re.DOTALL)}


@dataclass
class Damage:
    """A damaged stretch of a shard: bytes ``offset`` up to ``end`` hold no sound frame.

    ``index`` is the frame number the damage starts at; ``at_end`` is true when the damage runs
    to the end of the file (a torn tail, when a writer died mid-append)."""

    index: int
    offset: int
    end: int
    reason: str
    at_end: bool = False

    @property
    def bytes(self) -> int:
        return self.end - self.offset


def sound_frame_length(buf: Any, offset: int, size: int) -> int | None:
    """Length of the sound frame (bounded length, matching CRC32) at ``offset``, else None."""
    if size - offset < FRAME_HEADER.size:
        return None
    length, crc = FRAME_HEADER.unpack_from(buf, offset)
    start = offset + FRAME_HEADER.size
    if length > MAX_FRAME_BYTES or length > size - start:
        return None
    if zlib.crc32(memoryview(buf)[start:start + length]) != crc:
        return None
    return length


def _resync(buf: Any, start: int, size: int, flags: int, budget: list[int]) -> int:
    """Offset of the next sound frame at or after ``start`` (``size`` if none).

    Candidates are the positions whose payload would start with a byte a payload can start with;
    each costs a CRC of its claimed length, charged to ``budget`` (bytes) so that a long stretch
    of garbage cannot make the search quadratic."""
    pattern = _FIRST_BYTE[bool(flags & FLAG_DEFLATE)]
    for m in pattern.finditer(buf, start + FRAME_HEADER.size):
        p = m.start() - FRAME_HEADER.size
        length = int.from_bytes(buf[p:p + 4], "little")
        if length < MIN_RESYNC_FRAME_BYTES or length > size - m.start() or length > MAX_FRAME_BYTES:
            continue
        budget[0] -= length
        if budget[0] < 0:
            return size
        if sound_frame_length(buf, p, size) == length:
            return p
    return size


def scan_frames(buf: Any, size: int, flags: int, where: str,
                start: int = HEADER.size) -> Iterator[Frame | Damage]:
    """Every sound frame of a shard held in ``buf`` (bytes or an mmap) and every damaged stretch
    between them, in file order. A frame whose CRC fails but whose length leads to a sound frame
    (or exactly to the end) is skipped alone; otherwise the scan resynchronises on the next
    position that holds a sound frame. Never raises for damage."""
    offset, index = start, 0
    budget = [64 * max(size, 1 << 20)]
    while offset < size:
        length = sound_frame_length(buf, offset, size)
        if length is not None:
            body = offset + FRAME_HEADER.size
            yield Frame(index, offset, bytes(memoryview(buf)[body:body + length]))
            offset = body + length
            index += 1
            continue
        loc = f"{where}: frame {index} at byte {offset}"
        if size - offset < FRAME_HEADER.size:
            yield Damage(index, offset, size, f"{loc}: truncated frame header ({size - offset} bytes left)", True)
            return
        claimed, _ = FRAME_HEADER.unpack_from(buf, offset)
        nxt = offset + FRAME_HEADER.size + claimed
        if claimed > MAX_FRAME_BYTES:
            reason = f"{loc}: claims {claimed} bytes, over the frame limit of {MAX_FRAME_BYTES}"
        elif nxt > size:
            left = size - offset - FRAME_HEADER.size
            reason = f"{loc}: claims {claimed} bytes but only {left} remain (truncated)"
        else:
            reason = f"{loc}: CRC32 mismatch (damaged payload)"
        if nxt < size and claimed <= MAX_FRAME_BYTES and sound_frame_length(buf, nxt, size) is not None:
            end = nxt  # the length was right: only this payload is damaged
        elif nxt == size:
            end = size
        else:
            end = _resync(buf, offset + 1, size, flags, budget)
        yield Damage(index, offset, end, reason, end >= size)
        offset = end
        index += 1
