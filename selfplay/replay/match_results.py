"""Results of rated games between players, kept in the run's catalog (RUN/catalog.sqlite).

Two tables, created when missing (beside the catalog's own tables, which this module never
touches):

- ``rated_players``: ``name`` (unique; e.g. ``v12@48`` = snapshot 12 searching 48 simulations,
  ``mcts@200``, ``gtp:GNU Go 3.8 [--level 0]``), ``kind`` (snapshot, mcts, gtp), ``snapshot``
  (version or NULL), ``settings`` (JSON: simulations, search constants, GTP command line and the
  engine's own name and version), ``first_seen`` (Unix s).
- ``rated_games``: one row per finished game: ``match_id`` + ``game_index`` (unique together, so
  a match stored twice adds nothing), ``first``/``second`` (player names, ``first`` moved first),
  ``result`` (+1 first player won, 0 draw, -1 lost: player 0's view, as everywhere in the
  project), ``moves`` (moves played, opening included), ``ended_by`` (``rules``, ``resign`` or
  ``move_cap``), ``opening`` (the opening's moves as text, space separated), ``origin`` (``match``
  for ``selfplay match``, ``eval`` for the evaluation role), ``played_at`` (Unix s).

A match's games are written in one transaction, so a match is stored whole or not at all.
The database is opened with a busy timeout, so a live run's writers and these writes wait for
each other instead of failing.
"""

from __future__ import annotations

import json
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping

from selfplay.errors import FormatError

_SCHEMA = """
CREATE TABLE IF NOT EXISTS rated_players (
    name TEXT PRIMARY KEY,
    kind TEXT NOT NULL,
    snapshot INTEGER,
    settings TEXT NOT NULL,
    first_seen REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS rated_games (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    match_id TEXT NOT NULL,
    game_index INTEGER NOT NULL,
    first TEXT NOT NULL,
    second TEXT NOT NULL,
    result INTEGER NOT NULL,
    moves INTEGER NOT NULL,
    ended_by TEXT NOT NULL,
    opening TEXT NOT NULL,
    origin TEXT NOT NULL,
    played_at REAL NOT NULL,
    UNIQUE (match_id, game_index)
);
CREATE INDEX IF NOT EXISTS rated_games_by_first ON rated_games (first);
CREATE INDEX IF NOT EXISTS rated_games_by_second ON rated_games (second);
"""

#: seconds a write waits for another writer of the catalog (a live run's record store)
BUSY_TIMEOUT_SECONDS = 60.0


@dataclass(frozen=True)
class PlayerEntry:
    """A rated player: its unique name, kind, snapshot version (or None) and settings."""

    name: str
    kind: str
    snapshot: int | None
    settings: Mapping[str, Any]


@dataclass(frozen=True)
class RatedGame:
    """One stored game: ``result`` from ``first``'s view (+1, 0, -1)."""

    match_id: str
    game_index: int
    first: str
    second: str
    result: int
    moves: int
    ended_by: str
    opening: str
    origin: str
    played_at: float

    def score_of_first(self) -> float:
        """1, 0.5 or 0: the first player's score in this game."""
        return (self.result + 1) / 2


def _connect(path: Path, readonly: bool) -> sqlite3.Connection:
    try:
        if readonly:
            con = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=BUSY_TIMEOUT_SECONDS)
        else:
            con = sqlite3.connect(path, timeout=BUSY_TIMEOUT_SECONDS)
        con.execute("SELECT count(*) FROM sqlite_master").fetchone()
    except sqlite3.DatabaseError as exc:
        raise FormatError(f"catalog {str(path)!r} cannot be opened as an SQLite database: {exc}") from None
    return con


class MatchResults:
    """The rated-game tables of one catalog file. ``readonly`` never creates anything."""

    def __init__(self, path: str | Path, readonly: bool = False) -> None:
        self.path = Path(path)
        self.readonly = readonly
        if readonly and not self.path.exists():
            self.con: sqlite3.Connection | None = None
            return
        self.con = _connect(self.path, readonly)
        if not readonly:
            try:
                with self.con:
                    self.con.executescript(_SCHEMA)
            except sqlite3.DatabaseError as exc:
                raise FormatError(f"catalog {str(self.path)!r}: cannot create the rated-game tables: {exc}") from None

    def close(self) -> None:
        if self.con is not None:
            self.con.close()
            self.con = None

    def __enter__(self) -> "MatchResults":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _has_tables(self) -> bool:
        if self.con is None:
            return False
        row = self.con.execute("SELECT count(*) FROM sqlite_master WHERE type='table' AND name='rated_games'").fetchone()
        return bool(row and row[0])

    # ---- writing -------------------------------------------------------------------------------
    def add_match(self, players: Iterable[PlayerEntry], games: Iterable[RatedGame]) -> int:
        """Store the players (a name seen before keeps its first settings) and the games of one
        match in one transaction; returns the games added (a game already stored is skipped)."""
        if self.con is None or self.readonly:
            raise FormatError(f"catalog {str(self.path)!r} is open read-only")
        now = time.time()
        added = 0
        try:
            with self.con:
                for p in players:
                    self.con.execute(
                        "INSERT OR IGNORE INTO rated_players (name, kind, snapshot, settings, first_seen) VALUES (?,?,?,?,?)",
                        (p.name, p.kind, p.snapshot, json.dumps(dict(p.settings), sort_keys=True), now))
                for g in games:
                    if g.result not in (-1, 0, 1):
                        raise FormatError(f"rated game {g.match_id}#{g.game_index}: result {g.result!r} is not -1, 0 or 1")
                    cur = self.con.execute(
                        "INSERT OR IGNORE INTO rated_games (match_id, game_index, first, second, result, moves, "
                        "ended_by, opening, origin, played_at) VALUES (?,?,?,?,?,?,?,?,?,?)",
                        (g.match_id, g.game_index, g.first, g.second, int(g.result), int(g.moves), g.ended_by,
                         g.opening, g.origin, float(g.played_at)))
                    added += cur.rowcount
        except sqlite3.DatabaseError as exc:
            raise FormatError(f"catalog {str(self.path)!r}: cannot store match results: {exc}") from None
        return added

    # ---- reading -------------------------------------------------------------------------------
    def games(self, origin: str | None = None) -> list[RatedGame]:
        """Every stored game in the order stored (only ``origin``'s when given)."""
        if not self._has_tables():
            return []
        assert self.con is not None
        sql = ("SELECT match_id, game_index, first, second, result, moves, ended_by, opening, origin, played_at "
               "FROM rated_games")
        args: tuple[Any, ...] = ()
        if origin is not None:
            sql += " WHERE origin = ?"
            args = (origin,)
        try:
            rows = self.con.execute(sql + " ORDER BY seq", args).fetchall()
        except sqlite3.DatabaseError as exc:
            raise FormatError(f"catalog {str(self.path)!r}: cannot read rated games: {exc}") from None
        out = []
        for r in rows:
            if r[4] not in (-1, 0, 1):
                raise FormatError(f"catalog {str(self.path)!r}: rated game {r[0]}#{r[1]} has result {r[4]!r}")
            out.append(RatedGame(*r))
        return out

    def players(self) -> dict[str, PlayerEntry]:
        """name -> player entry of every stored player."""
        if not self._has_tables():
            return {}
        assert self.con is not None
        out = {}
        for name, kind, snap, settings, _ in self.con.execute(
                "SELECT name, kind, snapshot, settings, first_seen FROM rated_players ORDER BY name"):
            try:
                parsed = json.loads(settings)
            except ValueError:
                parsed = {"unreadable": settings[:200]}
            out[name] = PlayerEntry(name, kind, snap, parsed if isinstance(parsed, dict) else {})
        return out

    def score_triples(self) -> list[tuple[str, str, float]]:
        """(first, second, first's score) of every stored game, for :func:`selfplay.ratings.tally`."""
        return [(g.first, g.second, g.score_of_first()) for g in self.games()]


__all__ = ["MatchResults", "PlayerEntry", "RatedGame"]
