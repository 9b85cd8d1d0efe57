"""Reading RUN/metrics.jsonl as hostile input: complete lines only, each one checked.

A metric line is used only when it is a JSON object whose ``t`` is a finite Unix time in a sane
range (not negative, and at most :data:`FUTURE_TOLERANCE_SECONDS` ahead of the reader's clock),
whose ``component`` (and ``source``, when present) is a short string, and whose numbers are all
finite and of a size a counter can have. Anything else is skipped and counted, so one bad line
(a clock gone wrong, a hand edit, a damaged disk block) can neither crash a reader nor move the
run's reference time to the year 285 billion.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path
from typing import Any

#: a line stamped further than this ahead of the reader's clock is refused (clock skew between
#: machines of one cluster stays far below a day)
FUTURE_TOLERANCE_SECONDS = 86_400.0
#: largest magnitude a number in a metric line may have (counters and ids are 64-bit at most)
MAX_ABS_NUMBER = float(2**64)
#: longest ``component`` / ``source`` string accepted
MAX_NAME_CHARS = 256


def line_problem(row: Any, wall_now: float | None = None) -> str | None:
    """Why the parsed metric line ``row`` cannot be used, or None when it is sound."""
    if not isinstance(row, dict):
        return "not a JSON object"
    t = row.get("t")
    if isinstance(t, bool) or not isinstance(t, (int, float)):
        return "no numeric 't'"
    limit = (time.time() if wall_now is None else wall_now) + FUTURE_TOLERANCE_SECONDS
    if not math.isfinite(t) or t < 0 or t > limit:
        return f"'t' {t!r} is not a Unix time in range"
    comp = row.get("component")
    if not isinstance(comp, str) or not comp or len(comp) > MAX_NAME_CHARS:
        return "no 'component' name"
    src = row.get("source")
    if src is not None and (not isinstance(src, str) or len(src) > MAX_NAME_CHARS):
        return "'source' is not a short string"
    for key, v in row.items():
        if isinstance(v, bool):
            continue
        if isinstance(v, (int, float)) and not (abs(v) <= MAX_ABS_NUMBER):  # NaN fails this too
            return f"{key!r} is not a finite number of sane size"
    return None


class MetricsTail:
    """Reads the complete lines appended to a metrics.jsonl file since the last call.

    A torn last line (a writer mid-line) is left for the next call; a complete line that fails
    :func:`line_problem` is skipped and counted in ``bad_lines`` (``last_problem`` says why)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.offset = 0
        self.bad_lines = 0
        self.last_problem: str | None = None

    def _bad(self, why: str) -> None:
        self.bad_lines += 1
        self.last_problem = why

    def read_new(self, max_bytes: int = 8 << 20, wall_now: float | None = None) -> list[dict[str, Any]]:
        """Parse complete lines from the last offset, reading at most ``max_bytes`` (call again
        until it returns [] to reach the end; memory stays bounded however big the file)."""
        try:
            size = self.path.stat().st_size
        except FileNotFoundError:
            return []
        if size < self.offset:  # file replaced or truncated: start again
            self.offset = 0
        if size == self.offset:
            return []
        with open(self.path, "rb") as f:
            f.seek(self.offset)
            data = f.read(min(size - self.offset, max_bytes))
        end = data.rfind(b"\n")
        if end < 0:
            if len(data) >= max_bytes:  # one line longer than max_bytes: skip past it
                self.offset += len(data)
                self._bad(f"a line longer than {max_bytes} bytes")
                return self.read_new(max_bytes, wall_now)
            return []  # a line still being written
        self.offset += end + 1
        wall = time.time() if wall_now is None else wall_now
        rows = []
        for raw in data[: end + 1].splitlines():
            if not raw.strip():
                continue
            try:
                row = json.loads(raw)
            except (json.JSONDecodeError, UnicodeDecodeError, RecursionError):
                self._bad("not JSON")
                continue
            why = line_problem(row, wall)
            if why is None:
                rows.append(row)
            else:
                self._bad(why)
        return rows
