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
from typing import Any, Iterator


class MetricsLog:
    """Appends metric lines to one metrics.jsonl file."""

    def __init__(self, path: str | os.PathLike[str], component: str, source: str = "") -> None:
        self.path = Path(path)
        self.component = component
        self.source = source or component
        #: lines that could not be written (disk full, read-only, ...): a run goes on without them
        self.dropped = 0

    def write(self, **fields: Any) -> dict[str, Any]:
        """Append one line with the current time and ``fields``; returns the line as a dict."""
        row = {"t": time.time(), "component": self.component, "source": self.source, **fields}
        line = json.dumps(row, separators=(",", ":"), default=_jsonable) + "\n"
        try:
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
            try:
                data = line.encode()
                if os.write(fd, data) != len(data):  # a short append: the disk filled mid-line
                    raise OSError(28, "short write")
            finally:
                os.close(fd)
        except OSError as exc:
            self.dropped += 1
            if self.dropped == 1:  # said once; the count goes on in ``dropped``
                msg = (f"metrics: cannot append to {self.path} ({exc.strerror or exc}); "
                       f"{self.component} lines are dropped until it can")
                logging.getLogger(__name__).warning(msg)
                print(msg, file=sys.stderr)
        return row


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
