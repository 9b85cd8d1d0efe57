"""Time-stamped counters appended by every component to RUN/metrics.jsonl.

Each line is one JSON object: ``{"t": <unix seconds>, "component": <str>, "source": <str>, ...}``
followed by the component's own fields (documented in docs/metrics.md). Lines are written with
one ``write`` call on a file opened in append mode, so several processes on one machine can share
the file without interleaving lines.
"""

from __future__ import annotations

import json
import logging
import os
import sys
import time
from pathlib import Path
from typing import Any, Callable, Iterator


class MetricsLog:
    """Appends metric lines of one component and source.

    ``target`` is the metrics.jsonl path, or a callable that takes each finished line (a dict):
    a role far from the run directory (a Ray worker on another node) hands its lines to a role
    that owns the file, which appends them with :func:`append_rows`."""

    def __init__(self, target: str | os.PathLike[str] | Callable[[dict[str, Any]], Any], component: str,
                 source: str = "") -> None:
        self.sink: Callable[[dict[str, Any]], Any] | None = target if callable(target) else None
        self.path = None if callable(target) else Path(target)
        self.component = component
        self.source = source or component
        #: lines that could not be written (disk full, read-only, ...): a run goes on without them
        self.dropped = 0

    def write(self, **fields: Any) -> dict[str, Any]:
        """Append one line with the current time and ``fields``; returns the line as a dict."""
        row = {"t": time.time(), "component": self.component, "source": self.source, **fields}
        if self.sink is not None:
            self.sink(row)
            return row
        try:
            append_rows(self.path, [row])
        except OSError as exc:
            self.dropped += 1
            if self.dropped == 1:  # said once; the count goes on in ``dropped``
                msg = (f"metrics: cannot append to {self.path} ({exc.strerror or exc}); "
                       f"{self.component} lines are dropped until it can")
                logging.getLogger(__name__).warning(msg)
                print(msg, file=sys.stderr)
        return row


def append_rows(path: str | os.PathLike[str], rows: list[dict[str, Any]]) -> None:
    """Append finished metric lines to ``path``, each with one ``write`` call (so several
    processes on one machine can share the file without interleaving lines)."""
    fd = os.open(path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        size = os.fstat(fd).st_size
        # a writer that hit a full disk may have left half a line: end it first, so that this
        # line (a run's stop line, say) stays whole and readable
        torn = size > 0 and os.pread(fd, 1, size - 1) != b"\n"
        for row in rows:
            data = (json.dumps(row, separators=(",", ":"), default=_jsonable) + "\n").encode()
            if torn:
                data, torn = b"\n" + data, False
            if os.write(fd, data) != len(data):  # a short append: the disk filled mid-line
                raise OSError(28, "short write")
    finally:
        os.close(fd)


def _jsonable(v: Any) -> Any:
    if hasattr(v, "item"):
        return v.item()
    if hasattr(v, "tolist"):
        return v.tolist()
    raise TypeError(f"metric value {v!r} is not JSON-serialisable")


def read_metrics(path: str | os.PathLike[str]) -> Iterator[dict[str, Any]]:
    """Yield the metric lines of ``path`` in order; a torn last line (a writer died mid-line) is skipped."""
    p = Path(path)
    if not p.exists():
        return
    with open(p, "rb") as f:
        for raw in f:
            if not raw.endswith(b"\n"):
                break
            try:
                row = json.loads(raw)
            except ValueError:  # not JSON, or not UTF-8 text (a damaged line is skipped)
                continue
            if isinstance(row, dict):
                yield row
