"""The run lock: ``RUN/run.lock`` names the process that runs a run directory (pid, host, time).

A second ``selfplay run`` (or ``--resume``) into a live directory is refused before anything is
touched. The lock is an advisory ``flock`` held for the life of the process (the kernel drops it
when the process dies, however it dies) plus the owner's facts in the file. A lock left by a
process that is gone on this host is taken over with a notice; the helper processes that the dead
owner recorded (a local Ray's) are ended if they are still there.

Each taking of the lock opens a new *session* of the run (counted in ``RUN/sessions.json``): game
ids and seeds include it, so a resumed run never repeats a game.
"""

from __future__ import annotations

import fcntl
import json
import os
import signal
import socket
import time
from pathlib import Path
from typing import Any, Callable

from selfplay.errors import RunDirError
from selfplay.rundir import RunDir, atomic_write_bytes, pid_alive

LOCK_NAME = "run.lock"
SESSIONS_NAME = "sessions.json"


def _cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return ""


class RunLock:
    """Held lock of one run directory; :meth:`release` (or process exit) frees it."""

    def __init__(self, run: RunDir, fd: int, session: int, notices: list[str]) -> None:
        self.run = run
        self.fd = fd
        self.session = session
        self.notices = notices
        self._facts: dict[str, Any] = {}

    @property
    def path(self) -> Path:
        return self.run.root / LOCK_NAME

    @classmethod
    def acquire(cls, root: str | os.PathLike[str], *, say: Callable[[str], None] | None = None) -> "RunLock":
        """Take the lock of run directory ``root`` (created if missing) and open a new session.
        RunDirError naming the owner if another live process holds it."""
        run = RunDir.create(root)
        path = run.root / LOCK_NAME
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        owner = _read_facts(path)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise RunDirError(f"run directory {str(run.root)!r} is in use by {_describe(owner)}; "
                              "stop that run first (or wait for it to end)") from None
        notices: list[str] = []
        try:
            if owner:
                host, pid = owner.get("host"), owner.get("pid")
                if host != socket.gethostname():
                    raise RunDirError(
                        f"run directory {str(run.root)!r} is locked by {_describe(owner)}; from here it cannot "
                        f"be told whether that run is alive. If it is over, delete {path} and start again")
                if isinstance(pid, int) and pid_alive(pid) and pid != os.getpid():
                    raise RunDirError(f"run directory {str(run.root)!r} is in use by {_describe(owner)}")
                ended = _end_leftovers(owner.get("helpers") or [])
                notices.append(f"took over the lock of {_describe(owner)}, which is no longer running"
                               + (f"; ended {len(ended)} process(es) it left behind" if ended else ""))
            session = _next_session(run)
        except BaseException:
            os.close(fd)
            raise
        lock = cls(run, fd, session, notices)
        lock.update(pid=os.getpid(), host=socket.gethostname(), started_at=time.time(), session=session)
        for n in notices:
            (say or (lambda s: None))(n)
        return lock

    def update(self, **facts: Any) -> None:
        """Record more facts about the owner (e.g. ``helpers``: pids of the local Ray's processes)."""
        self._facts.update(facts)
        data = (json.dumps(self._facts, sort_keys=True) + "\n").encode()
        os.ftruncate(self.fd, 0)
        os.pwrite(self.fd, data, 0)
        os.fsync(self.fd)

    def release(self) -> None:
        if self.fd < 0:
            return
        try:
            os.ftruncate(self.fd, 0)
            fcntl.flock(self.fd, fcntl.LOCK_UN)
        finally:
            os.close(self.fd)
            self.fd = -1

    def __enter__(self) -> "RunLock":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.release()


def _read_facts(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_bytes() or b"{}")
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _describe(owner: dict[str, Any]) -> str:
    if not owner:
        return "another process"
    since = owner.get("started_at")
    when = time.strftime(" since %Y-%m-%d %H:%M:%S", time.localtime(since)) if isinstance(since, (int, float)) else ""
    return f"pid {owner.get('pid')} on host {owner.get('host')}{when}"


def _end_leftovers(pids: list[Any]) -> list[int]:
    """SIGKILL the recorded helper processes of a dead owner that still run Ray's programs (a pid
    reused by something else is left alone)."""
    ended = []
    for pid in pids:
        if not isinstance(pid, int) or pid == os.getpid() or not pid_alive(pid):
            continue
        if "ray" not in _cmdline(pid).lower():
            continue
        try:
            os.kill(pid, signal.SIGKILL)
            ended.append(pid)
        except (ProcessLookupError, PermissionError):
            pass
    return ended


def _next_session(run: RunDir) -> int:
    path = run.root / SESSIONS_NAME
    n = 0
    if path.exists():
        try:
            n = int(json.loads(path.read_text()).get("sessions", 0))
        except (ValueError, AttributeError, TypeError):
            raise RunDirError(f"{path} is corrupt; it only counts the openings of the run and may be deleted") from None
    atomic_write_bytes(path, json.dumps({"sessions": n + 1}).encode())
    return n
