"""The run directory: one folder holds a whole run so it can be resumed, watched and copied.

Layout (see DEVELOPERS.md)::

    RUN/run.toml          resolved configuration (every default written out)
    RUN/snapshots/        NNNNNN.safetensors + NNNNNN.json, published atomically
    RUN/shards/           finished record shards, finalised by rename; never rewritten
    RUN/catalog.sqlite    one row per game and per shard (unique game id: exactly-once)
    RUN/metrics.jsonl     time series of counters from every component
    RUN/quarantine/       shards that failed their checks, moved aside with a reason
"""

from __future__ import annotations

import os
import re
import time
from dataclasses import dataclass
from pathlib import Path

from selfplay.errors import RunDirError


@dataclass(frozen=True)
class RunDir:
    """Paths of one run directory."""

    root: Path

    @property
    def config(self) -> Path:
        return self.root / "run.toml"

    @property
    def snapshots(self) -> Path:
        return self.root / "snapshots"

    @property
    def shards(self) -> Path:
        return self.root / "shards"

    @property
    def catalog(self) -> Path:
        return self.root / "catalog.sqlite"

    @property
    def metrics(self) -> Path:
        return self.root / "metrics.jsonl"

    @property
    def quarantine(self) -> Path:
        return self.root / "quarantine"

    @classmethod
    def create(cls, root: str | os.PathLike[str]) -> "RunDir":
        """Create the folders of a new or resumed run (existing content is left untouched)."""
        rd = cls(Path(root))
        for p in (rd.root, rd.snapshots, rd.shards, rd.quarantine):
            p.mkdir(parents=True, exist_ok=True)
        return rd

    def is_run_directory(self) -> bool:
        """True if the folder holds any part of a run (run.toml, catalog, shards/, snapshots/)."""
        return any(m.exists() for m in (self.config, self.catalog, self.shards, self.snapshots))

    @classmethod
    def open_or_start(cls, root: str | os.PathLike[str]) -> "RunDir":
        """A run directory that exists, or an existing *empty* folder to start one in (its
        sub-folders are created). A missing path or a folder holding other things is refused
        with RunDirError: a mistyped path never turns into a new run."""
        rd = cls(Path(root))
        if not rd.root.exists():
            raise RunDirError(f"run directory {str(rd.root)!r} does not exist")
        if not rd.root.is_dir():
            raise RunDirError(f"{str(rd.root)!r} is a file, not a run directory")
        if not rd.is_run_directory() and any(rd.root.iterdir()):
            raise RunDirError(
                f"{str(rd.root)!r} is not a run directory (no run.toml, catalog.sqlite, shards/ or "
                "snapshots/) and is not empty")
        return cls.create(rd.root)

    @classmethod
    def open(cls, root: str | os.PathLike[str]) -> "RunDir":
        """Open an existing run directory; raise RunDirError if ``root`` is not one."""
        rd = cls(Path(root))
        if not rd.root.exists():
            raise RunDirError(f"run directory {str(rd.root)!r} does not exist")
        if not rd.root.is_dir():
            raise RunDirError(f"{str(rd.root)!r} is a file, not a run directory")
        markers = (rd.config, rd.catalog, rd.shards, rd.snapshots)
        if not any(m.exists() for m in markers):
            raise RunDirError(
                f"{str(rd.root)!r} is not a run directory (no run.toml, catalog.sqlite, shards/ or snapshots/)"
            )
        return rd


#: temporary files of :func:`atomic_write_bytes` (and any writer using its pattern):
#: ``.NAME.tmp-PID``, where PID is the writing process
_TEMP_RE = re.compile(r"^\.(?P<name>.+)\.tmp-(?P<pid>\d+)$")
#: a temporary file of a process that is not running here is left alone while it is this
#: young (seconds): on a shared file system it may belong to a live process on another machine
STALE_TEMP_AGE_SECONDS = 60.0


def pid_alive(pid: int) -> bool:
    """True if process ``pid`` runs on this machine (a zombie counts as gone; without /proc a
    process that answers a signal counts as running)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OverflowError:
        return False
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:  # it exited since the signal, or there is no /proc (then assume it lives)
        return not Path("/proc/self").exists()
    return state != "Z"


def _pid_running(pid: int) -> bool:
    return pid == os.getpid() or pid_alive(pid)


def clean_stale_temp_files(run: "RunDir", min_age_seconds: float = STALE_TEMP_AGE_SECONDS) -> list[str]:
    """Remove the ``.NAME.tmp-PID`` files a dead process left in the run directory (its root
    and its direct sub-folders: ``snapshots/``, ``shards/``, ``learner/``, ...): those whose
    process is not running on this machine and that are older than ``min_age_seconds``.
    Returns the paths removed (relative to the run directory). Files of a running process, and
    finished files, are never touched."""
    removed: list[str] = []
    now = time.time()
    try:
        subfolders = [e.path for e in os.scandir(run.root) if e.is_dir(follow_symlinks=False)]
    except OSError:
        subfolders = []
    for folder in (run.root, *sorted(subfolders)):
        try:
            entries = list(os.scandir(folder))
        except OSError:
            continue
        for entry in entries:
            m = _TEMP_RE.match(entry.name)
            if not m or not entry.is_file(follow_symlinks=False):
                continue
            try:
                age = now - entry.stat(follow_symlinks=False).st_mtime
            except OSError:
                continue
            if age < min_age_seconds or _pid_running(int(m.group("pid"))):
                continue
            try:
                os.unlink(entry.path)
            except OSError:
                continue
            removed.append(os.path.relpath(entry.path, run.root))
    return sorted(removed)


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary name, fsync and rename (never half-written)."""
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        tmp.unlink(missing_ok=True)  # never leave half a file behind (e.g. the disk is full)
        if isinstance(exc, OSError) and exc.filename is None:
            exc.filename = str(path)  # a failed write names no file of its own: name the one being written
        raise
    fsync_dir(path.parent)


def fsync_dir(path: Path) -> None:
    """fsync a directory so a rename inside it survives a crash (no-op where unsupported)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
