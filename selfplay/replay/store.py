"""The record store: finished games made durable in a journal, sealed into shards, indexed in
the catalog.

:class:`RecordStore` is the one writer of a run's ``shards/`` for its writer name (several
stores with different names may share a run directory and its catalog). :meth:`RecordStore.ingest`
validates and encodes the games, **appends their frames to the writer's open journal**
(``shards/WRITER-NNNNNNNN.journal``: a shard header, then frames with their length and CRC32),
fsyncs it, and commits the games' catalog rows in one transaction — all before it returns. So a
game counted as stored is on disk (one fsync and one SQLite commit per call: the delay before a
game is durable is the call itself), and the catalog's live counts include it at once. The game
id is UNIQUE in the catalog: a retried game is ignored and counted in ``duplicates_total``.

The journal is **sealed** into the shard ``WRITER-NNNNNNNN.plyrec`` by a rename (it already has
the shard layout) when it reaches a game count, a byte size or an age (or on :meth:`flush` /
:meth:`close`); the shard's catalog row is committed then, and readers (which walk sealed shards)
see the games.

Opening a store recovers the run: stale temporary files are removed; the journal of this writer
(or of any writer no longer running) is replayed — its sound frames are kept, a torn tail (a
crash in the middle of an append) is cut, their catalog rows are re-committed if missing — and
sealed; a finished shard missing from the catalog is indexed; a shard failing its checks (size,
CRC, decoding) or holding another game than ``run.toml`` declares is moved to ``RUN/quarantine/``
with a reason file, its sound games re-written into a new shard first so that only the damaged
ones are lost.

On a full or read-only disk an append is undone (the journal is cut back to its last whole frame),
the call raises :class:`StoreWriteError` (one line), and the store refuses further games; what it
had accepted stays in the journal for the next open.
"""

from __future__ import annotations

import errno
import fcntl
import functools
import json
import logging
import os
import re
import sqlite3
import threading
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Literal

from selfplay.errors import FormatError, RunDirError, SelfplayError
from selfplay.metrics import MetricsLog
from selfplay.records import GameRecord
from selfplay.replay import codec
from selfplay.replay.catalog import Catalog, CatalogTotals, ShardRow, game_row
from selfplay.replay.reader import declared_game_key, normalised_game_key
from selfplay.replay.shards import (JOURNAL_SUFFIX, SHARD_SUFFIX, TEMP_SUFFIX, ShardScan, scan_shard,
                                    write_shard)
from selfplay.rundir import RunDir, atomic_write_bytes, clean_stale_temp_files, fsync_dir

log = logging.getLogger(__name__)

_WRITER_RE = re.compile(r"^[A-Za-z0-9_.]{1,64}$")
_SHARD_RE = re.compile(r"^([A-Za-z0-9_.]{1,64})-(\d{8})" + re.escape(SHARD_SUFFIX) + "$")
_JOURNAL_RE = re.compile(r"^([A-Za-z0-9_.]{1,64})-(\d{8})" + re.escape(JOURNAL_SUFFIX) + "$")


class StoreWriteError(SelfplayError):
    """The store could not write (disk full, read-only, I/O error). The games of the failing
    call were not accepted; every game accepted before is in the journal."""


@dataclass
class IngestResult:
    """Outcome of :meth:`RecordStore.ingest`: the records accepted (new game ids, durable: on
    disk and in the catalog) and how many were ignored as duplicates."""

    accepted: list[GameRecord]
    duplicates: int


@dataclass
class RecoveryReport:
    """What opening the store (or :meth:`RecordStore.verify`) found and repaired.

    ``journals_replayed``: journals of a stopped writer sealed into shards, with
    ``journal_games`` the games they held; ``journal_tails_cut``: journal name -> bytes of a
    torn last append cut off; ``games_forgotten``: catalog rows whose journal is gone."""

    temp_files_removed: list[str] = field(default_factory=list)
    shards_indexed: list[str] = field(default_factory=list)
    shards_quarantined: list[str] = field(default_factory=list)
    journals_replayed: list[str] = field(default_factory=list)
    journal_games: int = 0
    journal_tails_cut: dict[str, int] = field(default_factory=dict)
    games_salvaged: int = 0
    games_lost: int = 0
    games_forgotten: int = 0
    reasons: dict[str, str] = field(default_factory=dict)
    #: catalog.sqlite was missing and has been built from the shards and journals on disk
    catalog_rebuilt: bool = False
    games_found: int = 0

    @property
    def clean(self) -> bool:
        return not (self.temp_files_removed or self.shards_indexed or self.shards_quarantined
                    or self.journals_replayed or self.games_forgotten)

    def lines(self) -> list[str]:
        """The report as short sentences for a person."""
        out = []
        if self.catalog_rebuilt:
            out.append(f"catalog.sqlite was missing: rebuilt it from the shards, found {self.games_found} games")
        if self.temp_files_removed:
            out.append(f"removed {len(self.temp_files_removed)} stale temporary file(s)")
        for name in self.journals_replayed:
            cut = self.journal_tails_cut.get(name)
            out.append(f"replayed journal {name}" + (f" (cut a torn tail of {cut} bytes)" if cut else ""))
        if self.shards_indexed:
            out.append(f"indexed {len(self.shards_indexed)} shard(s) missing from the catalog")
        for name in self.shards_quarantined:
            out.append(f"quarantined {name}: {self.reasons.get(name, 'damaged')}")
        if self.shards_quarantined or self.games_salvaged or self.games_lost:
            out.append(f"games salvaged {self.games_salvaged}, lost {self.games_lost}")
        if self.games_forgotten:
            out.append(f"forgot {self.games_forgotten} catalog row(s) whose journal is gone")
        return out


@dataclass
class _Journal:
    """The open journal: the shard it becomes, its file, and running totals."""

    name: str            # shard name it is sealed into (WRITER-NNNNNNNN.plyrec)
    path: Path
    fd: int
    size: int
    crc: int
    games: int = 0
    positions: int = 0
    snap_lo: int | None = None
    snap_hi: int | None = None
    since: float = 0.0   # time.monotonic() of its first game


def _locked(method):  # type: ignore[no-untyped-def]
    """Run a RecordStore method under the store's lock."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):  # type: ignore[no-untyped-def]
        with self._mutex:
            return method(self, *args, **kwargs)
    return wrapper


def shard_name(writer: str, index: int) -> str:
    return f"{writer}-{index:08d}{SHARD_SUFFIX}"


def journal_path_of(shards_dir: Path, name: str) -> Path:
    """The journal file that becomes shard ``name``."""
    return shards_dir / (name.removesuffix(SHARD_SUFFIX) + JOURNAL_SUFFIX)


def writer_running(run: RunDir, writer: str) -> bool:
    """True if a process holds the lock of record store ``writer`` in ``run`` (it is open)."""
    try:
        fd = os.open(run.shards / f".lock-{writer}", os.O_RDWR)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        fcntl.flock(fd, fcntl.LOCK_UN)
        return False
    except OSError:
        return True
    finally:
        os.close(fd)


def running_writers(run: RunDir) -> list[str]:
    """Names of the record stores open on ``run`` right now."""
    if not run.shards.exists():
        return []
    names = sorted(p.name.removeprefix(".lock-") for p in run.shards.glob(".lock-*"))
    return [n for n in names if writer_running(run, n)]


def _sync_data(fd: int) -> None:
    """Make appended bytes durable: fdatasync (the data and the file size it needs) where the
    system has it, else fsync."""
    (getattr(os, "fdatasync", None) or os.fsync)(fd)


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        n = os.write(fd, view)
        view = view[n:]


def _write_error(what: str, exc: OSError, kept: bool = True) -> StoreWriteError:
    """One line for a failed write: what failed, why, and what became of the games."""
    if exc.errno == errno.ENOSPC:
        why, fix = "the disk is full", "free space"
    elif exc.errno == errno.EROFS:
        why, fix = "the file system is read-only", "make it writable"
    elif exc.errno == errno.EDQUOT:
        why, fix = "the disk quota is used up", "free space"
    else:
        why, fix = exc.strerror or str(exc), "fix it"
    if not kept:
        return StoreWriteError(f"{what}: {why}")
    return StoreWriteError(f"{what}: {why}; games accepted before are kept in the journal — {fix} and "
                           "start again (they are sealed when the store next opens)")


class RecordStore:
    """Writes finished games of one run directory to its journal, shards and the catalog.

    Parameters
    ----------
    run_dir: the run directory (created if missing).
    config: optional :class:`selfplay.replay.config.ReplayConfig`; its shard settings replace
        the keyword arguments below.
    writer: name of this writer; shard files are ``WRITER-NNNNNNNN.plyrec``. Only one open store
        per writer name (enforced with a lock file).
    max_games, max_bytes, max_age_seconds: the journal is sealed into a shard when it holds this
        many games or this many frame bytes, or when its oldest game has waited this long
        (checked on each :meth:`ingest` and :meth:`flush_if_due`). The games are durable either
        way; sealing only makes them visible to readers of shards.
    compress: deflate each frame (header flag bit 0); about 3-5x smaller shards.
    verify: at open, check catalogued shards by ``"size"``, ``"crc"`` (the whole file's CRC32
        against the catalog's; reads every byte, decodes nothing) or ``"full"`` (every frame
        decoded, and its game compared with run.toml's).
    say: where the recovery lines (:meth:`RecoveryReport.lines`) go; default: this module's
        logger, as warnings.
    """

    def __init__(self, run_dir: str | os.PathLike[str] | RunDir, config: Any = None, *,
                 writer: str = "main", max_games: int = 512, max_bytes: int = 16 * 1024 * 1024,
                 max_age_seconds: float = 60.0, compress: bool = True,
                 verify: Literal["size", "crc", "full"] = "crc",
                 say: Callable[[str], None] | None = None) -> None:
        if config is not None:  # a ReplayConfig: its shard settings win over the keywords
            opts = config.store_options()
            max_games, max_bytes = int(opts["max_games"]), int(opts["max_bytes"])
            max_age_seconds, compress = float(opts["max_age_seconds"]), bool(opts["compress"])
            verify = opts["verify"]  # type: ignore[assignment]
        if not _WRITER_RE.match(writer):
            raise RunDirError(f"writer name {writer!r} must be 1-64 letters, digits, '_' or '.'")
        if max_games < 1 or max_bytes < 1 or max_age_seconds < 0:
            raise RunDirError("store limits max_games, max_bytes must be >= 1 and max_age_seconds >= 0")
        if verify not in ("size", "crc", "full"):
            raise RunDirError(f"verify={verify!r} must be 'size', 'crc' or 'full'")
        root = run_dir.root if isinstance(run_dir, RunDir) else run_dir
        try:
            self.run = RunDir.create(root)
            self.writer = writer
            self._lock_fd = self._take_lock(writer)
        except OSError as exc:  # e.g. a read-only or full file system
            raise _write_error(f"cannot open a record store in {str(root)!r}", exc, kept=False) from None
        self.max_games, self.max_bytes, self.max_age_seconds = max_games, max_bytes, max_age_seconds
        self.flags = codec.FLAG_DEFLATE if compress else 0
        self._mutex = threading.RLock()  # callers on several threads (e.g. a threaded actor)
        self._journal: _Journal | None = None
        self._failed: str | None = None
        #: shards this store has sealed since it opened
        self.shards_written = 0
        #: catalog commits this store has made since it opened (games or shards): a cached
        #: catalog count older than a change of this number is stale
        self.commits = 0
        self._metrics: MetricsLog | None = None
        self._run_game = declared_game_key(self.run)
        had_catalog = self.run.catalog.exists()
        try:
            self.catalog = Catalog(self.run.catalog)
            try:
                self._next_index = self._first_free_index()
                self.recovery = self._recover(verify)
                if not had_catalog and (self.recovery.shards_indexed or self.recovery.journals_replayed):
                    self.recovery.catalog_rebuilt = True
                    self.recovery.games_found = self.catalog.totals().games
                for line in self.recovery.lines():  # a person reading the run's log learns it
                    if say is not None:
                        say(line)
                    else:
                        log.warning("record store %s of %s: %s", writer, self.run.root, line)
            except BaseException:
                self.catalog.close()
                raise
        except BaseException:
            os.close(self._lock_fd)
            self._lock_fd = -1
            raise

    # ---- lifetime ----------------------------------------------------------------------------
    def _take_lock(self, writer: str) -> int:
        fd = self._try_lock(writer)
        if fd is None:
            raise RunDirError(f"run directory {str(self.run.root)!r} already has an open record "
                              f"store named {writer!r} (another process writes it)")
        return fd

    def _try_lock(self, writer: str) -> int | None:
        """The writer's lock file descriptor, locked; None if another process holds it."""
        path = self.run.shards / f".lock-{writer}"
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            return None
        return fd

    @_locked
    def close(self) -> None:
        """Seal the journal into a shard and release the writer lock. If sealing fails (e.g.
        the disk is full) the journal stays on disk and is sealed at the next open."""
        if self._lock_fd < 0:
            return
        try:
            if self._failed is None:
                self.flush()
        finally:
            self._close_journal_fd()
            self.catalog.close()
            os.close(self._lock_fd)
            self._lock_fd = -1

    def __enter__(self) -> "RecordStore":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # ---- the run's game ------------------------------------------------------------------------
    def foreign_game(self, rec: GameRecord) -> str | None:
        """None if ``rec`` is of the game run.toml declares (or the run declares none);
        otherwise why not."""
        if self._run_game is None or normalised_game_key(rec.game, rec.game_options) == self._run_game:
            return None
        return (f"game {rec.game} {json.dumps(rec.game_options, sort_keys=True)} differs from "
                f"run.toml's {self._run_game[0]} {self._run_game[1]}")

    # ---- writing -----------------------------------------------------------------------------
    @_locked
    def add_games(self, records: Iterable[GameRecord]) -> tuple[list[str], list[str]]:
        """Accept finished games; returns (added game ids, duplicate game ids) in input order.
        Added games are durable when this returns (see :meth:`ingest`)."""
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
        """Store finished games; returns the accepted records (new game ids) and the number of
        duplicates. Every record is validated and encoded before any is written: a bad record
        (or one of another game than run.toml's) raises FormatError and the call adds nothing.
        The accepted games are appended to the journal, synced and committed to the catalog
        before this returns. A write failure raises :class:`StoreWriteError`: the games of the
        failing append are not stored (when one call fills several shards, those of the shards
        before it are, and a retry of the call counts them as duplicates)."""
        self._check_open()
        recs = list(records)
        committed = self.catalog.known_ids({r.game_id for r in recs})
        seen: set[str] = set()
        fresh: list[tuple[GameRecord, bytes]] = []
        duplicates = 0
        for r in recs:
            if r.game_id in committed or r.game_id in seen:
                duplicates += 1
                continue
            seen.add(r.game_id)
            why = self.foreign_game(r)
            if why is not None:
                raise FormatError(f"record {r.game_id!r} refused: its {why}")
            frame = codec.encode_frame(codec.encode_record(r), self.flags)
            fresh.append((r, frame))
        if not fresh:
            if duplicates:
                self.catalog.add_duplicates(duplicates)
            self.flush_if_due()
            return IngestResult([], duplicates)
        accepted: list[GameRecord] = []
        todo = fresh
        while todo:  # a shard never holds more than max_games games (or much over max_bytes)
            j = self._open_journal()
            room_games = max(1, self.max_games - j.games)
            take, room_bytes = 0, self.max_bytes - (j.size - codec.HEADER.size)
            while take < min(room_games, len(todo)) and (take == 0 or len(todo[take][1]) <= room_bytes):
                room_bytes -= len(todo[take][1])
                take += 1
            accepted += self._append(todo[:take], duplicates)
            duplicates, todo = 0, todo[take:]
            if j.games >= self.max_games or j.size - codec.HEADER.size >= self.max_bytes:
                self.flush()
        self.flush_if_due()
        return IngestResult(accepted, len(recs) - len(accepted))

    def _append(self, fresh: list[tuple[GameRecord, bytes]], duplicates: int) -> list[GameRecord]:
        """Append frames to the journal, fsync, commit their rows; undo the append on failure."""
        j = self._open_journal()
        start = j.size
        blob = b"".join(frame for _, frame in fresh)
        try:
            _write_all(j.fd, blob)
            _sync_data(j.fd)
        except OSError as exc:
            self._cut_back(j, start)
            self._failed = str(_write_error(f"cannot append to journal {j.path.name}", exc))
            raise StoreWriteError(self._failed) from None
        now = time.time()
        rows, offset = [], start
        for r, frame in fresh:
            rows.append(game_row(r, j.name, offset, now))
            offset += len(frame)
        try:
            new_ids = set(self.catalog.commit_games(rows, duplicates))
        except sqlite3.OperationalError as exc:
            self._cut_back(j, start)
            self._failed = (f"cannot commit games to the catalog ({exc}); games accepted before are "
                            "kept in the journal — fix the cause and start again")
            raise StoreWriteError(self._failed) from None
        self.commits += 1
        j.size = offset
        j.crc = zlib.crc32(blob, j.crc)
        accepted = [r for r, _ in fresh if r.game_id in new_ids]
        if accepted and j.games == 0:
            j.since = time.monotonic()
        for r in accepted:
            j.games += 1
            j.positions += r.num_positions
            if r.num_positions:
                lo, hi = int(r.snapshot.min()), int(r.snapshot.max())
                j.snap_lo = lo if j.snap_lo is None else min(j.snap_lo, lo)
                j.snap_hi = hi if j.snap_hi is None else max(j.snap_hi, hi)
        if not j.games and j.size > codec.HEADER.size:
            j.since = time.monotonic()  # only frames credited elsewhere: seal them with the age rule
        return accepted

    def _cut_back(self, j: _Journal, size: int) -> None:
        """Undo a partial append: the journal ends at its last whole frame again."""
        try:
            os.ftruncate(j.fd, size)
            os.lseek(j.fd, size, os.SEEK_SET)
            os.fsync(j.fd)
        except OSError:
            pass  # recovery cuts the torn tail at the next open

    def _open_journal(self) -> _Journal:
        if self._journal is not None:
            return self._journal
        name = shard_name(self.writer, self._next_index)
        path = journal_path_of(self.run.shards, name)
        header = codec.encode_header(self.flags)
        try:
            atomic_write_bytes(path, header)  # a journal always has its whole header
            fd = os.open(path, os.O_WRONLY)
            os.lseek(fd, 0, os.SEEK_END)
        except OSError as exc:
            self._failed = str(_write_error(f"cannot start journal {path.name}", exc))
            raise StoreWriteError(self._failed) from None
        self._journal = _Journal(name, path, fd, len(header), zlib.crc32(header))
        return self._journal

    def _close_journal_fd(self) -> None:
        if self._journal is not None and self._journal.fd >= 0:
            os.close(self._journal.fd)
            self._journal.fd = -1
            self._journal = None

    @_locked
    def flush_if_due(self) -> str | None:
        """Seal the journal if its oldest game has waited ``max_age_seconds``."""
        j = self._journal
        if j is not None and j.size > codec.HEADER.size and \
                time.monotonic() - j.since >= self.max_age_seconds:
            return self.flush()
        return None

    @_locked
    def flush(self) -> str | None:
        """Seal the journal into its shard (a rename) and commit the shard's catalog row;
        returns the shard name (None if the journal held nothing)."""
        self._check_open()
        j = self._journal
        if j is None:
            return None
        if j.size <= codec.HEADER.size:
            return None
        final = self.run.shards / j.name
        if final.exists():
            raise FormatError(f"shard {j.name} already exists; finished shards are never rewritten")
        os.close(j.fd)
        j.fd = -1
        self._journal = None
        try:
            os.replace(j.path, final)
            fsync_dir(final.parent)
        except OSError as exc:  # the journal stays; sealed at the next open
            self._failed = str(_write_error(f"cannot seal journal {j.path.name}", exc))
            raise StoreWriteError(self._failed) from None
        self._next_index += 1
        row = ShardRow(j.name, j.games, j.positions, j.size, j.crc, j.snap_lo, j.snap_hi,
                       time.time(), self.writer, codec.SCHEMA_VERSION)
        try:
            self.catalog.seal_shard(row)
        except sqlite3.OperationalError as exc:  # the shard is indexed at the next open
            self._failed = f"cannot commit shard {j.name} to the catalog ({exc})"
            raise StoreWriteError(self._failed) from None
        self.commits += 1
        self.shards_written += 1
        return j.name

    @property
    def pending_games(self) -> int:
        """Games accepted but not yet on disk: always 0, since :meth:`ingest` writes them
        before it returns (kept for callers that add it to the durable count)."""
        return 0

    @property
    def pending_positions(self) -> int:
        """Positions accepted but not yet on disk: always 0 (see :attr:`pending_games`)."""
        return 0

    @property
    def journal_games(self) -> int:
        """Durable games in the open journal, not yet sealed into a shard."""
        return self._journal.games if self._journal is not None else 0

    @property
    def journal_positions(self) -> int:
        """Positions of :attr:`journal_games`."""
        return self._journal.positions if self._journal is not None else 0

    @_locked
    def stats(self) -> dict[str, Any]:
        """Durable counts of the catalog (``games``, ``positions``, ``shards``, ``duplicates``,
        ``newest_snapshot``; games in the journal included) and this writer's unsealed ones
        (``journal_games``, ``journal_positions``; ``pending_*`` are always 0)."""
        t = self.totals()
        return {"games": t.games, "positions": t.positions, "shards": t.shards,
                "duplicates": t.duplicates, "newest_snapshot": t.newest_snapshot,
                "pending_games": 0, "pending_positions": 0,
                "journal_games": self.journal_games, "journal_positions": self.journal_positions}

    def _check_open(self) -> None:
        if self._lock_fd < 0:
            raise RunDirError(f"record store of {str(self.run.root)!r} is closed")
        if self._failed is not None:
            raise StoreWriteError(f"record store of {str(self.run.root)!r} stopped: {self._failed}")

    # ---- counts and metrics ------------------------------------------------------------------
    @_locked
    def totals(self) -> CatalogTotals:
        """Durable games, positions, shards, duplicates and newest snapshot (whole catalog)."""
        return self.catalog.totals()

    @_locked
    def log_metrics(self, **extra: Any) -> dict[str, Any]:
        """Append a ``buffer`` line to RUN/metrics.jsonl with the durable counts (plus
        ``extra`` fields, e.g. ``window_positions`` and ``window_capacity`` from a buffer)."""
        if self._metrics is None:
            self._metrics = MetricsLog(self.run.metrics, "buffer", self.writer)
        t = self.totals()
        return self._metrics.write(
            games_total=t.games, positions_total=t.positions, duplicates_total=t.duplicates,
            shards_total=t.shards, newest_snapshot_in_data=t.newest_snapshot,
            pending_games=0, **extra)

    # ---- recovery ----------------------------------------------------------------------------
    def _first_free_index(self) -> int:
        used = -1
        names = {p.name for p in self.run.shards.iterdir()} | {p.name for p in self.run.quarantine.iterdir()}
        names |= self.catalog.shard_names() | self.catalog.quarantined_names()
        names |= self.catalog.unsealed_shard_names()
        for n in names:
            base = n.lstrip(".").removesuffix(TEMP_SUFFIX)
            m = _SHARD_RE.match(base) or _JOURNAL_RE.match(base)
            if not m:
                q = re.match(r"^(.*?)(\.\d+)?$", base)  # a quarantined copy NAME.TIME
                m = _SHARD_RE.match(q.group(1)) or _JOURNAL_RE.match(q.group(1)) if q else None
            if m and m.group(1) == self.writer:
                used = max(used, int(m.group(2)))
        return used + 1

    def _writer_is_dead(self, writer: str) -> bool:
        return writer == self.writer or not writer_running(self.run, writer)

    def _recover(self, verify: str) -> RecoveryReport:
        rep = RecoveryReport()
        # 1. temporary files left by a crash (of this writer, or of a writer no longer running)
        rep.temp_files_removed.extend(clean_stale_temp_files(self.run))
        for p in sorted(self.run.shards.iterdir()):
            if p.name.startswith(".") and p.name.endswith(TEMP_SUFFIX):
                base = p.name[1:].removesuffix(TEMP_SUFFIX)
                m = _SHARD_RE.match(base) or _JOURNAL_RE.match(base)
                if m and self._writer_is_dead(m.group(1)):
                    p.unlink(missing_ok=True)
                    rep.temp_files_removed.append(p.name)
        # 2. journals of writers no longer running: replay and seal them
        for p in sorted(self.run.shards.iterdir()):
            m = _JOURNAL_RE.match(p.name)
            if not m:
                continue
            if m.group(1) == self.writer:
                self._replay_journal(p, rep)
                continue
            fd = self._try_lock(m.group(1))
            if fd is None:
                continue  # its writer is running
            try:
                self._replay_journal(p, rep)
            finally:
                os.close(fd)
        # 3. catalogued shards: present and sound at the level asked
        self._check_catalogued(verify, rep)
        # 4. finished shards the catalog does not know (a crash between rename and commit)
        known = self.catalog.shard_names()
        quarantined = self.catalog.quarantined_names()
        for p in sorted(self.run.shards.iterdir()):
            if not _SHARD_RE.match(p.name) or p.name in known:
                continue
            if p.name in quarantined:  # catalogued as quarantined, the move did not happen
                self._quarantine(p.name, scan_shard(p), "quarantined before a crash", rep)
                continue
            scan = scan_shard(p)
            foreign = self._foreign_in(scan)
            if scan.ok and foreign is None:
                self._index(p.name, scan)
                rep.shards_indexed.append(p.name)
            else:
                self._quarantine(p.name, scan, str(scan.error) if foreign is None else foreign, rep)
        # 5. game rows whose journal is gone (nothing on disk holds them any more)
        for name in sorted(self.catalog.unsealed_shard_names()):
            if (self.run.shards / name).exists() or journal_path_of(self.run.shards, name).exists():
                continue
            rep.games_forgotten += self.catalog.forget_games_of(name)
        return rep

    def _foreign_in(self, scan: ShardScan) -> str | None:
        for _, rec in scan.records:
            why = self.foreign_game(rec)
            if why is not None:
                return f"holds a {why}"
        return None

    def _replay_journal(self, path: Path, rep: RecoveryReport) -> None:
        """Seal the journal at ``path`` of a stopped writer: keep its sound frames (cut a torn
        tail; re-write the sound frames into the shard if damage sits in the middle), make sure
        the catalog credits them, and commit the shard."""
        name = path.name.removesuffix(JOURNAL_SUFFIX) + SHARD_SUFFIX
        final = self.run.shards / name
        m = _JOURNAL_RE.match(path.name)
        writer = m.group(1) if m else self.writer
        if not path.exists():  # another store replayed it while this one waited for its lock
            return
        if final.exists():
            # a crash after the sound frames were re-written into the shard and before the
            # journal was moved aside: the shard is the copy; credit its offsets
            done = scan_shard(final)
            if done.header_ok and name not in self.catalog.shard_names():
                rows = [game_row(rec, name, off, time.time()) for off, rec in done.records]
                self.catalog.commit_shard(self._shard_row(name, rows, done.size, done.crc32, writer),
                                          rows, replace=True)
            self._move_to_quarantine(path.name, {"reason": f"journal already re-written into {name}"})
            rep.journals_replayed.append(path.name)
            return
        scan = scan_shard(path)
        if not scan.header_ok:
            lost = self.catalog.forget_games_of(name)
            self._move_to_quarantine(path.name, {"reason": str(scan.error), "games_lost": lost})
            rep.games_lost += lost
            rep.reasons[path.name] = str(scan.error)
            rep.shards_quarantined.append(path.name)
            return
        keep = [(off, rec) for off, rec in scan.records if self.foreign_game(rec) is None]
        if not keep:
            rep.games_lost += self.catalog.forget_games_of(name)
            path.unlink()
            fsync_dir(path.parent)
            rep.journals_replayed.append(path.name)
            return
        rows: list[tuple] = []
        now = time.time()
        if (scan.ok or scan.torn_tail_only) and len(keep) == len(scan.records):
            if scan.damaged:  # a torn last append: cut it off
                cut = scan.damaged[0]
                with open(path, "r+b") as f:
                    f.truncate(cut.offset)
                    f.flush()
                    os.fsync(f.fileno())
                rep.journal_tails_cut[path.name] = cut.bytes
            size = path.stat().st_size
            crc = _file_crc(path)
            rows = [game_row(rec, name, off, now) for off, rec in keep]
            os.replace(path, final)
            fsync_dir(final.parent)
        else:
            # damage in the middle (or foreign games): the sound frames go into a fresh shard
            frames = [codec.encode_frame(codec.encode_record(rec), scan.flags) for _, rec in keep]
            size, crc = write_shard(final, frames, scan.flags)
            off = codec.HEADER.size
            for (_, rec), fr in zip(keep, frames):
                rows.append(game_row(rec, name, off, now))
                off += len(fr)
            reasons = "; ".join(d.reason for d in scan.damaged[:3]) or "held another game's records"
            before = len(self.catalog.game_offsets(name))
            self._move_to_quarantine(path.name, {"reason": reasons, "salvaged_into": name,
                                                 "games_salvaged": len(keep)})
            rep.games_lost += max(0, before - len(keep))
        self.catalog.commit_shard(self._shard_row(name, rows, size, crc, writer), rows, replace=True)
        rep.journals_replayed.append(path.name)
        rep.journal_games += len(rows)

    @staticmethod
    def _shard_row(name: str, rows: list[tuple], size: int, crc: int, writer: str,
                   created_at: float | None = None) -> ShardRow:
        """The ``shards`` row of shard ``name`` holding the games ``rows``."""
        lo = [r[8] for r in rows if r[8] is not None]
        hi = [r[9] for r in rows if r[9] is not None]
        return ShardRow(name, len(rows), sum(r[5] for r in rows), size, crc,
                        min(lo) if lo else None, max(hi) if hi else None,
                        time.time() if created_at is None else created_at, writer, codec.SCHEMA_VERSION)

    @_locked
    def verify(self, full: bool = True) -> RecoveryReport:
        """Check every catalogued shard now — its size, and with ``full`` every frame's CRC,
        decoding and game — and quarantine the damaged ones (salvaging their sound games)."""
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
            elif verify == "crc" and _file_crc(path) != row.crc32:
                scan = scan_shard(path)
                self._quarantine(row.name, scan, str(scan.error) if not scan.ok
                                 else "file CRC32 differs from the catalog's", rep)
            elif verify == "full":
                scan = scan_shard(path)
                foreign = self._foreign_in(scan)
                if not scan.ok:
                    self._quarantine(row.name, scan, str(scan.error), rep)
                elif foreign is not None:
                    self._quarantine(row.name, scan, foreign, rep)
                elif scan.crc32 != row.crc32:
                    self._quarantine(row.name, scan, "file CRC32 differs from the catalog's", rep)

    def _index(self, name: str, scan: ShardScan) -> None:
        now = time.time()
        rows = [game_row(rec, name, off, now) for off, rec in scan.records]
        m = _SHARD_RE.match(name)
        writer = m.group(1) if m else self.writer
        row = self._shard_row(name, rows, scan.size, scan.crc32, writer, scan.path.stat().st_mtime)
        self.catalog.commit_shard(row, rows)
        self.commits += 1

    def _quarantine(self, name: str, scan: ShardScan | None, reason: str, rep: RecoveryReport) -> None:
        """Move a damaged (or foreign) shard aside. Its sound games of the run's game are first
        re-written into a new shard (temporary name, fsync, rename) and committed in the same
        catalog transaction that forgets the old shard; the rest are counted as lost."""
        credited = set(self.catalog.game_offsets(name).values())
        salvage = [rec for _, rec in (scan.records if scan else []) if self.foreign_game(rec) is None]
        # games credited elsewhere stay there; salvage only those not committed in another shard
        elsewhere = self.catalog.known_ids(r.game_id for r in salvage) - credited
        salvage = [r for r in salvage if r.game_id not in elsewhere]
        uniq: dict[str, GameRecord] = {}
        for r in salvage:
            uniq.setdefault(r.game_id, r)
        salvage = list(uniq.values())
        lost = len(credited - {r.game_id for r in salvage})
        salvage_name = None
        new: tuple[ShardRow, list[tuple]] | None = None
        if salvage:
            salvage_name = shard_name(self.writer, self._next_index)
            self._next_index += 1
            frames = [codec.encode_frame(codec.encode_record(r), self.flags) for r in salvage]
            size, crc = write_shard(self.run.shards / salvage_name, frames, self.flags)
            now, off, rows = time.time(), codec.HEADER.size, []
            for r, fr in zip(salvage, frames):
                rows.append(game_row(r, salvage_name, off, now))
                off += len(fr)
            new = (self._shard_row(salvage_name, rows, size, crc, self.writer, now), rows)
        self.catalog.quarantine_shard(name, reason, lost, len(salvage), new)
        self.commits += 1
        if new is not None:
            self.shards_written += 1
        self._move_to_quarantine(name, {"reason": reason, "games_lost": lost,
                                        "games_salvaged": len(salvage),
                                        "salvaged_into": salvage_name})
        rep.shards_quarantined.append(name)
        rep.reasons[name] = reason
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
            fsync_dir(self.run.shards)


def _file_crc(path: Path) -> int:
    """CRC-32 of a whole file, read in 1 MiB pieces."""
    crc = 0
    with open(path, "rb") as f:
        while chunk := f.read(1 << 20):
            crc = zlib.crc32(chunk, crc)
    return crc


def open_catalog_readonly(run_dir: str | os.PathLike[str]) -> Catalog:
    """The catalog of an existing run, read-only (for monitoring and readers)."""
    run = RunDir.open(run_dir)
    if not run.catalog.exists():
        raise FormatError(f"run directory {str(run.root)!r} has no catalog.sqlite yet (no games stored)")
    return Catalog(run.catalog, readonly=True)
