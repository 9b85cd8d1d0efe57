"""Terminal views of a run's status: one frame (``selfplay status``) or a refreshing one
(``selfplay watch``), drawn with rich.

In an interactive terminal ``watch`` redraws in place (rich ``Live``); when stdout is a pipe or a
file it prints plain frames one after another (no cursor control), so it never fails for want of
a terminal.
"""

from __future__ import annotations

import datetime as _dt
import os
import sys
import time
from typing import Any, Callable

from rich import box
from rich.console import Console, Group, RenderableType
from rich.live import Live
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from selfplay.monitor.summary import RunMonitor

Summary = dict[str, Any]


def fmt_num(v: Any, digits: int = 1) -> str:
    """Short human form: 1234 → '1,234'; 12345678 → '12.3M'; None → '-'."""
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return f"{v:,}" if abs(v) < 10_000_000 else f"{v / 1e6:.{digits}f}M"
    if isinstance(v, float):
        a = abs(v)
        if a >= 1e7:
            return f"{v / 1e6:.{digits}f}M"
        if a >= 1000:
            return f"{v:,.0f}"
        if a >= 10:
            return f"{v:.{digits}f}"
        return f"{v:.{digits + 2}g}" if a > 0 else "0"
    return str(v)


def fmt_duration(seconds: Any) -> str:
    """Seconds as '45s', '12m05s', '3h07m', '2d04h'; None → '-'."""
    if seconds is None:
        return "-"
    s = int(round(float(seconds)))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    if s < 86400:
        return f"{s // 3600}h{(s % 3600) // 60:02d}m"
    return f"{s // 86400}d{(s % 86400) // 3600:02d}h"


def fmt_time(ts: Any) -> str:
    """Unix seconds as 'YYYY-MM-DD HH:MM:SS UTC'; None or a time no calendar holds → '-'."""
    if ts is None:
        return "-"
    try:
        return _dt.datetime.fromtimestamp(float(ts), tz=_dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
    except (OverflowError, OSError, ValueError):
        return "-"


def state_line(s: Summary) -> tuple[str, str]:
    """The run's state in words, and a rich style for it."""
    state = s.get("state")
    if state == "stopped":
        why = s.get("stop_reason")
        if why is None and s.get("state_basis") == "freshness":
            why = f"no run lines; silent for {fmt_duration(s.get('idle_seconds'))}"
        style = "bold red" if str(why or "").startswith("error") else "bold"
        return (f"stopped ({why or 'reason unknown'}) at {fmt_time(s.get('stopped_at'))}, "
                f"{fmt_duration(s.get('idle_seconds'))} ago", style)
    if state == "crashed":
        return (f"crashed: no heartbeat since {fmt_time(s.get('stopped_at'))} "
                f"({fmt_duration(s.get('idle_seconds'))} ago) and no stop line", "bold red")
    if state is None:  # only snapshots so far (e.g. a publish into a fresh run directory)
        return ("not started: no metric lines or games yet", "bold")
    return (f"running · last write {fmt_duration(s.get('idle_seconds'))} ago", "bold green")


def when_label(s: Summary) -> str:
    """How a figure's time is named: 'ago' for a running run, 'before stop' otherwise."""
    return {"stopped": "before stop", "crashed": "before the last write"}.get(str(s.get("state")), "ago")


def _kv_table(title: str, rows: list[tuple[str, str]]) -> Table:
    t = Table(title=title, title_justify="left", show_header=False, box=None, pad_edge=False)
    t.add_column("figure", style="bold")
    t.add_column("value", justify="right")
    for k, v in rows:
        t.add_row(k, v)
    return t


def _loss_row(ln: dict[str, Any]) -> tuple[str, str]:
    """The learner's loss and its parts, which add up to it: with area heads, the weighted
    ownership and score terms are the remainder after policy, value and l2."""
    if not ln:
        return ("loss = policy + value + l2", "-")
    parts = [ln.get("loss_policy"), ln.get("loss_value"), ln.get("loss_l2")]
    text = f"{fmt_num(ln.get('loss'))} = " + " + ".join(fmt_num(p) for p in parts)
    if "loss_ownership" not in ln:
        return ("loss = policy + value + l2", text)
    try:
        area = float(ln["loss"]) - sum(float(p) for p in parts)
    except (TypeError, ValueError, KeyError):
        area = None
    return ("loss = policy + value + l2 + area", f"{text} + {fmt_num(area)}")


def render_summary(s: Summary) -> RenderableType:
    """One frame of the status view."""
    span, full = s.get("window_span_seconds"), s.get("window_seconds")
    window = fmt_duration(full if span is None or full is None or span >= full else span)
    head = Text()
    head.append(f"run {s.get('run')}", style="bold")
    if s.get("empty"):
        head.append("\nno data yet: no metric lines, committed games or snapshots so far")
        return Panel(head, title="selfplay status")
    words, style = state_line(s)
    running = s.get("state") in (None, "running")
    head.append("\nstate ")
    head.append(words, style=style)
    at = "" if running else (" (at stop)" if s.get("state") == "stopped" else " (at the last write)")
    head.append(f"\nfigures as of {fmt_time(s.get('as_of'))}{at} · {fmt_duration(s.get('elapsed_seconds'))} since start"
                f" · counts from {s.get('counts_source')}, rates from {s.get('rates_source')}")

    if s.get("catalog_error"):
        head.append(f"\nwarning: {s['catalog_error']}; counts from the metric lines instead", style="bold yellow")
    if s.get("metrics_bad_lines"):
        head.append(f"\nwarning: {s['metrics_bad_lines']} malformed line(s) in metrics.jsonl skipped", style="yellow")
    snap = s.get("latest_snapshot") or {}
    games = fmt_num(s.get("games"))
    if s.get("pending_games"):
        games += f" (+{fmt_num(s['pending_games'])} accepted, not yet in the catalog)"
    if s.get("unstored_games"):
        games += (f" ({fmt_num(s['unstored_games'])} more reported but never stored: lost unless "
                  f"a resume recovers them)")
    n_workers = len(s.get("workers") or [])
    if running:
        workers_row = ("active workers", f"{s.get('active_workers', 0)} of {n_workers}")
    else:
        workers_row = ("workers reporting", f"{s.get('workers_at_stop') or 0} of {n_workers}")
    main = _kv_table("production" + at, [
        ("games", games),
        ("positions", fmt_num(s.get("positions"))),
        (f"games/h, last {window}", fmt_num(s.get("games_per_hour"))),
        ("games/h, since start", fmt_num(s.get("games_per_hour_since_start"))),
        (f"positions/s, last {window}", fmt_num(s.get("positions_per_second"))),
        ("network evals/s", fmt_num(s.get("evals_per_second"))),
        workers_row,
    ])
    backends = sorted({w["inference"] for w in s.get("workers") or [] if w.get("inference")})
    if backends:
        head.append(f"\ninference {', '.join(backends)}")
    fresh = _kv_table("freshness", [
        ("latest snapshot", fmt_num(snap.get("version"))),
        ("published", f"{fmt_duration(snap.get('age_seconds'))} {when_label(s)}"
         if snap.get("age_seconds") is not None else "-"),
        ("worst lag, versions", fmt_num(s.get("snapshot_lag_versions"))),
        ("worst data age", fmt_duration(s.get("data_age_seconds"))),
    ])
    b = s.get("buffer") or {}
    if b:
        fresh.add_row("buffer window", f"{fmt_num(b.get('window_positions'))} / {fmt_num(b.get('window_capacity'))}")
        fill = b.get("fill")
        fresh.add_row("buffer fill", "-" if fill is None else f"{100 * fill:.1f}%")
        fresh.add_row("duplicates ignored", fmt_num(b.get("duplicates")))
    ln = s.get("learner") or {}
    learn_rows = [
        ("step", fmt_num(ln.get("step"))),
        ("steps/s", fmt_num(ln.get("steps_per_second"))),
        _loss_row(ln),
        ("sample reuse", fmt_num(ln.get("reuse_ratio"))),
    ]
    if "loss_ownership" in ln:
        learn_rows.insert(3, ("ownership, score (unweighted)",
                              f"{fmt_num(ln.get('loss_ownership'))}, {fmt_num(ln.get('loss_score'))}"))
    r = s.get("resignation") or {}
    if r:
        rate = r.get("false_positive_rate")
        denom = r.get("would_resign_games") if r.get("denominator") == "would_resign_games" else r.get("disabled_games")
        if not denom:
            text = f"none yet ({fmt_num(r.get('disabled_games'))} probe games)"
        else:
            text = f"{r.get('false_positives')} / {denom}" + ("" if rate is None else f" = {100 * rate:.1f}%")
        learn_rows.append(("resign false positives", text))
    learn = _kv_table("learning", learn_rows)
    grid = Table.grid(padding=(0, 4))
    grid.add_row(main, fresh)

    parts: list[RenderableType] = [head, Text(""), grid, Text(""), learn]
    workers = s.get("workers") or []
    if workers:
        title = ("workers (dim: silent for longer than the window)" if running else
                 f"workers{at}: 'seen' is {when_label(s)}")
        wt = Table(title=title, title_justify="left",
                   box=box.SIMPLE_HEAD, pad_edge=False, collapse_padding=True, padding=(0, 1))
        for col, just in (("worker", "left"), ("games", "right"), ("games/h", "right"),
                          ("pos/s", "right"), ("evals/s", "right"), ("snap", "right"),
                          ("lag", "right"), ("age", "right"), ("playing", "right"),
                          ("seen", "right")):
            wt.add_column(col, justify=just, no_wrap=True)  # type: ignore[arg-type]
        shown = sorted(workers, key=lambda w: str(w.get("id")))
        limit = 40
        for w in shown[:limit]:
            style = None if w.get("recent", w.get("active")) else "dim"
            wt.add_row(str(w.get("id")), fmt_num(w.get("games")), fmt_num(w.get("games_per_hour")),
                       fmt_num(w.get("positions_per_second")), fmt_num(w.get("evals_per_second")),
                       fmt_num(w.get("snapshot_version")), fmt_num(w.get("snapshot_lag_versions")),
                       fmt_duration(w.get("data_age_seconds")),
                       fmt_num(w.get("games_in_flight")) if running else "-",
                       fmt_duration(w.get("seconds_since_seen")), style=style)
        if len(shown) > limit:
            wt.caption = f"{len(shown) - limit} more workers not shown (selfplay status --json lists all)"
        parts += [Text(""), wt]
    evals = s.get("eval_matches") or []
    if evals:
        et = Table(title="evaluation matches", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
        for col in ("opponent", "games", "wins", "draws", "losses", "elo"):
            et.add_column(col, justify="left" if col == "opponent" else "right")
        for e in evals:
            et.add_row(str(e.get("opponent")), *(fmt_num(e.get(k)) for k in ("games", "wins", "draws", "losses", "elo")))
        parts += [Text(""), et]
    return Panel(Group(*parts), title="selfplay status")


class QuitKey:
    """Waits between frames and notices ``q`` typed at the terminal (context manager).

    When standard input is a terminal it is put in cbreak mode (keys arrive one by one, without
    Enter; Ctrl-C still interrupts) and restored on exit; otherwise waiting is a plain sleep."""

    def __init__(self, stream: Any = None) -> None:
        self.stream = sys.stdin if stream is None else stream
        self._saved: Any = None
        self._fd: int | None = None

    def __enter__(self) -> "QuitKey":
        try:
            import termios
            import tty

            if self.stream is not None and self.stream.isatty():
                self._fd = self.stream.fileno()
                self._saved = termios.tcgetattr(self._fd)
                tty.setcbreak(self._fd)
        except (ImportError, OSError, ValueError, AttributeError):
            self._fd = None  # no terminal control here (Windows, a closed stdin): sleep only
        return self

    def __exit__(self, *exc: object) -> None:
        if self._fd is not None and self._saved is not None:
            import termios

            termios.tcsetattr(self._fd, termios.TCSADRAIN, self._saved)

    def wait(self, seconds: float) -> bool:
        """Wait up to ``seconds``; True as soon as ``q`` (or ``Q``) is typed."""
        if self._fd is None:
            time.sleep(seconds)
            return False
        import select

        deadline = time.monotonic() + seconds
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                return False
            ready, _, _ = select.select([self._fd], [], [], left)
            if ready:
                key = os.read(self._fd, 64)
                if not key:  # end of input: nothing more will come, just wait
                    time.sleep(max(0.0, deadline - time.monotonic()))
                    return False
                if b"q" in key.lower():
                    return True


def watch_run(run: str | os.PathLike[str], interval: float = 2.0, once: bool = False,
              console: Console | None = None, max_frames: int | None = None,
              on_summary: Callable[[Summary], None] | None = None, keys: Any = None) -> int:
    """Show the run's status, refreshing every ``interval`` seconds until ``q`` or Ctrl-C
    (either ends the watch normally).

    ``once``: draw one frame and return. In a non-interactive console frames are printed one
    after another. ``max_frames`` bounds the number of refreshes (tests); ``on_summary`` is
    called with every fresh summary. Returns the number of frames drawn."""
    console = console or Console()
    mon = RunMonitor(run)
    frames = 0

    def frame() -> RenderableType:
        nonlocal frames
        mon.refresh()
        s = mon.summary()
        if on_summary is not None:
            on_summary(s)
        frames += 1
        return render_summary(s)

    if once:
        console.print(frame())
        return frames
    try:
        with QuitKey(keys) as quit_key:
            if not console.is_terminal:
                while max_frames is None or frames < max_frames:
                    console.print(frame())
                    console.file.flush()
                    if max_frames is not None and frames >= max_frames:
                        break
                    if quit_key.wait(interval):
                        break
                return frames
            with Live(frame(), console=console, refresh_per_second=4, transient=False) as live:
                while max_frames is None or frames < max_frames:
                    if quit_key.wait(interval):
                        break
                    live.update(frame())
    except KeyboardInterrupt:  # Ctrl-C is how a watch ends
        pass
    return frames
