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


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary name, fsync and rename (never half-written)."""
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)
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
