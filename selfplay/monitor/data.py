"""Read-only access to a run's committed game records, for reports and position views.

Records are located with the replay store's catalog (``Catalog(readonly=True)``) and decoded
from their shards by the replay store's reader (:mod:`selfplay.replay.reader`), so every check
of the record format (CRC, sizes, schema version) applies here too.
"""

from __future__ import annotations

import os

from selfplay.errors import SelfplayError
from selfplay.records import GameRecord
from selfplay.rundir import RunDir


class GameNotFoundError(SelfplayError):
    """A game id that the run's catalog does not hold."""


def _catalog(run: RunDir):  # type: ignore[no-untyped-def]
    from selfplay.replay.catalog import Catalog

    if not run.catalog.exists():
        raise GameNotFoundError(f"run {str(run.root)!r} has no catalog.sqlite yet: no games committed")
    return Catalog.open_readonly(run.catalog)


def find_record(run_path: str | os.PathLike[str] | RunDir, game_id: str) -> GameRecord:
    """The committed record of ``game_id``; GameNotFoundError naming it if the run lacks it."""
    from selfplay.replay.reader import read_game

    run = run_path if isinstance(run_path, RunDir) else RunDir.open(run_path)
    cat = _catalog(run)
    try:
        if cat.game_location(game_id) is None:
            some = cat.game_ids(limit=3)
            total = cat.totals().games
            hint = (f"; the run has {total} game(s), e.g. {', '.join(some)}" if some
                    else "; the run has no committed games yet")
            raise GameNotFoundError(f"game {game_id!r} is not in the catalog of {str(run.root)!r}{hint}")
    finally:
        cat.close()
    return read_game(run, game_id)


def newest_records(run_path: str | os.PathLike[str] | RunDir, max_games: int = 2000) -> list[GameRecord]:
    """Up to ``max_games`` of the most recently committed games, in commit order (the replay
    reader's newest-shard selection; a shard that fails its checks is skipped)."""
    from selfplay.replay import reader

    run = run_path if isinstance(run_path, RunDir) else RunDir.open(run_path)
    if not run.catalog.exists():
        return []
    return reader.newest_records(run, None, on_corrupt="skip", games=int(max_games))
