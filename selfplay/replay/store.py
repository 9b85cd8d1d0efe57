"""The record store: finished games batched into shards on disk and indexed in the catalog.

:class:`RecordStore` is the one writer of a run's ``shards/`` for its writer name (several
stores with different names may share a run directory and its catalog). Games are accepted with
:meth:`RecordStore.add_games`, held in memory as encoded frames, and written as one shard when
the batch reaches a game count, a byte size or an age (or on :meth:`RecordStore.flush`):
temporary name, fsync, rename, then the shard's and the games' catalog rows in one transaction.
A game id already committed (or already waiting) is ignored and counted in ``duplicates_total``.

Opening a store recovers the run: temporary files of dead writers are discarded, a finished
shard missing from the catalog is indexed, and a shard failing its checks (size, CRC, decoding)
is moved to ``RUN/quarantine/`` with a reason file; the games read before the damage are
re-written into a new shard so that only the damaged ones are lost.
"""

from __future__ import annotations

import fcntl
import functools
import json
import os
import re
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Iterable, Literal

from selfplay.errors import FormatError, RunDirError
from selfplay.metrics import MetricsLog
from selfplay.records import GameRecord
from selfplay.replay import codec
from selfplay.replay.catalog import Catalog, CatalogTotals, ShardRow, game_row
from selfplay.replay.shards import SHARD_SUFFIX, TEMP_SUFFIX, ShardScan, scan_shard, write_shard
from selfplay.rundir import RunDir, atomic_write_bytes

_WRITER_RE = re.compile(r"^[A-Za-z0-9_.]{1,64}$")
_SHARD_RE = re.compile(r"^([A-Za-z0-9_.]{1,64})-(\d{8})" + re.escape(SHARD_SUFFIX) + "$")


@dataclass
class IngestResult:
    """Outcome of :meth:`RecordStore.ingest`: the records accepted (new game ids) and how many
    were ignored as duplicates."""

    accepted: list[GameRecord]
    duplicates: int


@dataclass
class RecoveryReport:
    """What opening the store found and repaired."""

    temp_files_removed: list[str] = field(default_factory=list)
    shards_indexed: list[str] = field(default_factory=list)
    shards_quarantined: list[str] = field(default_factory=list)
    games_salvaged: int = 0
    games_lost: int = 0

    @property
    def clean(self) -> bool:
        return not (self.temp_files_removed or self.shards_indexed or self.shards_quarantined)


@dataclass
class _Pending:
    game_id: str
    frame: bytes
    row: tuple  # games row without (shard, frame_offset) filled in


def _locked(method):  # type: ignore[no-untyped-def]
    """Run a RecordStore method under the store's lock."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):  # type: ignore[no-untyped-def]
        with self._mutex:
            return method(self, *args, **kwargs)
    return wrapper


def shard_name(writer: str, index: int) -> str:
    return f"{writer}-{index:08d}{SHARD_SUFFIX}"


class RecordStore:
    """Writes finished games of one run directory to shards and the catalog.

    Parameters
    ----------
    run_dir: the run directory (created if missing).
    config: optional :class:`selfplay.replay.config.ReplayConfig`; its shard settings replace
        the keyword arguments below.
    writer: name of this writer; shard files are ``WRITER-NNNNNNNN.plyrec``. Only one open store
        per writer name (enforced with a lock file).
    max_games, max_bytes, max_age_seconds: a shard is written when the waiting games reach this
        count or this many encoded bytes, or when the oldest has waited this long (checked on
        each :meth:`add_games` and :meth:`flush_if_due`).
    compress: deflate each frame (header flag bit 0); about 3-5x smaller shards.
    verify: at open, check catalogued shards by ``"size"`` (cheap) or ``"full"`` (read every
        frame and its CRC).
    """

    def __init__(self, run_dir: str | os.PathLike[str] | RunDir, config: Any = None, *,
                 writer: str = "main", max_games: int = 512, max_bytes: int = 16 * 1024 * 1024,
                 max_age_seconds: float = 60.0, compress: bool = True,
                 verify: Literal["size", "full"] = "size") -> None:
        if config is not None:  # a ReplayConfig: its shard settings win over the keywords
            opts = config.store_options()
            max_games, max_bytes = int(opts["max_games"]), int(opts["max_bytes"])
            max_age_seconds, compress = float(opts["max_age_seconds"]), bool(opts["compress"])
            verify = opts["verify"]  # type: ignore[assignment]
        if not _WRITER_RE.match(writer):
            raise RunDirError(f"writer name {writer!r} must be 1-64 letters, digits, '_' or '.'")
        if max_games < 1 or max_bytes < 1 or max_age_seconds < 0:
            raise RunDirError("store limits max_games, max_bytes must be >= 1 and max_age_seconds >= 0")
        self.run = run_dir if isinstance(run_dir, RunDir) else RunDir.create(run_dir)
        if isinstance(run_dir, RunDir):
            RunDir.create(self.run.root)
        self.writer = writer
        self.max_games, self.max_bytes, self.max_age_seconds = max_games, max_bytes, max_age_seconds
        self.flags = codec.FLAG_DEFLATE if compress else 0
        self._lock_fd = self._take_lock(writer)
        self._mutex = threading.RLock()  # callers on several threads (e.g. a threaded actor)
        self._pending: list[_Pending] = []
        self._pending_ids: set[str] = set()
        self._pending_bytes = 0
        self._pending_since = 0.0
        #: shards this store has written since it opened (a cached catalog count older than a
        #: change of this number no longer matches ``pending_games``)
        self.shards_written = 0
        self._metrics: MetricsLog | None = None
        try:
            self.catalog = Catalog(self.run.catalog)
            try:
                self._next_index = self._first_free_index()
                self.recovery = self._recover(verify)
            except BaseException:
                self.catalog.close()
                raise
        except BaseException:
            os.close(self._lock_fd)
            self._lock_fd = -1
            raise

    # ---- lifetime ----------------------------------------------------------------------------
    def _take_lock(self, writer: str) -> int:
        path = self.run.shards / f".lock-{writer}"
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise RunDirError(f"run directory {str(self.run.root)!r} already has an open record "
                              f"store named {writer!r} (another process writes it)") from None
        return fd

    @_locked
    def close(self) -> None:
        """Write the waiting games and release the writer lock."""
        if self._lock_fd < 0:
            return
        try:
            self.flush()
        finally:
            self.catalog.close()
            os.close(self._lock_fd)
            self._lock_fd = -1

    def __enter__(self) -> "RecordStore":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # ---- writing -----------------------------------------------------------------------------
    @_locked
    def add_games(self, records: Iterable[GameRecord]) -> tuple[list[str], list[str]]:
        """Accept finished games; returns (added game ids, duplicate game ids) in input order.
        Added games are on disk after the next flush (automatic by count, size or age, or
        :meth:`flush`)."""
        recs = list(records)
        res = self.ingest(recs)
        added = [r.game_id for r in res.accepted]
        taken = set(added)
        dups = []
        for r in recs:
            if r.game_id in taken:
                taken.discard(r.game_id)  # the first occurrence was the one added
            else:
                dups.append(r.game_id)
        return added, dups

    @_locked
    def ingest(self, records: Iterable[GameRecord]) -> IngestResult:
        """Like :meth:`add_games`, returning the accepted records themselves. Every record is
        validated and encoded before any is accepted: a bad record raises FormatError and the
        whole call adds nothing."""
        self._check_open()
        recs = list(records)
        committed = self.catalog.known_ids({r.game_id for r in recs} - self._pending_ids)
        seen: set[str] = set()
        fresh: list[tuple[GameRecord, bytes]] = []
        duplicates = 0
        for r in recs:
            if r.game_id in self._pending_ids or r.game_id in committed or r.game_id in seen:
                duplicates += 1
                continue
            seen.add(r.game_id)
            frame = codec.encode_frame(codec.encode_record(r), self.flags)
            fresh.append((r, frame))
        now = time.time()
        for r, frame in fresh:
            if not self._pending:
                self._pending_since = time.monotonic()
            self._pending.append(_Pending(r.game_id, frame, game_row(r, "", 0, now)))
            self._pending_ids.add(r.game_id)
            self._pending_bytes += len(frame)
            if len(self._pending) >= self.max_games or self._pending_bytes >= self.max_bytes:
                self.flush()
        self.catalog.add_duplicates(duplicates)
        self.flush_if_due()
        return IngestResult([r for r, _ in fresh], duplicates)

    @_locked
    def flush_if_due(self) -> str | None:
        """Write the waiting games if the oldest has waited ``max_age_seconds``."""
        if self._pending and time.monotonic() - self._pending_since >= self.max_age_seconds:
            return self.flush()
        return None

    @_locked
    def flush(self) -> str | None:
        """Write the waiting games as one shard and commit it; returns the shard name (None if
        nothing was waiting)."""
        self._check_open()
        if not self._pending:
            return None
        name = shard_name(self.writer, self._next_index)
        final = self.run.shards / name
        tmp = self.run.shards / f".{name}{TEMP_SUFFIX}"
        try:
            size, crc = write_shard(final, [p.frame for p in self._pending], self.flags, tmp)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        self._next_index += 1
        offset = codec.HEADER.size
        rows = []
        for p in self._pending:
            r = p.row
            rows.append((r[0], name, offset) + r[3:])
            offset += len(p.frame)
        snaps_lo = [r[8] for r in rows if r[8] is not None]
        snaps_hi = [r[9] for r in rows if r[9] is not None]
        row = ShardRow(name, len(rows), sum(r[5] for r in rows), size, crc,
                       min(snaps_lo) if snaps_lo else None, max(snaps_hi) if snaps_hi else None,
                       time.time(), self.writer, codec.SCHEMA_VERSION)
        try:
            self.catalog.commit_shard(row, rows)
        except BaseException:
            # never committed: remove the file so a retry of these games is not a duplicate
            final.unlink(missing_ok=True)
            raise
        self._pending.clear()
        self._pending_ids.clear()
        self._pending_bytes = 0
        self.shards_written += 1
        return name

    @property
    def pending_games(self) -> int:
        """Games accepted but not yet in a shard."""
        return len(self._pending)

    @property
    def pending_positions(self) -> int:
        """Positions of the games accepted but not yet in a shard."""
        return sum(p.row[5] for p in self._pending)

    @_locked
    def stats(self) -> dict[str, Any]:
        """Committed counts (``games``, ``positions``, ``shards``, ``duplicates``,
        ``newest_snapshot``) and the waiting ones (``pending_games``, ``pending_positions``)."""
        t = self.totals()
        return {"games": t.games, "positions": t.positions, "shards": t.shards,
                "duplicates": t.duplicates, "newest_snapshot": t.newest_snapshot,
                "pending_games": self.pending_games, "pending_positions": self.pending_positions}

    def _check_open(self) -> None:
        if self._lock_fd < 0:
            raise RunDirError(f"record store of {str(self.run.root)!r} is closed")

    # ---- counts and metrics ------------------------------------------------------------------
    @_locked
    def totals(self) -> CatalogTotals:
        """Committed games, positions, shards, duplicates and newest snapshot (whole catalog)."""
        return self.catalog.totals()

    @_locked
    def log_metrics(self, **extra: Any) -> dict[str, Any]:
        """Append a ``buffer`` line to RUN/metrics.jsonl with the committed counts (plus
        ``extra`` fields, e.g. ``window_positions`` and ``window_capacity`` from a buffer)."""
        if self._metrics is None:
            self._metrics = MetricsLog(self.run.metrics, "buffer", self.writer)
        t = self.totals()
        return self._metrics.write(
            games_total=t.games, positions_total=t.positions, duplicates_total=t.duplicates,
            shards_total=t.shards, newest_snapshot_in_data=t.newest_snapshot,
            pending_games=self.pending_games, **extra)

    # ---- recovery ----------------------------------------------------------------------------
    def _first_free_index(self) -> int:
        used = -1
        names = {p.name for p in self.run.shards.iterdir()} | {p.name for p in self.run.quarantine.iterdir()}
        names |= self.catalog.shard_names() | self.catalog.quarantined_names()
        for n in names:
            m = _SHARD_RE.match(n.lstrip(".").removesuffix(TEMP_SUFFIX))
            if m and m.group(1) == self.writer:
                used = max(used, int(m.group(2)))
        return used + 1

    def _writer_is_dead(self, writer: str) -> bool:
        if writer == self.writer:
            return True
        path = self.run.shards / f".lock-{writer}"
        try:
            fd = os.open(path, os.O_RDWR)
        except OSError:
            return True
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            fcntl.flock(fd, fcntl.LOCK_UN)
            return True
        except OSError:
            return False
        finally:
            os.close(fd)

    def _recover(self, verify: str) -> RecoveryReport:
        rep = RecoveryReport()
        # 1. temporary files left by a crash (of this writer, or of a writer no longer running)
        for p in sorted(self.run.shards.iterdir()):
            if p.name.startswith(".") and p.name.endswith(TEMP_SUFFIX):
                m = _SHARD_RE.match(p.name[1:].removesuffix(TEMP_SUFFIX))
                if m and self._writer_is_dead(m.group(1)):
                    p.unlink(missing_ok=True)
                    rep.temp_files_removed.append(p.name)
        # 2. catalogued shards: present and of the recorded size (or fully sound)
        self._check_catalogued(verify, rep)
        # 3. finished shards the catalog does not know (a crash between rename and commit)
        known = self.catalog.shard_names()
        quarantined = self.catalog.quarantined_names()
        for p in sorted(self.run.shards.iterdir()):
            if not _SHARD_RE.match(p.name) or p.name in known:
                continue
            if p.name in quarantined:  # catalogued as quarantined, the move did not happen
                self._quarantine(p.name, scan_shard(p), "quarantined before a crash", rep)
                continue
            scan = scan_shard(p)
            if scan.ok:
                self._index(p.name, scan)
                rep.shards_indexed.append(p.name)
            else:
                self._quarantine(p.name, scan, str(scan.error), rep)
        return rep

    @_locked
    def verify(self, full: bool = True) -> RecoveryReport:
        """Check every catalogued shard now — its size, and with ``full`` every frame's CRC and
        decoding — and quarantine the damaged ones (salvaging the games before the damage)."""
        self._check_open()
        rep = RecoveryReport()
        self._check_catalogued("full" if full else "size", rep)
        return rep

    def _check_catalogued(self, verify: str, rep: RecoveryReport) -> None:
        for row in self.catalog.shards():
            path = self.run.shards / row.name
            if not path.exists():
                self._quarantine(row.name, None, f"shard file {row.name} is missing", rep)
                continue
            size = path.stat().st_size
            if size != row.bytes:
                self._quarantine(row.name, scan_shard(path),
                                 f"size {size} bytes differs from the catalog's {row.bytes}", rep)
            elif verify == "full":
                scan = scan_shard(path)
                if not scan.ok:
                    self._quarantine(row.name, scan, str(scan.error), rep)
                elif scan.crc32 != row.crc32:
                    self._quarantine(row.name, scan, "file CRC32 differs from the catalog's", rep)

    def _index(self, name: str, scan: ShardScan) -> None:
        now = time.time()
        rows = [game_row(rec, name, off, now) for off, rec in scan.records]
        lo = [r[8] for r in rows if r[8] is not None]
        hi = [r[9] for r in rows if r[9] is not None]
        m = _SHARD_RE.match(name)
        writer = m.group(1) if m else self.writer
        version = codec.SCHEMA_VERSION
        row = ShardRow(name, len(rows), sum(r[5] for r in rows), scan.size, scan.crc32,
                       min(lo) if lo else None, max(hi) if hi else None,
                       scan.path.stat().st_mtime, writer, version)
        self.catalog.commit_shard(row, rows)

    def _quarantine(self, name: str, scan: ShardScan | None, reason: str, rep: RecoveryReport) -> None:
        """Move a damaged shard aside; re-write the games read before the damage into a new
        shard; forget the rest (counted as lost)."""
        credited = set(self.catalog.game_offsets(name).values())
        salvage = [rec for _, rec in (scan.records if scan else [])]
        # games credited elsewhere stay there; salvage only those not committed in another shard
        elsewhere = self.catalog.known_ids(r.game_id for r in salvage) - credited
        salvage = [r for r in salvage if r.game_id not in elsewhere]
        lost = len(credited - {r.game_id for r in salvage})
        self.catalog.quarantine_shard(name, reason, lost, len(salvage))
        salvage_name = None
        if salvage:
            self.add_games(salvage)
            salvage_name = self.flush()
        self._move_to_quarantine(name, {"reason": reason, "games_lost": lost,
                                        "games_salvaged": len(salvage),
                                        "salvaged_into": salvage_name})
        rep.shards_quarantined.append(name)
        rep.games_salvaged += len(salvage)
        rep.games_lost += lost

    def _move_to_quarantine(self, name: str, info: dict[str, Any]) -> None:
        src = self.run.shards / name
        dst = self.run.quarantine / name
        info = {"shard": name, "moved_at": time.time(), **info}
        atomic_write_bytes(self.run.quarantine / f"{name}.reason.json",
                           (json.dumps(info, indent=2) + "\n").encode())
        if src.exists():
            if dst.exists():
                dst = self.run.quarantine / f"{name}.{int(time.time())}"
            os.replace(src, dst)


def open_catalog_readonly(run_dir: str | os.PathLike[str]) -> Catalog:
    """The catalog of an existing run, read-only (for monitoring and readers)."""
    run = RunDir.open(run_dir)
    if not run.catalog.exists():
        raise FormatError(f"run directory {str(run.root)!r} has no catalog.sqlite yet (no games stored)")
    return Catalog(run.catalog, readonly=True)
