"""What both orchestrators share (the Ray driver and the in-process :class:`selfplay.loop.LocalRun`):
the ``run`` metric lines (start, heartbeat, stop), the stop conditions and the game budget that
makes them hold, the stop signals, the status line and the closing summary."""

from __future__ import annotations

import errno
import math
import os
import signal
import socket
import sys
import threading
import time
from dataclasses import dataclass, field
from typing import Any

from selfplay.config import RunConfig
from selfplay.errors import SelfplayError
from selfplay.metrics import MetricsLog
from selfplay.roles.timer import Every
from selfplay.rundir import RunDir

#: seconds between two heartbeat lines (the schema promises at most 10)
HEARTBEAT_SECONDS = 5.0


#: a file of this size that the run keeps and deletes just before its stop line, so that the stop
#: line (and the roles' final lines) still fit when the run stops because its disk is full
STOP_RESERVE_NAME = ".stop-line-reserve"
STOP_RESERVE_BYTES = 64 * 1024


class RunLog:
    """Writes the ``run`` lines: a start line now, a heartbeat every few seconds on its own timer,
    and a stop line with the reason (:meth:`stop`). Keeps ``RUN/.stop-line-reserve`` meanwhile."""

    def __init__(self, run: RunDir, mode: str, session: int, *, source: str) -> None:
        self.reserve = run.root / STOP_RESERVE_NAME
        try:
            with open(self.reserve, "wb") as f:
                f.write(b"\0" * STOP_RESERVE_BYTES)
                f.flush()
                os.fsync(f.fileno())
        except OSError:
            pass  # a disk already full: the run will say so when it stores its first game
        self.log = MetricsLog(run.metrics, "run", source)
        self.log.write(event="start", pid=os.getpid(), host=socket.gethostname(), mode=mode, session=session)
        self._timer: Every | None = Every(HEARTBEAT_SECONDS, lambda: self.log.write(event="heartbeat"), "heartbeat")
        self.stopped = False

    def stop(self, reason: str, **counts: Any) -> None:
        """The stop line (once): ``reason`` is one of :data:`selfplay.metrics_schema.STOP_REASONS`."""
        if self._timer is not None:
            self._timer.stop()
            self._timer = None
        if not self.stopped:
            self.stopped = True
            try:
                self.reserve.unlink(missing_ok=True)  # room for this line on a full disk
            except OSError:
                pass
            self.log.write(event="stop", stop_reason=reason, **counts)


def error_reason(exc: BaseException) -> str:
    """The stop reason of a run ended by ``exc``: ``error: <its first line>``."""
    text = str(exc).strip().splitlines()
    return "error: " + (text[0] if text else type(exc).__name__)


#: errno values of a disk that cannot take more writes: the run stops cleanly on them
_DISK_ERRNOS = (errno.ENOSPC, errno.EROFS, errno.EDQUOT)


def write_failure(exc: BaseException) -> SelfplayError | None:
    """The one-line error that stops a run cleanly when writing its files failed: the record
    store's :class:`~selfplay.replay.store.StoreWriteError` as it is, and an ``OSError`` of a full
    or read-only disk (a snapshot, a checkpoint) as one line naming the file; None for anything
    else. Games the store accepted before are kept either way (its journal is sealed at the next
    open)."""
    from selfplay.replay.store import StoreWriteError

    if isinstance(exc, StoreWriteError):
        return exc
    if isinstance(exc, OSError) and exc.errno in _DISK_ERRNOS:
        why = {errno.ENOSPC: "the disk is full", errno.EROFS: "the file system is read-only",
               errno.EDQUOT: "the disk quota is used up"}[exc.errno]
        where = f" {exc.filename}" if exc.filename else ""
        return StoreWriteError(f"cannot write{where}: {why}; every game stored before is kept — "
                               "free space (or make it writable) and resume the run")
    return None


# ---- stop conditions --------------------------------------------------------------------------


def stop_reached(config: RunConfig, games: int, positions: int, elapsed_seconds: float) -> str | None:
    """The stop reason when a stop condition holds for a run that has stored ``games`` and
    ``positions`` after ``elapsed_seconds``, else None."""
    r = config.run
    if r.games and games >= r.games:
        return "games reached"
    if r.positions and positions >= r.positions:
        return "positions reached"
    if r.minutes and elapsed_seconds >= r.minutes * 60:
        return "minutes reached"
    return None


@dataclass
class _WorkerBudget:
    tag: str = ""
    limit: int = 0  # games this incarnation may start in all
    finished: int = 0  # of those, games it has reported finished


@dataclass
class GameBudget:
    """How many games each worker may start, so that ``run.games`` (and ``run.positions``) are
    met without overshooting: a run stores between N and N + the games in flight when N was
    reached, and no game starts once enough are finished or in flight.

    Each worker is allotted its share of the games still wanted (``worker_count`` workers share
    them) beyond those it finished, so its slots refill at once; allotments never add up to more
    than the games still wanted. For
    ``run.positions`` the games still wanted are estimated from the mean positions per game so
    far; before the first game is stored each worker may start ``lookahead`` games (one per
    slot). A worker that restarts gives back what it had allotted but not finished."""

    config: RunConfig
    stored_games: int
    stored_positions: int
    worker_count: int
    lookahead: int
    workers: dict[int, _WorkerBudget] = field(default_factory=dict)

    def wanted(self) -> int | None:
        """Games still to store (None: no limit)."""
        r = self.config.run
        out: int | None = None
        if r.games:
            out = max(0, r.games - self.stored_games)
        if r.positions:
            left = r.positions - self.stored_positions
            if left <= 0:
                est: int | None = 0
            elif self.stored_games > 0:
                est = math.ceil(left / max(1e-9, self.stored_positions / self.stored_games))
            else:
                est = None
            if est is not None:
                out = est if out is None else min(out, est)
        return out

    def report(self, slot: int, tag: str, finished: int, added_games: int, added_positions: int) -> None:
        """Worker ``slot`` (incarnation ``tag``) finished ``finished`` more games, ``added_games``
        of them stored (the rest were duplicates) with ``added_positions`` positions."""
        w = self._worker(slot, tag)
        w.finished += finished
        self.stored_games += added_games
        self.stored_positions += added_positions

    def _worker(self, slot: int, tag: str) -> _WorkerBudget:
        """The budget of worker ``slot``; a new incarnation (another ``tag``; "" is a worker not
        heard from yet) starts afresh: what the old one had in flight is lost."""
        w = self.workers.setdefault(slot, _WorkerBudget(tag=tag))
        if tag and w.tag and w.tag != tag:
            self.workers[slot] = w = _WorkerBudget(tag=tag)
        w.tag = w.tag or tag
        return w

    def limit_for(self, slot: int, tag: str | None = None) -> int | None:
        """The total number of games worker ``slot`` may have started (None: no limit)."""
        wanted = self.wanted()
        w = self._worker(slot, tag or "")
        if not (self.config.run.games or self.config.run.positions):
            return None  # only a time limit (or none): no budget
        if wanted is None:  # positions asked for, none stored yet: the mean game length is unknown
            w.limit = max(w.limit, w.finished + self.lookahead)
            return w.limit
        open_elsewhere = sum(max(0, o.limit - o.finished) for s, o in self.workers.items() if s != slot)
        share = math.ceil(wanted / max(1, self.worker_count))
        mine = max(0, min(share, wanted - open_elsewhere))
        w.limit = max(w.limit, w.finished + mine)  # games already started cannot be taken back
        return w.limit


# ---- signals ----------------------------------------------------------------------------------


class StopSignals:
    """Turns the first SIGINT/SIGTERM into a clean-stop request (``reason``: "interrupted" or
    "terminated"); a second one interrupts at once."""

    def __init__(self) -> None:
        self.event = threading.Event()
        self.reason = ""
        self._old: dict[int, Any] = {}

    def requested(self) -> str | None:
        return self.reason if self.event.is_set() else None

    def _handle(self, signum: int, frame: Any) -> None:
        if self.event.is_set():
            raise KeyboardInterrupt
        self.reason = "interrupted" if signum == signal.SIGINT else "terminated"
        self.event.set()
        print(f"\nselfplay run: {signal.Signals(signum).name}: stopping after the games in flight "
              "(again to stop at once)", file=sys.stderr, flush=True)

    def __enter__(self) -> "StopSignals":
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM):
                self._old[sig] = signal.signal(sig, self._handle)
        return self

    def __exit__(self, *exc: object) -> None:
        for sig, old in self._old.items():
            signal.signal(sig, old)


# ---- what a person reads ------------------------------------------------------------------------


def status_line(buffer: dict[str, Any], *, elapsed: float, initial_games: int, initial_positions: int,
                workers: int, snapshot_version: int, learner: dict[str, Any] | None) -> str:
    """One line of progress: counts and rates, workers, snapshot, learner, replay window."""
    elapsed = max(1e-9, elapsed)
    games_new = buffer["games_total"] - initial_games
    pos_new = buffer["positions_total"] - initial_positions
    parts = [time.strftime("%H:%M:%S"),
             f"games {buffer['games_total']:,} ({games_new / elapsed * 3600:,.0f}/h)",
             f"positions {buffer['positions_total']:,} ({pos_new / elapsed:,.1f}/s)",
             f"workers {workers}", f"snapshot v{snapshot_version}"]
    if learner:
        loss = learner.get("loss")
        parts.append(f"learner step {learner.get('step', 0):,}"
                     + (f" loss {loss:.3f}" if isinstance(loss, (int, float)) else ""))
    parts.append(f"window {buffer.get('window_positions', 0):,}/{buffer.get('window_capacity', 0):,}")
    return " · ".join(parts)


def closing_summary(run: RunDir, reason: str, buffer: dict[str, Any], *, elapsed: float, initial_games: int,
                    initial_positions: int, snapshot_version: int, learner: dict[str, Any] | None) -> str:
    """What ``selfplay run`` prints when it ends: what was stored, where, at what rate, the
    snapshots, and the commands to try next."""
    elapsed = max(1e-9, elapsed)
    games_new = buffer["games_total"] - initial_games
    pos_new = buffer["positions_total"] - initial_positions
    root = str(run.root)
    lines = [
        f"stopped: {reason}",
        f"stored {games_new:,} new games ({pos_new:,} positions) in "
        f"{f'{elapsed:.0f} s' if elapsed < 120 else f'{elapsed / 60:.1f} min'}: "
        f"{games_new / elapsed * 3600:,.0f} games/h, {pos_new / elapsed:,.1f} positions/s",
        f"the run holds {buffer['games_total']:,} games, {buffer['positions_total']:,} positions in "
        f"{buffer.get('shards_total', 0):,} shard(s) under {root}",
        f"newest snapshot: v{snapshot_version}"
        + (f" (learner step {learner.get('step', 0):,})" if learner else " (no learner in this run)"),
        "next:",
        f"  selfplay status {root}          counts, rates and staleness",
        f"  selfplay report {root} --out {root}-report   plots of the run (PNG and index.html)",
        f"  selfplay export {root} --help   hand the positions to a trainer",
        f"  selfplay run --resume --out {root}   go on",
    ]
    return "\n".join(lines)
