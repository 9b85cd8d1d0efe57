"""Shard files on disk: write once (temporary name, fsync, rename), read back with every check.

A shard holds the frames of many games (see :mod:`selfplay.replay.codec`). Finished shards are
never rewritten; a damaged one is moved aside by the store (:mod:`selfplay.replay.store`).
"""

from __future__ import annotations

import os
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO, Iterator

from selfplay.errors import FormatError
from selfplay.records import GameRecord
from selfplay.replay import codec
from selfplay.rundir import fsync_dir

#: file name suffix of a finished shard
SHARD_SUFFIX = ".plyrec"
#: suffix of a shard being written (discarded on recovery)
TEMP_SUFFIX = ".tmp"


@dataclass
class ShardScan:
    """What a full read of one shard found.

    ``records`` are the games decoded before the first problem, with the byte offset of their
    frame; ``error`` is that problem (None for a sound shard)."""

    path: Path
    size: int
    flags: int = 0
    records: list[tuple[int, GameRecord]] = field(default_factory=list)
    error: FormatError | None = None
    crc32: int = 0

    @property
    def ok(self) -> bool:
        return self.error is None


def write_shard(final: Path, frames: list[bytes], flags: int, tmp: Path | None = None) -> tuple[int, int]:
    """Write header + ``frames`` to ``tmp``, fsync, rename to ``final``; return (bytes, CRC32 of
    the whole file). Refuses to replace an existing shard."""
    if final.exists():
        raise FormatError(f"shard {final.name} already exists; finished shards are never rewritten")
    tmp = tmp or final.with_name(f".{final.name}{TEMP_SUFFIX}")
    header = codec.encode_header(flags)
    crc = zlib.crc32(header)
    size = len(header)
    with open(tmp, "wb") as f:
        f.write(header)
        for fr in frames:
            f.write(fr)
            crc = zlib.crc32(fr, crc)
            size += len(fr)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, final)
    fsync_dir(final.parent)
    return size, crc


class _CrcReader:
    """File wrapper that keeps the CRC-32 of every byte read."""

    def __init__(self, f: BinaryIO) -> None:
        self.f = f
        self.crc = 0

    def read(self, n: int) -> bytes:
        data = self.f.read(n)
        self.crc = zlib.crc32(data, self.crc)
        return data


def scan_shard(path: Path, *, decode: bool = True) -> ShardScan:
    """Read and check the whole shard at ``path``; never raises FormatError (it is reported in
    :attr:`ShardScan.error`). ``decode=False`` checks frames and CRCs only. Reads only sizes
    it has checked against the limits and the file's length."""
    where = f"shard {path.name}"
    scan = ShardScan(path, 0)
    try:
        with open(path, "rb") as raw:
            scan.size = size = os.fstat(raw.fileno()).st_size
            f = _CrcReader(raw)
            scan.flags = codec.decode_header(f.read(codec.HEADER.size), where)
            for fr in codec.iter_frames(f, size, where):  # type: ignore[arg-type]
                if decode:
                    loc = f"{where}: frame {fr.index} at byte {fr.offset}"
                    rec = codec.decode_record(codec.unpack_stored(fr.stored, scan.flags, loc), loc)
                    scan.records.append((fr.offset, rec))
            scan.crc32 = f.crc
    except FormatError as exc:
        scan.error = exc
    except OSError as exc:
        scan.error = FormatError(f"{where}: cannot be read ({exc})")
    return scan


def read_shard(path: Path) -> Iterator[tuple[int, GameRecord]]:
    """(frame offset, record) of every game in the shard; raises FormatError at the first
    problem (records before it have been yielded)."""
    where = f"shard {path.name}"
    try:
        raw = open(path, "rb")
    except OSError as exc:
        raise FormatError(f"{where}: cannot be read ({exc})") from exc
    with raw:
        size = os.fstat(raw.fileno()).st_size
        flags = codec.decode_header(raw.read(codec.HEADER.size), where)
        for fr in codec.iter_frames(raw, size, where):
            loc = f"{where}: frame {fr.index} at byte {fr.offset}"
            yield fr.offset, codec.decode_record(codec.unpack_stored(fr.stored, flags, loc), loc)
