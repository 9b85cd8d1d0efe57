"""The run's SQLite catalog (RUN/catalog.sqlite): one row per committed game and per shard.

Tables (column meanings in ``docs/record-format.md``):

- ``games``: ``game_id`` UNIQUE (a retried write of a game cannot add it twice), its ``shard``
  and ``frame_offset``, ``game``, ``worker``, ``positions``, ``length`` (moves played),
  ``result`` (player 0's view), ``snapshot_min``/``snapshot_max``, ``started_at``/``finished_at``
  (Unix s), ``resigned``, ``resign_disabled``, ``resign_would_have``, ``full_search_positions``,
  ``added_at``; ``seq`` gives the commit order.
- ``shards``: readable shards only, ``seq`` giving the commit order: ``name``, ``games``, ``positions``, ``bytes``, ``crc32`` (of
  the whole file), ``snapshot_min``/``snapshot_max``, ``created_at``, ``writer``, ``schema_version``.
- ``quarantine``: shards moved to RUN/quarantine/ with the reason.
- ``counters``: ``duplicates_total`` (retried writes ignored).

The database runs in WAL mode, so readers in other processes (monitoring, a trainer) read while
the writer commits. Read-only users open it with ``Catalog(path, readonly=True)``.
"""

from __future__ import annotations

import contextlib
import functools
import os
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Iterator, Sequence

from selfplay.errors import FormatError

CATALOG_VERSION = 1

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS shards (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    name TEXT NOT NULL UNIQUE,
    games INTEGER NOT NULL,
    positions INTEGER NOT NULL,
    bytes INTEGER NOT NULL,
    crc32 INTEGER NOT NULL,
    snapshot_min INTEGER,
    snapshot_max INTEGER,
    created_at REAL NOT NULL,
    writer TEXT NOT NULL,
    schema_version INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS games (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    game_id TEXT NOT NULL UNIQUE,
    shard TEXT NOT NULL,
    frame_offset INTEGER NOT NULL,
    game TEXT NOT NULL,
    worker TEXT NOT NULL,
    positions INTEGER NOT NULL,
    length INTEGER NOT NULL,
    result INTEGER NOT NULL,
    snapshot_min INTEGER,
    snapshot_max INTEGER,
    started_at REAL,
    finished_at REAL,
    resigned INTEGER NOT NULL,
    resign_disabled INTEGER NOT NULL,
    resign_would_have INTEGER NOT NULL,
    full_search_positions INTEGER NOT NULL,
    added_at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS games_by_shard ON games (shard);
CREATE TABLE IF NOT EXISTS quarantine (
    name TEXT PRIMARY KEY,
    reason TEXT NOT NULL,
    moved_at REAL NOT NULL,
    games_lost INTEGER NOT NULL,
    games_salvaged INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS counters (name TEXT PRIMARY KEY, value INTEGER NOT NULL);
"""

GAME_COLUMNS = ("game_id", "shard", "frame_offset", "game", "worker", "positions", "length",
                "result", "snapshot_min", "snapshot_max", "started_at", "finished_at", "resigned",
                "resign_disabled", "resign_would_have", "full_search_positions", "added_at")
_INSERT_GAME = (f"INSERT OR IGNORE INTO games ({', '.join(GAME_COLUMNS)}) "
                f"VALUES ({', '.join('?' * len(GAME_COLUMNS))})")
SHARD_COLUMNS = ("name", "games", "positions", "bytes", "crc32", "snapshot_min", "snapshot_max",
                 "created_at", "writer", "schema_version")


@dataclass
class ShardRow:
    """One row of the ``shards`` table."""

    name: str
    games: int
    positions: int
    bytes: int
    crc32: int
    snapshot_min: int | None
    snapshot_max: int | None
    created_at: float
    writer: str
    schema_version: int


@dataclass
class CatalogTotals:
    """Committed counts (what the ``buffer`` metric lines report)."""

    games: int
    positions: int
    shards: int
    duplicates: int
    newest_snapshot: int | None


@dataclass
class GameListing:
    """One committed game as ``selfplay games`` lists it."""

    game_id: str
    worker: str
    snapshot_min: int | None
    snapshot_max: int | None
    length: int
    result: int  # final result from player 0's view: +1, 0 (draw) or -1
    resigned: bool
    finished_at: float | None  # Unix s


def game_row(rec: Any, shard: str, offset: int, added_at: float) -> tuple:
    """The ``games`` row of record ``rec`` stored at ``offset`` in ``shard``."""
    t = rec.num_positions
    snap = rec.snapshot
    return (rec.game_id, shard, offset, rec.game, rec.worker_id, t, t, int(rec.result),
            int(snap.min()) if t else None, int(snap.max()) if t else None,
            float(rec.started_at), float(rec.finished_at), int(bool(rec.resigned)),
            int(bool(rec.resign_disabled)), int(rec.resign_would_have),
            int(rec.full_search.sum()), added_at)


class CatalogDamagedError(FormatError):
    """catalog.sqlite is not a readable SQLite database; the shards can rebuild it."""


def damaged_message(path: Path, exc: BaseException) -> str:
    """The one line that tells a user their catalog is damaged and how to rebuild it."""
    run = path.parent
    return (f"catalog {str(path)!r} is damaged ({exc}); the shards hold every game: rebuild it "
            f"with `selfplay repair {run}`")


def _damage_to_error(method):  # type: ignore[no-untyped-def]
    """Turn SQLite's 'not a database' / 'malformed' errors into :class:`CatalogDamagedError`
    (a locked or full database stays an OperationalError: it is not damage)."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):  # type: ignore[no-untyped-def]
        try:
            return method(self, *args, **kwargs)
        except sqlite3.OperationalError:
            raise
        except sqlite3.DatabaseError as exc:
            raise CatalogDamagedError(damaged_message(self.path, exc)) from None
    return wrapper


class Catalog:
    """Connection to one catalog.sqlite.

    Every method turns a damaged database into :class:`CatalogDamagedError` (one line naming
    ``selfplay repair``)."""

    def __init__(self, path: str | Path, *, readonly: bool = False, timeout: float = 30.0) -> None:
        self.path = Path(path)
        self.readonly = readonly
        try:
            if readonly:
                if not self.path.exists():
                    raise FormatError(f"catalog {str(self.path)!r} does not exist")
                self.con = self._open_readonly(timeout)
            else:
                self.con = sqlite3.connect(self.path, timeout=timeout, isolation_level=None,
                                           check_same_thread=False)
                self.con.execute("PRAGMA journal_mode=WAL")
                # journals and shards are fsynced and re-indexed on recovery, so NORMAL is enough here
                self.con.execute("PRAGMA synchronous=NORMAL")
                self.con.executescript(_SCHEMA)
                self._check_version()
        except sqlite3.OperationalError as exc:
            raise FormatError(f"catalog {str(self.path)!r} cannot be opened: {exc}") from exc
        except sqlite3.DatabaseError as exc:
            raise CatalogDamagedError(damaged_message(self.path, exc)) from None

    def _open_readonly(self, timeout: float) -> sqlite3.Connection:
        """A read-only connection. On a read-only file system SQLite cannot make the WAL's shared
        memory file, so the database is opened as immutable there (nobody can write it)."""
        uri = f"file:{self.path}?mode=ro"
        try:
            con = sqlite3.connect(uri, uri=True, timeout=timeout, isolation_level=None, check_same_thread=False)
            con.execute("SELECT count(*) FROM sqlite_master").fetchone()  # reads the header
            return con
        except sqlite3.OperationalError:
            if os.access(self.path.parent, os.W_OK):
                raise
        con = sqlite3.connect(uri + "&immutable=1", uri=True, timeout=timeout, isolation_level=None,
                              check_same_thread=False)
        con.execute("SELECT count(*) FROM sqlite_master").fetchone()
        return con

    def _check_version(self) -> None:
        row = self.con.execute("SELECT value FROM meta WHERE key='catalog_version'").fetchone()
        if row is None:
            self.con.execute("INSERT INTO meta VALUES ('catalog_version', ?)", (str(CATALOG_VERSION),))
        elif int(row[0]) > CATALOG_VERSION:
            raise FormatError(f"catalog {str(self.path)!r} has version {row[0]}, newer than this "
                              f"code understands ({CATALOG_VERSION}); upgrade plyfoundry")

    def close(self) -> None:
        self.con.close()

    # ---- writing (one transaction each) ------------------------------------------------------
    @contextlib.contextmanager
    def _write(self) -> Iterator[sqlite3.Cursor]:
        """One write transaction: committed when the block ends, rolled back if it raises."""
        cur = self.con.cursor()
        cur.execute("BEGIN IMMEDIATE")
        try:
            yield cur
            cur.execute("COMMIT")
        except BaseException:
            if self.con.in_transaction:
                cur.execute("ROLLBACK")
            raise

    def _credit_shard(self, cur: sqlite3.Cursor, shard: ShardRow) -> int:
        """Insert the ``shards`` row of ``shard`` counting the games the catalog credits to it;
        returns that count."""
        credited, positions = cur.execute(
            "SELECT count(*), coalesce(sum(positions), 0) FROM games WHERE shard=?",
            (shard.name,)).fetchone()
        self._insert_shard(cur, shard, int(credited), int(positions))
        return int(credited)

    def commit_shard(self, shard: ShardRow, games: Sequence[tuple], duplicates: int = 0, *,
                     replace: bool = False) -> int:
        """Insert a shard and its games in one transaction; returns how many games the catalog
        credits to the shard afterwards. A row whose game_id is already credited to another
        shard is ignored and added to ``duplicates_total`` (rows already credited to this shard,
        e.g. committed while it was a journal, are not duplicates). ``replace`` first forgets
        every game row credited to the shard (its frames moved)."""
        with self._write() as cur:
            if cur.execute("SELECT 1 FROM shards WHERE name=?", (shard.name,)).fetchone():
                return 0  # already indexed (by another writer's recovery)
            if replace:
                cur.execute("DELETE FROM games WHERE shard=?", (shard.name,))
            cur.executemany(_INSERT_GAME, games)
            credited = self._credit_shard(cur, shard)
            ignored = 0 if replace else max(0, len(games) - credited)
            self._bump(cur, "duplicates_total", duplicates + ignored)
        return credited

    @staticmethod
    def _insert_shard(cur: sqlite3.Cursor, shard: ShardRow, games: int, positions: int) -> None:
        # the shard row is written even when every game was a duplicate, so recovery does not
        # index the file again
        cur.execute(f"INSERT INTO shards ({', '.join(SHARD_COLUMNS)}) "
                    f"VALUES ({', '.join('?' * len(SHARD_COLUMNS))})",
                    (shard.name, games, positions, shard.bytes, shard.crc32, shard.snapshot_min,
                     shard.snapshot_max, shard.created_at, shard.writer, shard.schema_version))

    def commit_games(self, games: Sequence[tuple], duplicates: int = 0) -> list[str]:
        """Insert game rows (of a journal: their shard is not sealed yet) in one transaction;
        returns the ids that were new. Rows whose id is already committed are ignored and,
        with ``duplicates``, added to ``duplicates_total``."""
        new: list[str] = []
        with self._write() as cur:
            for row in games:
                before = self.con.total_changes
                cur.execute(_INSERT_GAME, row)
                if self.con.total_changes > before:
                    new.append(row[0])
            self._bump(cur, "duplicates_total", duplicates + len(games) - len(new))
        return new

    def seal_shard(self, shard: ShardRow) -> int:
        """Add the ``shards`` row of a sealed journal whose games are already committed; returns
        the games credited to it (0 if the row was already there)."""
        with self._write() as cur:
            if cur.execute("SELECT 1 FROM shards WHERE name=?", (shard.name,)).fetchone():
                return 0
            return self._credit_shard(cur, shard)

    def unsealed_shard_names(self) -> set[str]:
        """Shard names that game rows credit but that have no ``shards`` row (open journals,
        or journals lost with their games)."""
        return {r[0] for r in self.con.execute(
            "SELECT DISTINCT shard FROM games WHERE shard NOT IN (SELECT name FROM shards)")}

    def forget_games_of(self, shard: str) -> int:
        """Delete the game rows credited to ``shard``; returns how many there were."""
        with self._write() as cur:
            cur.execute("DELETE FROM games WHERE shard=?", (shard,))
            return int(cur.rowcount)

    def add_duplicates(self, n: int) -> None:
        if n:
            with self._write() as cur:
                self._bump(cur, "duplicates_total", n)

    @staticmethod
    def _bump(cur: sqlite3.Cursor, name: str, n: int) -> None:
        if n:
            cur.execute("INSERT INTO counters VALUES (?, ?) ON CONFLICT(name) DO UPDATE SET "
                        "value = value + excluded.value", (name, n))

    def quarantine_shard(self, name: str, reason: str, games_lost: int, games_salvaged: int,
                         salvage: tuple[ShardRow, Sequence[tuple]] | None = None) -> None:
        """Forget shard ``name`` and its games and note why in ``quarantine``; with ``salvage``
        (the shard row and game rows of a new shard holding its sound games), commit that
        shard in the same transaction, so no game is ever uncredited in between."""
        with self._write() as cur:
            cur.execute("DELETE FROM games WHERE shard=?", (name,))
            cur.execute("DELETE FROM shards WHERE name=?", (name,))
            cur.execute("INSERT OR REPLACE INTO quarantine VALUES (?, ?, ?, ?, ?)",
                        (name, reason, time.time(), games_lost, games_salvaged))
            if salvage is not None:
                row, games = salvage
                cur.executemany(_INSERT_GAME, games)
                self._credit_shard(cur, row)

    # ---- reading -----------------------------------------------------------------------------
    def known_ids(self, ids: Iterable[str]) -> set[str]:
        """Which of ``ids`` are already committed."""
        ids = list(ids)
        found: set[str] = set()
        for i in range(0, len(ids), 500):
            chunk = ids[i:i + 500]
            q = f"SELECT game_id FROM games WHERE game_id IN ({', '.join('?' * len(chunk))})"
            found.update(r[0] for r in self.con.execute(q, chunk))
        return found

    def shards(self, after: str | None = None) -> list[ShardRow]:
        """Readable shards in commit order (those committed after shard ``after`` if given)."""
        q = f"SELECT {', '.join(SHARD_COLUMNS)} FROM shards"
        args: tuple = ()
        if after is not None:
            q += " WHERE seq > (SELECT seq FROM shards WHERE name=?)"
            args = (after,)
        return [ShardRow(*r) for r in self.con.execute(q + " ORDER BY seq", args)]

    def shards_after_rowid(self, rowid: int) -> list[tuple[int, ShardRow]]:
        """(seq, shard) of shards committed after commit number ``rowid``, in commit order
        (``seq`` never repeats, even after a shard is quarantined)."""
        q = f"SELECT seq, {', '.join(SHARD_COLUMNS)} FROM shards WHERE seq > ? ORDER BY seq"
        return [(r[0], ShardRow(*r[1:])) for r in self.con.execute(q, (rowid,))]

    def shard_names(self) -> set[str]:
        return {r[0] for r in self.con.execute("SELECT name FROM shards")}

    def quarantined_names(self) -> set[str]:
        return {r[0] for r in self.con.execute("SELECT name FROM quarantine")}

    def game_offsets(self, shard: str) -> dict[int, str]:
        """frame offset -> game_id of the games the catalog credits to ``shard``."""
        return {int(r[0]): r[1] for r in
                self.con.execute("SELECT frame_offset, game_id FROM games WHERE shard=?", (shard,))}

    def game_location(self, game_id: str) -> tuple[str, int] | None:
        r = self.con.execute("SELECT shard, frame_offset FROM games WHERE game_id=?", (game_id,)).fetchone()
        return (r[0], int(r[1])) if r else None

    def game_ids(self, limit: int | None = None) -> list[str]:
        q = "SELECT game_id FROM games ORDER BY seq"
        if limit is not None:
            q += f" LIMIT {int(limit)}"
        return [r[0] for r in self.con.execute(q)]

    def game_rows(self, last: int | None = None) -> list[GameListing]:
        """One :class:`GameListing` per committed game in commit order (only the newest ``last``
        if given); what ``selfplay games`` prints."""
        cols = "game_id, worker, snapshot_min, snapshot_max, length, result, resigned, finished_at"
        if last is None:
            rows = self.con.execute(f"SELECT {cols} FROM games ORDER BY seq").fetchall()
        else:
            rows = self.con.execute(f"SELECT {cols} FROM games ORDER BY seq DESC LIMIT ?", (int(last),)).fetchall()
            rows.reverse()
        return [GameListing(str(r[0]), str(r[1]), None if r[2] is None else int(r[2]),
                            None if r[3] is None else int(r[3]), int(r[4]), int(r[5]), bool(r[6]),
                            None if r[7] is None else float(r[7])) for r in rows]

    def totals(self) -> CatalogTotals:
        g, p, s = self.con.execute(
            "SELECT count(*), coalesce(sum(positions), 0), max(snapshot_max) FROM games").fetchone()
        shards = self.con.execute("SELECT count(*) FROM shards").fetchone()[0]
        dup = self.con.execute("SELECT value FROM counters WHERE name='duplicates_total'").fetchone()
        return CatalogTotals(int(g), int(p), int(shards), int(dup[0]) if dup else 0,
                             int(s) if s is not None else None)

    # ---- aggregate queries (the monitor, readers and the buffer's refill use these) ------------
    @classmethod
    def open_readonly(cls, path: str | Path, timeout: float = 5.0) -> "Catalog":
        """A read-only connection (FormatError if the file is missing or not a catalog)."""
        return cls(path, readonly=True, timeout=timeout)

    def __enter__(self) -> "Catalog":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def newest_shards(self, positions: int | None = None, part: tuple[int, int] = (0, 1)) -> list[ShardRow]:
        """The newest shards that together hold at least ``positions`` positions (every shard if
        None), oldest first. With ``part=(index, count)`` only the shards at positions ``index``,
        ``index + count`` ... counted from the newest are taken (shard ``index`` of ``count``
        buffer shards refilling their windows: together they hold the newest positions).

        The one newest-shard selection of the project: the replay window's refill, the reader's
        ``newest_records`` and the monitor's newest games all use it."""
        index, count = part
        if not (count >= 1 and 0 <= index < count):
            raise ValueError(f"part {part!r} must be (index, count) with 0 <= index < count")
        chosen: list[ShardRow] = []
        need = positions
        q = f"SELECT {', '.join(SHARD_COLUMNS)} FROM shards ORDER BY seq DESC"
        for pos, r in enumerate(self.con.execute(q).fetchall()):
            if need is not None and need <= 0:
                break
            if pos % count != index:
                continue
            row = ShardRow(*r)
            chosen.append(row)
            if need is not None:
                need -= row.positions
        chosen.reverse()
        return chosen

    def positions_of_newest_games(self, games: int) -> int:
        """Positions in the ``games`` most recently committed games."""
        row = self.con.execute("SELECT coalesce(sum(positions), 0) FROM "
                               "(SELECT positions FROM games ORDER BY seq DESC LIMIT ?)", (int(games),)).fetchone()
        return int(row[0])

    def summary(self) -> "CatalogSummary":
        """Counts, finish-time range and the resignation probe's figures in one scan of ``games``."""
        r = self.con.execute(
            "SELECT count(*), coalesce(sum(positions), 0), min(finished_at), max(finished_at), "
            "min(CASE WHEN started_at > 0 THEN started_at END), "
            "coalesce(sum(resign_disabled != 0), 0), "
            "coalesce(sum(resign_disabled != 0 AND resign_would_have >= 0), 0), "
            # a false positive: the would-have-resigned player did not lose (result: player 0's view)
            "coalesce(sum(resign_disabled != 0 AND ((resign_would_have = 0 AND result >= 0) OR "
            "(resign_would_have = 1 AND result <= 0))), 0) FROM games").fetchone()
        shards = int(self.con.execute("SELECT count(*) FROM shards").fetchone()[0])
        f = (lambda v: None if v is None else float(v))
        return CatalogSummary(int(r[0]), int(r[1]), f(r[2]), f(r[3]), f(r[4]), int(r[5]), int(r[6]), int(r[7]), shards)

    def counts_between(self, start: float, end: float) -> tuple[int, int]:
        """(games, positions) finished in ``(start, end]`` (Unix s)."""
        r = self.con.execute("SELECT count(*), coalesce(sum(positions), 0) FROM games "
                             "WHERE finished_at > ? AND finished_at <= ?", (start, end)).fetchone()
        return int(r[0]), int(r[1])

    def finish_series(self) -> tuple[list[float], list[int]]:
        """Every game's finish time (Unix s, ascending) and its positions, for plots."""
        rows = self.con.execute("SELECT finished_at, positions FROM games WHERE finished_at IS NOT NULL "
                                "ORDER BY finished_at").fetchall()
        return [float(r[0]) for r in rows], [int(r[1]) for r in rows]

    def game_lengths(self) -> list[int]:
        """Moves played in every committed game, in commit order."""
        return [int(r[0]) for r in self.con.execute("SELECT length FROM games ORDER BY seq")]


@dataclass
class CatalogSummary:
    """What :meth:`Catalog.summary` reads: games and positions committed, first and last finish
    time and first start time (Unix s, None without games), the resignation probe's games
    (``resign_disabled_games``; of those ``resign_would_have_games`` had a player who would have
    resigned, ``resign_false_positives`` of whom did not lose) and the shard count."""

    games: int
    positions: int
    first_finished: float | None
    last_finished: float | None
    first_started: float | None
    resign_disabled_games: int
    resign_would_have_games: int
    resign_false_positives: int
    shards: int

for _name, _fn in list(vars(Catalog).items()):
    if callable(_fn) and not _name.startswith("__"):
        setattr(Catalog, _name, _damage_to_error(_fn) if not isinstance(_fn, staticmethod) else _fn)
del _name, _fn
