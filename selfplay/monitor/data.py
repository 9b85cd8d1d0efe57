"""Read-only access to a run's committed game records, for reports and position views.

Records are located with the replay store's catalog (``Catalog(readonly=True)``) and decoded
from their shards by the replay store's own shard reader, so every check of the record format
(CRC, sizes, schema version) applies here too.
"""

from __future__ import annotations

import os
from pathlib import Path

from selfplay.errors import FormatError, SelfplayError
from selfplay.records import GameRecord
from selfplay.rundir import RunDir


class GameNotFoundError(SelfplayError):
    """A game id that the run's catalog does not hold."""


def _shard_path(run: RunDir, name: str) -> Path:
    from selfplay.replay.shards import SHARD_SUFFIX

    p = run.shards / name
    if not p.exists() and not name.endswith(SHARD_SUFFIX):
        p = run.shards / f"{name}{SHARD_SUFFIX}"
    return p


def _catalog(run: RunDir):  # type: ignore[no-untyped-def]
    from selfplay.replay.catalog import Catalog

    if not run.catalog.exists():
        raise GameNotFoundError(f"run {str(run.root)!r} has no catalog.sqlite yet: no games committed")
    return Catalog(run.catalog, readonly=True)


def find_record(run_path: str | os.PathLike[str] | RunDir, game_id: str) -> GameRecord:
    """The committed record of ``game_id``; GameNotFoundError naming it if the run lacks it."""
    from selfplay.replay.shards import read_shard

    run = run_path if isinstance(run_path, RunDir) else RunDir.open(run_path)
    cat = _catalog(run)
    try:
        loc = cat.game_location(game_id)
        if loc is None:
            some = cat.game_ids(limit=3)
            total = cat.totals().games
            hint = (f"; the run has {total} game(s), e.g. {', '.join(some)}" if some
                    else "; the run has no committed games yet")
            raise GameNotFoundError(f"game {game_id!r} is not in the catalog of {str(run.root)!r}{hint}")
    finally:
        cat.close()
    shard, offset = loc
    path = _shard_path(run, shard)
    for off, rec in read_shard(path):
        if off == offset:
            if rec.game_id != game_id:
                raise FormatError(f"shard {shard}: frame at byte {offset} holds game {rec.game_id!r}, "
                                  f"the catalog says {game_id!r}")
            return rec
    raise FormatError(f"shard {shard} has no frame at byte {offset} where the catalog puts game {game_id!r}")


def newest_records(run_path: str | os.PathLike[str] | RunDir, max_games: int = 2000) -> list[GameRecord]:
    """Up to ``max_games`` of the most recently committed games (whole shards, newest first).

    A shard that fails its checks is skipped (the store quarantines it on its next recovery)."""
    from selfplay.replay.shards import read_shard

    run = run_path if isinstance(run_path, RunDir) else RunDir.open(run_path)
    if not run.catalog.exists():
        return []
    cat = _catalog(run)
    try:
        shards = cat.shards()
    finally:
        cat.close()
    out: list[GameRecord] = []
    for row in reversed(shards):
        if len(out) >= max_games:
            break
        try:
            recs = [rec for _, rec in read_shard(_shard_path(run, row.name))]
        except FormatError:
            continue
        out.extend(recs[: max_games - len(out)])
    return out
