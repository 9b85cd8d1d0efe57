"""Shard files on disk: write once (temporary name, fsync, rename), read back with every check.

A shard holds the frames of many games (see :mod:`selfplay.replay.codec`). Finished shards are
never rewritten; a damaged one is moved aside by the store (:mod:`selfplay.replay.store`).
"""

from __future__ import annotations

import mmap
import os
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO, Iterator

from selfplay.errors import FormatError
from selfplay.records import GameRecord
from selfplay.replay import codec
from selfplay.rundir import fsync_dir

#: file name suffix of a finished shard
SHARD_SUFFIX = ".plyrec"
#: suffix of a shard being written (discarded on recovery)
TEMP_SUFFIX = ".tmp"
#: suffix of a writer's open journal ``WRITER-NNNNNNNN.journal``: a shard being appended to,
#: game by game, that becomes ``WRITER-NNNNNNNN.plyrec`` by rename when it is sealed
JOURNAL_SUFFIX = ".journal"


@dataclass
class ShardScan:
    """What a full read of one shard found.

    ``records`` are the games of every sound frame, with the byte offset of their frame (the
    games after a damaged frame are kept); ``damaged`` lists the damaged stretches (a frame
    whose CRC or decoding failed, or bytes skipped to resynchronise); ``error`` is the first
    problem (None for a sound shard). A damaged header makes the whole file unreadable:
    ``header_ok`` is then false and ``records`` empty."""

    path: Path
    size: int
    flags: int = 0
    records: list[tuple[int, GameRecord]] = field(default_factory=list)
    damaged: list[codec.Damage] = field(default_factory=list)
    error: FormatError | None = None
    crc32: int = 0
    header_ok: bool = True

    @property
    def ok(self) -> bool:
        return self.error is None

    @property
    def torn_tail_only(self) -> bool:
        """The only damage is one stretch running to the end of the file (a cut append)."""
        return len(self.damaged) == 1 and self.damaged[0].at_end and self.header_ok


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


def _map(f: BinaryIO, size: int) -> Any:
    """The file's bytes, memory-mapped read-only (the page cache holds them, not the heap)."""
    return mmap.mmap(f.fileno(), size, access=mmap.ACCESS_READ)


def _decoded(fr: codec.Frame, flags: int, where: str) -> GameRecord:
    loc = f"{where}: frame {fr.index} at byte {fr.offset}"
    return codec.decode_record(codec.unpack_stored(fr.stored, flags, loc), loc)


def scan_shard(path: Path, *, decode: bool = True) -> ShardScan:
    """Read and check the whole shard at ``path``; never raises FormatError (problems are in
    :attr:`ShardScan.damaged` and :attr:`ShardScan.error`). A damaged frame is skipped and the
    scan goes on with the next sound one. ``decode=False`` checks frames and CRCs only. Reads
    only sizes it has checked against the limits and the file's length."""
    where = f"shard {path.name}"
    scan = ShardScan(path, 0)
    try:
        with open(path, "rb") as raw:
            scan.size = size = os.fstat(raw.fileno()).st_size
            try:
                scan.flags = codec.decode_header(raw.read(codec.HEADER.size), where)
            except FormatError as exc:
                scan.header_ok = False
                scan.error = exc
                scan.damaged.append(codec.Damage(0, 0, size, str(exc), True))
                return scan
            with _map(raw, size) as buf:
                scan.crc32 = zlib.crc32(buf)
                for item in codec.scan_frames(buf, size, scan.flags, where):
                    if isinstance(item, codec.Damage):
                        scan.damaged.append(item)
                        continue
                    if decode:
                        try:
                            scan.records.append((item.offset, _decoded(item, scan.flags, where)))
                        except FormatError as exc:
                            end = item.offset + codec.FRAME_HEADER.size + len(item.stored)
                            scan.damaged.append(codec.Damage(item.index, item.offset, end, str(exc), end >= size))
        if scan.damaged:
            scan.error = FormatError(scan.damaged[0].reason)
    except OSError as exc:
        scan.error = FormatError(f"{where}: cannot be read ({exc})")
        scan.header_ok = False
    return scan


def read_shard(path: Path, damaged: list[codec.Damage] | None = None) -> Iterator[tuple[int, GameRecord]]:
    """(frame offset, record) of every game in the shard.

    Without ``damaged``, raises FormatError at the first problem (the records before it have
    been yielded). With a list, a damaged frame is appended to it and reading goes on with the
    next sound frame; only an unreadable header (or file) still raises."""
    where = f"shard {path.name}"
    try:
        raw = open(path, "rb")
    except OSError as exc:
        raise FormatError(f"{where}: cannot be read ({exc})") from exc
    with raw:
        size = os.fstat(raw.fileno()).st_size
        flags = codec.decode_header(raw.read(codec.HEADER.size), where)
        with _map(raw, size) as buf:
            for item in codec.scan_frames(buf, size, flags, where):
                if isinstance(item, codec.Damage):
                    if damaged is None:
                        raise FormatError(item.reason)
                    damaged.append(item)
                    continue
                try:
                    rec = _decoded(item, flags, where)
                except FormatError as exc:
                    if damaged is None:
                        raise
                    end = item.offset + codec.FRAME_HEADER.size + len(item.stored)
                    damaged.append(codec.Damage(item.index, item.offset, end, str(exc), end >= size))
                    continue
                yield item.offset, rec
