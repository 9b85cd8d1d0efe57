"""Go games between SGF files and records.

- :func:`record_to_sgf` / :func:`export_sgf`: a run's Go games as SGF FF[4] files any viewer opens.
- :func:`sgf_to_record` / :func:`import_sgf_files`: expert games as *supervised* records — at
  every position the policy target is the move played (one-hot), the value target the final
  result from the RE property — so a learner can start from human games before self-play, as
  the supervised first stage of AlphaGo (Silver et al., "Mastering the game of Go with deep
  neural networks and tree search", Nature 2016). Imported positions carry ``full_search=True``
  (they are policy targets), ``snapshot=-1`` (no network played them), root value NaN (no
  search) and worker id ``"sgf-import"``.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from selfplay.errors import FormatError, IllegalMoveError, RunDirError, SelfplayError
from selfplay.records import GameRecord, GameRecordBuilder
from selfplay.replay.reader import make_record_game, read_game, RunReader
from selfplay.rundir import RunDir

IMPORT_WORKER = "sgf-import"
MAX_SGF_BYTES = 8 * 1024 * 1024


class NoResultError(FormatError):
    """An SGF game without a usable result (RE missing, "?" or "Void")."""


def result_from_re(re_value: str | None, where: str) -> int:
    """Result from Black's (player 0's) view from an SGF RE value: "B+..." +1, "W+..." -1,
    "0" / "Draw" 0 (SGF FF[4], property RE). Anything else raises NoResultError."""
    v = (re_value or "").strip()
    up = v.upper()
    if up.startswith("B+"):
        return 1
    if up.startswith("W+"):
        return -1
    if up in ("0", "DRAW", "D", "JIGO"):
        return 0
    if not v:
        raise NoResultError(f"{where}: no result (RE property missing); a supervised target needs one")
    raise NoResultError(f"{where}: result RE[{v}] gives no winner (unknown, void or unfinished)")


# ---- export ------------------------------------------------------------------------------------

_SIGN_TEXT = {1: "B+", -1: "W+", 0: "0"}


def _sign(re_text: str) -> int:
    return 0 if re_text == "0" else (1 if re_text.startswith("B") else -1)


def record_to_sgf(rec: GameRecord) -> str:
    """SGF text of one Go record (moves checked under the record's own rules).

    The game starts from the record's first board: setup stones (a handicap) are written as
    AB / AW with PL naming the first player. RE is the result *as recorded*: an imported game's
    own RE text; a resignation as B+R / W+R; otherwise the Tromp–Taylor score of the final
    board when it agrees with the record's winner, else just the winner ("B+", "W+", "0") with
    the score noted in GC. Raises FormatError for a record that is not Go or whose moves the
    rules refuse."""
    from selfplay.games.go import GoGame
    from selfplay.games.sgf import write_sgf

    game = make_record_game(rec)
    if not isinstance(game, GoGame):
        raise FormatError(f"game {rec.game_id!r} is {rec.game}, not Go; only Go games export to SGF")
    first = np.asarray(rec.boards[0]).ravel() if rec.num_positions else np.zeros(0, dtype=np.int8)
    setup_black = [int(p) for p in np.flatnonzero(first == 1)]
    setup_white = [int(p) for p in np.flatnonzero(first == 2)]
    first_player = int(rec.to_play[0]) if rec.num_positions else 0
    moves = [int(a) for a in np.asarray(rec.actions)]
    comment: dict[str, Any] = {"game_id": rec.game_id, "worker": rec.worker_id, "seed": rec.seed,
                               "resign_disabled": rec.resign_disabled}
    if rec.resigned and rec.worker_id != IMPORT_WORKER:
        # The resigning position is kept as a training position, with the move its search
        # chose; that move was never played, so the game record ends before it.
        moves = moves[:-1]
    try:
        start = game.state_from_setup(setup_black, setup_white, first_player) \
            if setup_black or setup_white or first_player else game.initial_state()
        state = game.play_sequence(moves, start)
    except IllegalMoveError as exc:
        raise FormatError(f"game {rec.game_id!r}: {exc}") from None
    recorded = str(rec.extra.get("RE", "")).strip() if rec.worker_id == IMPORT_WORKER else ""
    if recorded:
        result = recorded  # the game's own result (e.g. a time win), never re-scored
    elif rec.resigned:
        result = {1: "B+R", -1: "W+R", 0: "0"}[int(rec.result)]
    else:
        result = _SIGN_TEXT[int(rec.result)]
        if game.is_terminal(state):
            scored = game.result_text(state)
            if _sign(scored) == int(rec.result):
                result = scored
            else:
                comment["tromp_taylor_score"] = scored
    snaps = np.asarray(rec.snapshot)
    tp = np.asarray(rec.to_play)

    def player(colour: int) -> str:
        s = snaps[tp == colour]
        if rec.worker_id == IMPORT_WORKER:
            return str(rec.extra.get("black" if colour == 0 else "white", ""))
        if s.size == 0:
            return "plyfoundry"
        lo, hi = int(s.min()), int(s.max())
        return f"plyfoundry snapshot {lo}" if lo == hi else f"plyfoundry snapshots {lo}-{hi}"

    extra: dict[str, Any] = {"GN": rec.game_id, "GC": json.dumps(comment, sort_keys=True)}
    handicap = rec.extra.get("handicap") if rec.worker_id == IMPORT_WORKER else None
    if not handicap and setup_black and not setup_white and first_player == 1:
        handicap = len(setup_black)  # black stones placed, White to move: a handicap
    if handicap:
        extra["HA"] = int(handicap)
    return write_sgf(game, moves, result=result, black=player(0), white=player(1), extra=extra,
                     setup_black=setup_black, setup_white=setup_white, first_player=first_player)


def _safe_name(game_id: str) -> str:
    keep = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in game_id)
    return keep[:120] or "game"


@dataclass
class SgfExport:
    """What an SGF export wrote, and the games it skipped with the reason."""

    written: list[Path] = field(default_factory=list)
    skipped: list[tuple[str, str]] = field(default_factory=list)


def export_sgf(run_dir: str | os.PathLike[str], out_dir: str | os.PathLike[str], *,
               game_ids: Iterable[str] | None = None, overwrite: bool = False) -> SgfExport:
    """Write the run's Go games (or the ``game_ids``) as ``OUT/GAME_ID.sgf``.

    A game that cannot be written (not Go, moves the rules refuse, unreadable) is skipped with
    its reason in the returned :class:`SgfExport`; the others are still written. An existing
    file is an error before anything is written, unless ``overwrite``. A run with no Go game
    at all is an error."""
    from selfplay.rundir import atomic_write_bytes

    run = RunDir.open(run_dir)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise RunDirError(f"{str(out)!r} is a file; --out must be a directory")
    rep = SgfExport()
    if game_ids is not None:
        records = []
        for gid in game_ids:
            try:
                records.append(read_game(run, gid))
            except SelfplayError as exc:
                rep.skipped.append((gid, str(exc)))
    else:
        records = []
        for r in RunReader(run, on_corrupt="skip").records():
            if r.game == "go":
                records.append(r)
            else:
                rep.skipped.append((r.game_id, f"{r.game} is not Go"))
    if not overwrite:
        taken = [out / f"{_safe_name(r.game_id)}.sgf" for r in records]
        taken = [p for p in taken if p.exists()]
        if taken:
            raise RunDirError(f"{str(taken[0])!r} exists ({len(taken)} file(s) would be replaced); "
                              f"pass --overwrite to replace them")
    texts = []
    for rec in records:
        try:
            texts.append((rec, record_to_sgf(rec)))
        except SelfplayError as exc:
            rep.skipped.append((rec.game_id, str(exc)))
    if not texts:
        why = f"; skipped {len(rep.skipped)}: {rep.skipped[0][1]}" if rep.skipped else ""
        raise FormatError(f"run {str(run.root)!r} holds no Go games to export{why}")
    out.mkdir(parents=True, exist_ok=True)
    for rec, text in texts:
        path = out / f"{_safe_name(rec.game_id)}.sgf"
        atomic_write_bytes(path, text.encode())
        rep.written.append(path)
    return rep


# ---- import ------------------------------------------------------------------------------------

@dataclass
class ImportReport:
    """Games read from SGF files: the records made, and the games skipped with the reason."""

    records: list[GameRecord] = field(default_factory=list)
    skipped: list[tuple[str, str]] = field(default_factory=list)

    @property
    def positions(self) -> int:
        return sum(r.num_positions for r in self.records)


def sgf_to_record(text: str, source: str = "sgf", *, komi: float | None = None,
                  history: int = 4, allow_suicide: bool = False, superko: bool = True,
                  max_moves: int | None = None, default_komi: float = 7.5,
                  run_options: dict[str, Any] | None = None) -> GameRecord:
    """A supervised record of the SGF game ``text`` (its main line).

    ``komi`` forces a komi (default: the file's KM, else ``default_komi``); ``history``,
    ``allow_suicide``, ``superko``, ``max_moves`` are the Go options the record is labelled with.
    ``run_options`` (the Go options of the run that will train on the records) replaces them
    all, komi included unless ``komi`` is given, so the run's buffer accepts the records; a game
    on another board size is then refused. The value target always comes from RE. Raises
    FormatError (NoResultError for a game without a result) naming ``source``."""
    from selfplay.games.go import GoGame
    from selfplay.games.sgf import read_sgf

    if run_options is not None:
        history = int(run_options.get("history", history))
        allow_suicide = bool(run_options.get("allow_suicide", allow_suicide))
        superko = bool(run_options.get("superko", superko))
        max_moves = run_options.get("max_moves", max_moves)
        if komi is None and "komi" in run_options:
            komi = float(run_options["komi"])
    sg = read_sgf(text, allow_suicide=allow_suicide, superko=superko)
    if run_options is not None and int(run_options.get("size", sg.size)) != sg.size:
        raise FormatError(f"{source}: a {sg.size}x{sg.size} game, but the run plays on "
                          f"{run_options['size']}x{run_options['size']}")
    result = result_from_re(sg.result, source)
    k = float(komi if komi is not None else (sg.komi if sg.komi is not None else default_komi))
    n = sg.size * sg.size
    cap = int(max_moves) if max_moves is not None else 2 * n
    if len(sg.moves) > cap:
        raise FormatError(f"{source}: {len(sg.moves)} moves exceed the move cap of {cap}")
    try:
        game = GoGame(size=sg.size, komi=k, allow_suicide=allow_suicide, superko=superko,
                      history=history, max_moves=cap, tiny=sg.size < 5)
    except SelfplayError as exc:
        raise FormatError(f"{source}: {exc}") from None
    if sg.setup_black or sg.setup_white or sg.first_player != 0:
        state = game.state_from_setup(sg.setup_black, sg.setup_white, sg.first_player)
    else:
        state = game.initial_state()
    ident = json.dumps([sg.size, k, sorted(sg.setup_black), sorted(sg.setup_white),
                        sg.first_player, sg.moves, result, game.options()])
    game_id = "sgf-" + hashlib.sha256(ident.encode()).hexdigest()[:24]
    b = GameRecordBuilder(game_id, game.name, game.options(), IMPORT_WORKER, 0,
                          {"source": "sgf", "policy": "one-hot move played"}, 0.0)
    for i, a in enumerate(sg.moves):
        b.add_position(game.compact(state), game.to_play(state), a, game.legal_mask(state),
                       np.array([a]), np.array([1.0]), float("nan"), True, -1)
        try:
            state = game.play(state, a)
        except IllegalMoveError as exc:
            raise FormatError(f"{source}: move {i + 1}: {exc}") from None
    rec = b.finish(result, time.time())
    rec.extra = {"source": source, "black": sg.black_name, "white": sg.white_name,
                 "RE": sg.result or "", "handicap": sg.handicap}
    return rec


def import_sgf_files(paths: Iterable[str | os.PathLike[str]], **options: Any) -> ImportReport:
    """Records of every SGF file in ``paths`` (each file's first game); a file that cannot be
    read, is malformed, or has no result is skipped with its reason in the report."""
    rep = ImportReport()
    seen: set[str] = set()
    for p in paths:
        path = Path(p)
        try:
            if not path.is_file():
                raise FormatError(f"{path}: no such file")
            if path.stat().st_size > MAX_SGF_BYTES:
                raise FormatError(f"{path}: larger than {MAX_SGF_BYTES} bytes; not an SGF game record")
            raw = path.read_bytes()
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:
                text = raw.decode("latin-1")
            rec = sgf_to_record(text, str(path), **options)
        except FormatError as exc:
            msg = str(exc)
            rep.skipped.append((str(path), msg if str(path) in msg else f"{path}: {msg}"))
            continue
        if rec.game_id in seen:
            rep.skipped.append((str(path), f"{path}: the same game as an earlier file"))
            continue
        seen.add(rec.game_id)
        rep.records.append(rec)
    return rep
