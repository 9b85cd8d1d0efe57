"""Export a run's positions as plain arrays for any trainer: ``selfplay export RUN --format npz``.

The ``.npz`` file (a zip of ``.npy`` arrays, readable with ``numpy.load`` and no pickle) holds,
for N positions in commit order:

- ``planes``   float32 (N, C, H, W) network input from the side to move's view;
- ``policy``   float32 (N, A) search policy target, each row summing to 1 — for policy targets
  only: a row is all zero for a reduced-search position (playout cap randomisation, Wu 2019)
  unless ``reduced_policies`` is asked for, and for a position stored without any target;
- ``policy_weight`` float32 (N,) 1 where ``policy`` is a target to train on (a full-search
  position with a visit distribution), 0 elsewhere: multiply the policy loss by it;
- ``value``    float32 (N,) final outcome from the mover's view, in {-1, 0, 1};
- ``mask``     bool (N, A) legal moves;
- ``action``   int32 (N,) the move played;
- ``root_value`` float32 (N,) the search's root value from the mover's view in [-1, 1]; NaN
  where no search ran (imported games);
- ``snapshot`` int32 (N,) snapshot version that played the move (-1: not a network's move);
- ``full_search`` bool (N,) the move had the full search budget;
- for games scored by area (Go) only: ``ownership`` int8 (N, H, W) the final Tromp–Taylor
  area from the mover's view (+1 the mover's, -1 the opponent's, 0 nobody's), ``score_margin``
  float32 (N,) the final score margin (area difference minus komi) from the mover's view, and
  ``ownership_weight`` float32 (N,) 1 where the game was scored on that area, 0 where it was
  not (resigned games, records without the area): multiply those losses by it;
- ``move_number`` int32 (N,) position index within its game; ``game_index`` int32 (N,) index
  into ``game_ids`` (G,); ``info`` a JSON string: game, options, shapes, record schema version.

Arrays are written through temporary ``.npy`` files next to the output, so memory stays small
whatever N is; the output appears by rename only when complete, and an existing file is never
replaced unless asked.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from selfplay.errors import RunDirError, SelfplayError
from selfplay.records import GameRecord
from selfplay.replay import codec
from selfplay.replay.batch import BatchBuilder
from selfplay.replay.reader import (ReadReport, declared_game_key, game_key, make_record_game, newest_records,
                                    normalised_game_key)
from selfplay.overwrite import check_output
from selfplay.rundir import RunDir


class NothingToExportError(SelfplayError):
    """The run holds no records (or none of the kind asked for)."""


@dataclass
class ExportSummary:
    path: Path
    positions: int
    games: int
    game: str
    options: dict
    bytes: int
    #: committed games left out: damaged frames, or records of another game than run.toml's
    games_skipped: int = 0
    problems: list[str] = field(default_factory=list)


def _select(records: list[GameRecord], last: int | None) -> list[tuple[GameRecord, np.ndarray]]:
    """(record, position indices) covering the newest ``last`` positions (all if None)."""
    out: list[tuple[GameRecord, np.ndarray]] = []
    need = last
    for rec in reversed(records):
        t = rec.num_positions
        if t == 0:
            continue
        if need is None:
            out.append((rec, np.arange(t)))
            continue
        if need <= 0:
            break
        take = min(t, need)
        out.append((rec, np.arange(t - take, t)))
        need -= take
    out.reverse()
    return out


def export_npz(run_dir: str | os.PathLike[str], out: str | os.PathLike[str], *,
               last: int | None = None, compress: bool = False, overwrite: bool = False,
               reduced_policies: bool = False, chunk_positions: int = 65_536) -> ExportSummary:
    """Write the run's positions (the newest ``last`` if given) to ``out`` as .npz.

    ``reduced_policies``: keep the visit distributions of reduced-search positions in ``policy``
    (their ``policy_weight`` stays 0); by default those rows are zero."""
    run = RunDir.open(run_dir)
    out = Path(out)
    if last is not None and last < 1:
        raise RunDirError(f"--last {last}: the number of positions must be >= 1")
    check_output(out, overwrite)
    if out.suffix != ".npz":
        raise RunDirError(f"output {str(out)!r} must end in .npz")
    if not out.parent.exists():
        raise RunDirError(f"output directory {str(out.parent)!r} does not exist")
    report = ReadReport()
    records = newest_records(run, last, on_corrupt="skip", report=report)
    skipped, problems = report.games_skipped, report.problems
    declared = declared_game_key(run)
    if declared is not None:  # records of another game (e.g. a copied shard) are left out
        kept = []
        for rec in records:
            if normalised_game_key(rec.game, rec.game_options) == declared:
                kept.append(rec)
            else:
                skipped += 1
                if len(problems) < 50:
                    problems.append(f"left out game {rec.game_id!r}: it is {rec.game} {rec.game_options}, "
                                    f"run.toml declares {declared[0]} {declared[1]}")
        records = kept
    chosen = _select(records, last)
    if not chosen:
        raise NothingToExportError(f"run {str(run.root)!r} holds no positions to export "
                                   f"({len(records)} game(s) committed"
                                   + (f", {skipped} skipped" if skipped else "") + ")")
    game = make_record_game(chosen[0][0])
    key = game_key(game.name, game.options())
    same = {game_key(chosen[0][0].game, chosen[0][0].game_options)}
    for rec, _ in chosen:
        rk = game_key(rec.game, rec.game_options)
        if rk in same:
            continue
        g = make_record_game(rec)
        if game_key(g.name, g.options()) != key:
            raise RunDirError(f"run {str(run.root)!r} mixes games: {rec.game_id!r} is {rec.game} "
                              f"{rec.game_options}, earlier ones {game.name} {game.options()}")
        same.add(rk)

    builder = BatchBuilder(game)
    n = int(sum(idx.size for _, idx in chosen))
    c, h, w = game.input_shape
    a = game.num_actions
    specs = {
        "planes": (np.float32, (n, c, h, w)), "policy": (np.float32, (n, a)),
        "policy_weight": (np.float32, (n,)), "value": (np.float32, (n,)), "mask": (np.bool_, (n, a)),
        "action": (np.int32, (n,)), "root_value": (np.float32, (n,)), "snapshot": (np.int32, (n,)),
        "full_search": (np.bool_, (n,)), "move_number": (np.int32, (n,)),
        "game_index": (np.int32, (n,)),
    }
    if builder.has_area:  # games scored by area (Go)
        specs.update({"ownership": (np.int8, (n, *game.compact_shape)), "score_margin": (np.float32, (n,)),
                      "ownership_weight": (np.float32, (n,))})
    tmpdir = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    try:
        arrays = {k: np.lib.format.open_memmap(tmpdir / f"{k}.npy", mode="w+", dtype=dt, shape=shape)
                  for k, (dt, shape) in specs.items()}
        pos = 0
        for gi, (rec, idx) in enumerate(chosen):
            for lo in range(0, idx.size, chunk_positions):
                part = idx[lo:lo + chunk_positions]
                b = builder.from_record(rec, None, part)
                sl = slice(pos, pos + part.size)
                for k in ("planes", "value", "mask", "snapshot", "full_search",
                          *(("ownership", "score_margin", "ownership_weight") if builder.has_area else ())):
                    arrays[k][sl] = b[k]
                full = np.asarray(b["full_search"], dtype=bool)
                target = full & (np.asarray(b["policy"]).sum(axis=1) > 0)
                arrays["policy_weight"][sl] = target
                arrays["policy"][sl] = b["policy"] if reduced_policies else np.where(full[:, None], b["policy"], 0.0)
                arrays["action"][sl] = np.asarray(rec.actions)[part]
                arrays["root_value"][sl] = np.asarray(rec.root_values)[part]
                arrays["move_number"][sl] = part
                arrays["game_index"][sl] = gi
                pos += part.size
        for arr in arrays.values():
            arr.flush()
        del arrays
        ids = np.array([rec.game_id for rec, _ in chosen])
        info = {"game": game.name, "options": game.options(), "input_shape": [c, h, w],
                "num_actions": a, "positions": n, "games": len(chosen),
                "record_schema_version": codec.SCHEMA_VERSION, "run": str(run.root.resolve()),
                "last": last, "reduced_policies": bool(reduced_policies)}
        np.save(tmpdir / "game_ids.npy", ids)
        np.save(tmpdir / "info.npy", np.array(json.dumps(info)))
        partial = tmpdir / "out.npz"
        mode = zipfile.ZIP_DEFLATED if compress else zipfile.ZIP_STORED
        with zipfile.ZipFile(partial, "w", compression=mode, allowZip64=True) as zf:
            for k in (*specs, "game_ids", "info"):
                zf.write(tmpdir / f"{k}.npy", arcname=f"{k}.npy")
        with open(partial, "rb") as f:
            os.fsync(f.fileno())
        os.replace(partial, out)
    finally:
        shutil.rmtree(tmpdir, ignore_errors=True)
    return ExportSummary(out, n, len(chosen), game.name, game.options(), out.stat().st_size,
                         skipped, problems)
