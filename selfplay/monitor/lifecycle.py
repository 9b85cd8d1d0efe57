"""Whether a run is running, stopped or crashed, read from its ``component: "run"`` lines.

The driver of a run writes (see docs/metrics.md, section 1):

- ``{"event": "start", "pid": int, "host": str, "mode": "ray" | "in-process"}`` when it starts
  (again at every resume);
- ``{"event": "heartbeat"}`` at least every 10 s while it runs;
- ``{"event": "stop", "stop_reason": str}`` when it stops ("games reached", "positions reached",
  "minutes reached", "interrupted", "terminated" or "error: <message>").

The state follows from the newest of these lines:

- a stop line that is the last run event → **stopped**, with its reason;
- otherwise, when the newest heartbeat (or any line the run wrote) is older than
  :data:`STALE_SECONDS` by the reader's clock → **crashed** (nothing said goodbye); at once,
  without waiting for the silence, when the newest start line names this host and its process
  no longer runs (a killed driver read from its own machine);
- otherwise **running**.

A run written before these lines existed has no run lines: it is *running* while it writes,
and *stopped* (reason unknown) once it has been silent for :data:`STALE_SECONDS`; ``basis``
says which rule decided.
"""

from __future__ import annotations

import socket
from dataclasses import dataclass, field
from typing import Any

from selfplay.rundir import pid_alive

#: a run silent for longer than this (by the reader's clock) is not running; the driver's
#: heartbeat comes at least every 10 s
STALE_SECONDS = 30.0

RUNNING, STOPPED, CRASHED = "running", "stopped", "crashed"


@dataclass
class RunEvents:
    """The ``run`` lines seen so far: sessions (start lines) and the newest event."""

    starts: list[dict[str, Any]] = field(default_factory=list)
    last_event: str | None = None
    last_event_t: float | None = None
    stop_reason: str | None = None
    last_beat_t: float | None = None

    def ingest(self, row: dict[str, Any]) -> None:
        """Take one ``component: "run"`` line (lines with an unknown event are ignored)."""
        event = row.get("event")
        t = float(row["t"])
        if event not in ("start", "heartbeat", "stop"):
            return
        self.last_beat_t = t if self.last_beat_t is None else max(self.last_beat_t, t)
        if event == "heartbeat":
            return
        if event == "start":
            self.starts.append({k: row.get(k) for k in ("t", "pid", "host", "mode")})
        if self.last_event_t is None or t >= self.last_event_t:
            self.last_event, self.last_event_t = event, t
            reason = row.get("stop_reason")
            self.stop_reason = (str(reason)[:500] if reason is not None else "unknown") if event == "stop" else None

    @property
    def seen(self) -> bool:
        return self.last_beat_t is not None


def run_state(events: RunEvents, last_write: float | None, wall_now: float) -> dict[str, Any]:
    """The run's state as of the reader's clock ``wall_now``.

    ``last_write``: the newest time the run wrote anything (metric line or committed game).
    Returns ``state``, ``stop_reason``, ``stopped_at`` (Unix s: the stop line, or the last sign
    of life of a crashed or silent run), ``silent_seconds`` and ``basis`` (``"run lines"`` or
    ``"freshness"`` for runs without run lines)."""
    if last_write is None and not events.seen:
        return {"state": None, "stop_reason": None, "stopped_at": None, "silent_seconds": None,
                "basis": None, "mode": None}
    newest = max(x for x in (last_write, events.last_beat_t) if x is not None)
    silent = max(0.0, wall_now - newest)
    mode = events.starts[-1].get("mode") if events.starts else None
    out = {"state": RUNNING, "stop_reason": None, "stopped_at": None, "silent_seconds": round(silent, 1),
           "basis": "run lines" if events.seen else "freshness", "mode": mode}
    if events.seen and events.last_event == "stop":
        out.update(state=STOPPED, stop_reason=events.stop_reason, stopped_at=events.last_event_t)
    elif silent > STALE_SECONDS or (events.seen and _driver_gone(events)):
        # with run lines and no stop: nobody said goodbye → crashed. Without run lines (a run
        # from before they existed) silence is all we know: call it stopped, reason unknown.
        out.update(state=CRASHED if events.seen else STOPPED, stopped_at=newest)
    return out


def _driver_gone(events: RunEvents) -> bool:
    """True when the newest start line names this host and a process that no longer runs."""
    start = events.starts[-1] if events.starts else {}
    pid = start.get("pid")
    return (start.get("host") == socket.gethostname() and isinstance(pid, int) and not isinstance(pid, bool)
            and not pid_alive(pid))
