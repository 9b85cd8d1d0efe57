"""Reading a run directory's records from outside the writer: for a trainer, an export, a report.

:class:`RunReader` walks the catalog's shards in commit order and yields the games the catalog
credits to each (so a game is seen exactly once), optionally following new shards as they land.
It never writes to the run directory: a damaged frame is skipped with a warning and reading goes
on with the next sound frame (or raises, with ``on_corrupt="raise"``); the shard is left for
``selfplay verify`` or the record store's next recovery to quarantine.
"""

from __future__ import annotations

import json
import logging
import os
import threading
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Literal

import numpy as np

from selfplay.errors import FormatError, RunDirError, SelfplayError
from selfplay.games.base import Game
from selfplay.records import GameRecord
from selfplay.replay.batch import BatchBuilder, concat_batches
from selfplay.replay.catalog import Catalog, ShardRow
from selfplay.replay.shards import SHARD_SUFFIX, read_shard
from selfplay.rundir import RunDir

log = logging.getLogger(__name__)


def game_key(name: str, options: dict[str, Any]) -> tuple[str, str]:
    return name, json.dumps(options, sort_keys=True)


_NORMALISED: dict[tuple[str, str], tuple[str, str] | None] = {}


def normalised_game_key(name: str, options: dict[str, Any]) -> tuple[str, str] | None:
    """:func:`game_key` of the game the registry makes of ``name`` and ``options`` (so
    ``tictactoe`` and ``mnk`` with m = n = k = 3 agree); None if it makes none. Cached."""
    raw = game_key(name, options)
    if raw not in _NORMALISED:
        try:
            from selfplay.games.registry import make_game
            g = make_game(name, **options)
            _NORMALISED[raw] = game_key(g.name, g.options())
        except (SelfplayError, TypeError, ValueError):
            _NORMALISED[raw] = None
    return _NORMALISED[raw]


def declared_game_key(run: RunDir) -> tuple[str, str] | None:
    """:func:`normalised_game_key` of the game run.toml declares; None without a readable one."""
    try:
        declared = run_toml_game(run)
    except SelfplayError:
        return None
    return None if declared is None else normalised_game_key(*declared)


def make_record_game(rec: GameRecord) -> Game:
    """The game a record was played in (from its own ``game`` and ``game_options``)."""
    from selfplay.games.registry import make_game
    return make_game(rec.game, **rec.game_options)


def run_toml_game(run: RunDir) -> tuple[str, dict[str, Any]] | None:
    """(name, options) of the ``[game]`` table of RUN/run.toml, if there is one."""
    if not run.config.exists():
        return None
    try:
        doc = tomllib.loads(run.config.read_text())
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise FormatError(f"{run.config}: not valid TOML ({exc})") from None
    g = doc.get("game")
    if not isinstance(g, dict) or not isinstance(g.get("name"), str):
        return None
    opts = g.get("options", {})
    return g["name"], dict(opts) if isinstance(opts, dict) else {}


class RunReader:
    """Records of one run directory, shard by shard in commit order.

    follow: after the shards present, keep polling for new ones (every ``poll_interval``
        seconds) until ``stop`` is set or no shard has landed for ``idle_timeout`` seconds.
    on_corrupt: ``"skip"`` (skip the damaged frame and go on with the next one; log a warning,
        note it in :attr:`problems` and :attr:`games_skipped`) or ``"raise"``.
    part: ``(index, count)`` reads only the shards whose commit position is ``index`` modulo
        ``count`` (to split a run among data-loader processes).
    """

    def __init__(self, run_dir: str | os.PathLike[str] | RunDir, *, follow: bool = False,
                 poll_interval: float = 1.0, idle_timeout: float | None = None,
                 stop: threading.Event | None = None,
                 on_corrupt: Literal["skip", "raise"] = "skip",
                 part: tuple[int, int] = (0, 1)) -> None:
        self.run = run_dir if isinstance(run_dir, RunDir) else RunDir.open(run_dir)
        self.follow = follow
        self.poll_interval = float(poll_interval)
        self.idle_timeout = idle_timeout
        self.stop = stop or threading.Event()
        if on_corrupt not in ("skip", "raise"):
            raise RunDirError(f"on_corrupt={on_corrupt!r} must be 'skip' or 'raise'")
        self.on_corrupt = on_corrupt
        if not (isinstance(part, tuple) and len(part) == 2 and 0 <= part[0] < part[1]):
            raise RunDirError(f"part={part!r} must be (index, count) with 0 <= index < count")
        self.part = part
        self.problems: list[str] = []
        #: committed games not read because their frame is damaged (see :attr:`problems`)
        self.games_skipped = 0
        self._last_rowid = 0
        self._seen_files: set[str] = set()
        self._position = 0  # shards offered so far (for ``part``)

    # ---- shards ------------------------------------------------------------------------------
    def _catalog(self) -> Catalog | None:
        if not self.run.catalog.exists():
            return None
        return Catalog(self.run.catalog, readonly=True)

    def _new_shards(self) -> list[tuple[ShardRow | None, Path, dict[int, str] | None]]:
        """Shards landed since the last call: (catalog row, path, credited frame offsets)."""
        cat = self._catalog()
        out: list[tuple[ShardRow | None, Path, dict[int, str] | None]] = []
        if cat is None:
            # no catalog (e.g. shards copied without it): every finished shard file, by name
            for p in sorted(self.run.shards.glob(f"*{SHARD_SUFFIX}")) if self.run.shards.exists() else []:
                if p.name not in self._seen_files:
                    self._seen_files.add(p.name)
                    out.append((None, p, None))
        else:
            try:
                for rowid, row in cat.shards_after_rowid(self._last_rowid):
                    self._last_rowid = rowid
                    if row.name in self._seen_files:  # read before the catalog appeared
                        continue
                    out.append((row, self.run.shards / row.name, cat.game_offsets(row.name)))
            finally:
                cat.close()
        mine = []
        for item in out:
            if self._position % self.part[1] == self.part[0]:
                mine.append(item)
            self._position += 1
        return mine

    def _read(self, path: Path, credited: dict[int, str] | None) -> Iterator[GameRecord]:
        """The credited games of one shard. A damaged frame is skipped (noted in
        :attr:`problems` and :attr:`games_skipped`) and reading goes on with the next sound
        frame; with ``on_corrupt="raise"`` the first damage raises FormatError."""
        damaged: list[Any] | None = None if self.on_corrupt == "raise" else []
        seen_offsets: set[int] = set()
        try:
            for off, rec in read_shard(path, damaged):
                seen_offsets.add(off)
                if credited is None or credited.get(off) == rec.game_id:
                    yield rec
        except FormatError as exc:
            if self.on_corrupt == "raise":
                raise
            self._note(f"skipped {path.name}: {exc}",
                       len(credited) - len(seen_offsets & set(credited)) if credited else 1)
            return
        for d in damaged or []:
            lost = sum(1 for off in (credited or {}) if d.offset <= off < d.end) if credited else 1
            self._note(f"skipped a damaged stretch of {path.name} ({lost} game(s)): {d.reason}", lost)

    def _note(self, msg: str, games: int) -> None:
        self.problems.append(msg)
        self.games_skipped += games
        log.warning(msg)

    def poll(self) -> list[GameRecord]:
        """Records of the shards that landed since the previous call (never blocks)."""
        return [rec for _, path, cred in self._new_shards() for rec in self._read(path, cred)]

    def records(self) -> Iterator[GameRecord]:
        """Every record, in commit order; with ``follow``, then new ones as they land."""
        idle_since = time.monotonic()
        while True:
            new = self._new_shards()
            for _, path, cred in new:
                yield from self._read(path, cred)
            if not self.follow or self.stop.is_set():
                return
            if new:
                idle_since = time.monotonic()
            elif self.idle_timeout is not None and time.monotonic() - idle_since >= self.idle_timeout:
                return
            if self.stop.wait(self.poll_interval):
                return

    # ---- training arrays ---------------------------------------------------------------------
    def batches(self, batch_size: int = 256, *, game: Game | None = None, augment: bool = False,
                seed: int | None = None, shuffle_positions: int = 0, drop_last: bool = False,
                policy_targets_only: bool = False) -> Iterator[dict[str, np.ndarray]]:
        """Training arrays of every position (see :meth:`BatchBuilder.build`), ``batch_size`` at
        a time. ``shuffle_positions`` > 0 shuffles within a pool of that many positions;
        ``augment`` applies a random symmetry per position; ``policy_targets_only`` keeps only
        full-search positions with a policy target."""
        if batch_size < 1:
            raise RunDirError(f"batch_size={batch_size} must be >= 1")
        rng = np.random.default_rng(seed)
        builder: BatchBuilder | None = BatchBuilder(game) if game is not None else None
        key = game_key(game.name, game.options()) if game is not None else None
        keys_ok: set[tuple[str, str]] = set()
        pool: list[dict[str, np.ndarray]] = []
        pooled = 0
        for rec in self.records():
            rk = game_key(rec.game, rec.game_options)
            if builder is None:
                g = make_record_game(rec)
                builder, key = BatchBuilder(g), game_key(g.name, g.options())
            if rk not in keys_ok:
                g2 = make_record_game(rec)
                if game_key(g2.name, g2.options()) != key:
                    raise FormatError(f"game {rec.game_id!r} is {rec.game} {rec.game_options}; "
                                      f"earlier records of this run are another game")
                keys_ok.add(rk)
            idx = None
            if policy_targets_only:
                cnt = np.diff(np.asarray(rec.policy_offsets))
                idx = np.flatnonzero(np.asarray(rec.full_search) & (cnt > 0))
                if idx.size == 0:
                    continue
            t = rec.num_positions if idx is None else idx.size
            if t == 0:
                continue
            sym = rng.integers(builder.num_symmetries, size=t) if augment else None
            arrays = builder.from_record(rec, sym, idx)
            pool.append(arrays)
            pooled += t
            if pooled >= max(batch_size, shuffle_positions):
                merged = concat_batches(pool)
                if shuffle_positions:
                    perm = rng.permutation(pooled)
                    merged = {k: v[perm] for k, v in merged.items()}
                n_full = pooled // batch_size
                for i in range(n_full):
                    yield {k: v[i * batch_size:(i + 1) * batch_size] for k, v in merged.items()}
                rest = pooled - n_full * batch_size
                pool = [{k: v[n_full * batch_size:] for k, v in merged.items()}] if rest else []
                pooled = rest
        if pooled and not drop_last:
            merged = concat_batches(pool)
            if shuffle_positions:
                perm = rng.permutation(pooled)
                merged = {k: v[perm] for k, v in merged.items()}
            for i in range(0, pooled, batch_size):
                yield {k: v[i:i + batch_size] for k, v in merged.items()}


@dataclass
class ReadReport:
    """Damage a read skipped: ``games_skipped`` committed games and one line per problem."""

    games_skipped: int = 0
    problems: list[str] = field(default_factory=list)

    def add(self, reader: RunReader) -> None:
        self.games_skipped += reader.games_skipped
        self.problems.extend(reader.problems)


def newest_records(run_dir: str | os.PathLike[str] | RunDir, positions: int | None,
                   on_corrupt: Literal["skip", "raise"] = "skip", *, games: int | None = None,
                   part: tuple[int, int] = (0, 1), report: ReadReport | None = None) -> list[GameRecord]:
    """The records of the newest shards holding at least ``positions`` positions (all records
    if None; with ``games``, enough shards for the newest ``games`` games and only those games
    returned), in commit order; ``part`` as in :meth:`Catalog.newest_shards`. A damaged frame
    is skipped (``on_corrupt="skip"``) and counted in ``report`` when one is given."""
    run = run_dir if isinstance(run_dir, RunDir) else RunDir.open(run_dir)
    if not run.catalog.exists():
        reader = RunReader(run, on_corrupt=on_corrupt)
        recs = list(reader.records())
        if report is not None:
            report.add(reader)
        return recs[-games:] if games is not None else recs
    cat = Catalog(run.catalog, readonly=True)
    try:
        if games is not None:
            positions = cat.positions_of_newest_games(games)
            if positions <= 0:
                return []
        chosen = cat.newest_shards(positions, part)
        credited = {row.name: cat.game_offsets(row.name) for row in chosen}
    finally:
        cat.close()
    reader = RunReader(run, on_corrupt=on_corrupt)
    out: list[GameRecord] = []
    for row in chosen:
        out.extend(reader._read(run.shards / row.name, credited[row.name]))
    if report is not None:
        report.add(reader)
    return out[-games:] if games is not None else out


def read_game(run_dir: str | os.PathLike[str] | RunDir, game_id: str) -> GameRecord:
    """The committed record of ``game_id``; FormatError if the catalog does not hold it."""
    run = run_dir if isinstance(run_dir, RunDir) else RunDir.open(run_dir)
    if not run.catalog.exists():
        raise FormatError(f"run {str(run.root)!r} has no catalog yet: no games committed")
    cat = Catalog(run.catalog, readonly=True)
    try:
        loc = cat.game_location(game_id)
    finally:
        cat.close()
    if loc is None:
        raise FormatError(f"game {game_id!r} is not in the catalog of {str(run.root)!r}")
    shard, offset = loc
    path = run.shards / shard
    if not path.exists():  # durable but not sealed yet: still in its writer's journal
        from selfplay.replay.shards import JOURNAL_SUFFIX
        journal = run.shards / (shard.removesuffix(SHARD_SUFFIX) + JOURNAL_SUFFIX)
        path = journal if journal.exists() else path
    damaged: list[Any] = []
    for off, rec in read_shard(path, damaged):
        if off == offset and rec.game_id == game_id:
            return rec
    why = f" (damaged: {damaged[0].reason})" if damaged else ""
    raise FormatError(f"shard {shard} has no sound frame of game {game_id!r} at byte {offset}{why}")
