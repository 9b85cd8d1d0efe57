"""Rate arithmetic over cumulative counters (games, positions, evaluations, learner steps).

A component reports a cumulative counter now and then: samples ``(t_i, v_i)`` with ``t`` in
Unix seconds. We read the samples as a *step function*: the counter's value at time ``t`` is
the value of the newest sample taken at or before ``t`` (0 before the first sample). A counter
that goes down has restarted (a worker replaced after a crash reports from 0 again); as in
Prometheus' ``rate()``, the drop is folded in so the series stays monotone.

From the step function:

- increase over ``[a, b]`` = ``value_at(b) - value_at(a)``;
- rate over the last ``W`` seconds at ``b`` = increase over ``[b - W', b]`` / ``W'``, with
  ``W' = min(W, b - run_start)`` (the window cannot reach before the run started);
- rate since the start at ``b`` = ``value_at(b) / (b - start)``.

Per-hour figures are the per-second ones times 3600.
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass, field
from typing import Iterable, Sequence

#: default width of the "recent" window in seconds (the last 5 minutes)
WINDOW_SECONDS = 300.0


@dataclass
class CounterSeries:
    """Samples of one cumulative counter from one source, restarts folded in (monotone).

    ``times`` are Unix seconds in the order received (out-of-order samples are inserted in
    place); ``values`` are the adjusted cumulative counts."""

    times: list[float] = field(default_factory=list)
    values: list[float] = field(default_factory=list)
    _offset: float = 0.0
    _last_raw: float | None = None
    resets: int = 0

    def add(self, t: float, raw: float) -> None:
        """Add the sample ``raw`` (the counter as reported) taken at ``t``."""
        last = self._last_raw
        if last is not None and raw < last:
            self._offset += last  # counter restarted from 0
            self.resets += 1
        self._last_raw = raw
        v = float(raw) + self._offset
        times = self.times
        if not times or t >= times[-1]:
            times.append(float(t))
            self.values.append(v)
        else:
            i = bisect.bisect_right(self.times, t)
            self.times.insert(i, float(t))
            self.values.insert(i, v)

    def __len__(self) -> int:
        return len(self.times)

    @property
    def first_t(self) -> float | None:
        return self.times[0] if self.times else None

    @property
    def last_t(self) -> float | None:
        return self.times[-1] if self.times else None

    @property
    def last_value(self) -> float:
        return self.values[-1] if self.values else 0.0

    def value_at(self, t: float) -> float:
        """Counter at time ``t``: the newest sample at or before ``t``; 0 before the first."""
        i = bisect.bisect_right(self.times, t)
        return self.values[i - 1] if i > 0 else 0.0

    def increase(self, start: float, end: float) -> float:
        """How much the counter grew over ``[start, end]``."""
        return self.value_at(end) - self.value_at(start)

    def trim_before(self, t: float) -> None:
        """Forget samples older than the newest one at or before ``t`` (bounded memory for
        live views); ``value_at`` stays exact for every time >= ``t``."""
        i = bisect.bisect_right(self.times, t) - 1
        if i > 0:
            del self.times[:i]
            del self.values[:i]


class LargestOf:
    """Several counters that each report the same total plus a little of their own (buffer
    shards report the whole catalog's committed games plus their own waiting ones): read as
    their largest value at each time, not their sum. Quacks like :class:`CounterSeries` for
    the rate functions below."""

    def __init__(self, series: Sequence[CounterSeries]) -> None:
        self.series = list(series)

    def value_at(self, t: float) -> float:
        return max((s.value_at(t) for s in self.series), default=0.0)

    def increase(self, start: float, end: float) -> float:
        return self.value_at(end) - self.value_at(start)

    @property
    def last_value(self) -> float:
        return max((s.last_value for s in self.series), default=0.0)

    def __len__(self) -> int:
        return sum(len(s) for s in self.series)


def window_span(end: float, run_start: float | None, window: float = WINDOW_SECONDS) -> float:
    """Seconds covered by the recent window ending at ``end``: ``min(window, end - run_start)``."""
    if run_start is None:
        return window
    return max(0.0, min(window, end - run_start))


def total_increase(series: Iterable[CounterSeries | LargestOf], start: float, end: float) -> float:
    """Sum of the increases of several counters (one per source) over ``[start, end]``."""
    return sum(s.increase(start, end) for s in series)


def total_at(series: Iterable[CounterSeries | LargestOf], t: float) -> float:
    """Sum of several counters at time ``t``."""
    return sum(s.value_at(t) for s in series)


def window_rate_per_second(series: Sequence[CounterSeries | LargestOf], end: float, run_start: float | None,
                           window: float = WINDOW_SECONDS) -> float | None:
    """Summed rate (units per second) over the recent window ending at ``end``; None if the
    window is empty (``end`` is the run's start)."""
    span = window_span(end, run_start, window)
    if span <= 0:
        return None
    return total_increase(series, end - span, end) / span


def since_start_rate_per_second(series: Sequence[CounterSeries | LargestOf], end: float,
                                start: float | None) -> float | None:
    """Summed counter at ``end`` divided by the seconds since ``start``; None if no time passed."""
    if start is None or end <= start:
        return None
    return total_at(series, end) / (end - start)


def per_hour(rate_per_second: float | None) -> float | None:
    """Units per second → units per hour (None stays None)."""
    return None if rate_per_second is None else rate_per_second * 3600.0
