"""Progress toward a run's stop condition, with an ETA, for ``selfplay run``.

The launcher makes one :class:`StopProgress` with the stop conditions it was given
(``--games``, ``--positions``, ``--minutes``; any combination — the run stops at the first one
met) and calls :meth:`StopProgress.update` with the current counts whenever it learns them::

    with StopProgress(games=args.games, minutes=args.minutes) as bar:
        while not done:
            bar.update(games=n_games, positions=n_positions)

ETA: for a count condition, the rate since this progress started (``(done - initial) / elapsed``)
extrapolated to the target; for ``minutes``, the time left. The run's ETA is the smallest of
them. In an interactive terminal the bars are drawn with rich.progress; otherwise one plain line
is printed every ``plain_every`` seconds (and at the end), so logs stay readable.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

from rich.console import Console
from rich.progress import BarColumn, Progress, TaskID, TextColumn, TimeElapsedColumn

from selfplay.errors import ConfigError
from selfplay.monitor.watch import fmt_duration


@dataclass
class _Goal:
    name: str           # "games", "positions" or "minutes"
    total: float        # target in the goal's unit (minutes are tracked in seconds)
    initial: float      # count when the progress started
    done: float = 0.0
    task: TaskID | None = None


class StopProgress:
    """Bars with ETA for the stop conditions of a run; update it with the current counts."""

    def __init__(self, *, games: int | None = None, positions: int | None = None,
                 minutes: float | None = None, initial_games: int = 0, initial_positions: int = 0,
                 console: Console | None = None, plain_every: float = 10.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.goals: list[_Goal] = []
        for name, target, initial in (("games", games, initial_games),
                                      ("positions", positions, initial_positions)):
            if target is None:
                continue
            if isinstance(target, bool) or not isinstance(target, int) or target <= 0:
                raise ConfigError(f"--{name} {target!r} must be a positive whole number")
            self.goals.append(_Goal(name, float(target), float(initial), float(initial)))
        if minutes is not None:
            if isinstance(minutes, bool) or not isinstance(minutes, (int, float)) or not minutes > 0:
                raise ConfigError(f"--minutes {minutes!r} must be a positive number")
            self.goals.append(_Goal("minutes", float(minutes) * 60.0, 0.0))
        self.console = console or Console(stderr=True)
        self.clock = clock
        self.plain_every = plain_every
        self._t0: float | None = None
        self._last_plain: float | None = None
        self._progress: Progress | None = None

    # -- lifecycle --------------------------------------------------------------------------------
    def start(self) -> "StopProgress":
        self._t0 = self.clock()
        if self.goals and self.console.is_terminal:
            self._progress = Progress(
                TextColumn("[bold]{task.description:>9}"), BarColumn(), TextColumn("{task.fields[done]}"),
                TextColumn("{task.percentage:>5.1f}%"), TextColumn("ETA {task.fields[eta]}"),
                TimeElapsedColumn(), console=self.console, transient=False)
            for g in self.goals:
                g.task = self._progress.add_task(g.name if g.name != "minutes" else "time", total=g.total,
                                                 completed=g.done, eta="-", done=self._done_text(g))
            self._progress.start()
        return self

    def close(self) -> None:
        """Draw the final state and stop drawing."""
        if self._t0 is None:
            return
        self._redraw(final=True)
        if self._progress is not None:
            self._progress.stop()
            self._progress = None
        self._t0 = None

    def __enter__(self) -> "StopProgress":
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- figures ----------------------------------------------------------------------------------
    def update(self, games: int | None = None, positions: int | None = None) -> None:
        """Record the current counts (cumulative, as the run's counters give them)."""
        if self._t0 is None:
            self.start()
        for g in self.goals:
            if g.name == "games" and games is not None:
                g.done = float(games)
            elif g.name == "positions" and positions is not None:
                g.done = float(positions)
        self._redraw(final=False)

    def elapsed(self) -> float:
        return 0.0 if self._t0 is None else max(0.0, self.clock() - self._t0)

    def goal_eta(self, g: _Goal) -> float | None:
        """Seconds until ``g`` is met at the rate seen so far; 0 when met; None when unknown."""
        el = self.elapsed()
        if g.name == "minutes":
            return max(0.0, g.total - el)
        if g.done >= g.total:
            return 0.0
        made = g.done - g.initial
        if el <= 0 or made <= 0:
            return None
        return (g.total - g.done) / (made / el)

    def eta_seconds(self) -> float | None:
        """Seconds until the first stop condition is met (None until a rate is known)."""
        etas = [e for e in (self.goal_eta(g) for g in self.goals) if e is not None]
        return min(etas) if etas else None

    def fraction(self, g: _Goal) -> float:
        done = self.elapsed() if g.name == "minutes" else g.done
        return min(1.0, done / g.total) if g.total else 1.0

    def finished(self) -> bool:
        """True when any stop condition is met."""
        return any(self.fraction(g) >= 1.0 for g in self.goals)

    def _done_text(self, g: _Goal) -> str:
        if g.name == "minutes":
            return f"{fmt_duration(self.elapsed())}/{fmt_duration(g.total)}"
        return f"{int(g.done):,}/{int(g.total):,}"

    def line(self) -> str:
        """One plain line: each condition's progress and the run's ETA."""
        parts = []
        for g in self.goals:
            if g.name == "minutes":
                parts.append(f"time {self._done_text(g)}")
            else:
                parts.append(f"{g.name} {self._done_text(g)} ({100 * self.fraction(g):.1f}%)")
        eta = self.eta_seconds()
        parts.append(f"ETA {fmt_duration(eta)}")
        return " · ".join(parts)

    # -- drawing ----------------------------------------------------------------------------------
    def _redraw(self, final: bool) -> None:
        if not self.goals:
            return
        if self._progress is not None:
            for g in self.goals:
                assert g.task is not None
                done = self.elapsed() if g.name == "minutes" else g.done
                self._progress.update(g.task, completed=min(done, g.total), eta=fmt_duration(self.goal_eta(g)),
                                      done=self._done_text(g))
            return
        now = self.clock()
        if final or self._last_plain is None or now - self._last_plain >= self.plain_every:
            self._last_plain = now
            self.console.print(self.line(), highlight=False, soft_wrap=True)
