"""The status of a run, computed from its run directory alone.

Sources, read-only, so that any machine that can read the run directory can watch it:

- ``RUN/metrics.jsonl``: lines of every component (fields in docs/metrics.md), read
  incrementally (only new complete lines are parsed at each refresh);
- ``RUN/catalog.sqlite`` when present: the committed games (the authority for how many games
  and positions exist), opened with SQLite's read-only mode;
- ``RUN/snapshots/NNNNNN.json``: snapshot metadata (version, published_at).

:class:`RunMonitor` keeps state between refreshes (for ``watch`` and the Prometheus endpoint);
:func:`compute_summary` is the one-shot form behind ``selfplay status``. The summary is a plain
JSON-able dict whose keys are documented in docs/metrics.md.

Reference time: figures are computed "as of" the newest thing the run wrote (the newest metric
line, committed game or snapshot), not the reader's clock, so a finished run copied elsewhere
shows the rates it ended with; ``idle_seconds`` says how long ago that was by the reader's clock.
"""

from __future__ import annotations

import json
import math
import os
import sqlite3
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from selfplay.errors import FormatError, RunDirError
from selfplay.monitor.lifecycle import RUNNING, RunEvents, run_state
from selfplay.monitor.lines import FUTURE_TOLERANCE_SECONDS, MetricsTail
from selfplay.monitor.rates import (
    WINDOW_SECONDS,
    CounterSeries,
    LargestOf,
    per_hour,
    since_start_rate_per_second,
    window_rate_per_second,
    window_span,
)
from selfplay.rundir import RunDir

#: counters tracked per component (cumulative; restarts folded in)
COUNTER_FIELDS: dict[str, tuple[str, ...]] = {
    "worker": ("games_total", "positions_total", "evals_total", "resign_disabled_games_total",
               "resign_probe_triggered_total", "resign_false_positives_total"),
    "buffer": ("games_total", "positions_total", "duplicates_total", "shards_total"),
    "learner": ("step", "samples_trained_total"),
}


#: fields kept per line when every line is kept (``keep_rows``, for the report's plots)
ROW_FIELDS_KEPT = frozenset({
    "t", "component", "source", "snapshot_version", "games_total", "step", "loss", "loss_policy",
    "loss_value", "loss_l2", "loss_ownership", "loss_score", "learning_rate", "reuse_ratio", "samples_trained_total",
    "window_positions", "window_capacity", "resign_disabled_games_total", "resign_probe_triggered_total",
    "resign_false_positives_total", "opponent", "player", "games", "wins", "draws", "losses", "elo",
    "elo_low", "elo_high", "version", "published_at", "event", "stop_reason", "final",
})


# ---- state kept per (component, source) ----------------------------------------------------------

@dataclass
class SourceState:
    """What one source (a worker, the buffer, the learner ...) last reported, and its counters."""

    component: str
    source: str
    first_t: float
    last_t: float
    last: dict[str, Any] = field(default_factory=dict)
    counters: dict[str, CounterSeries] = field(default_factory=dict)
    #: time of the source's last line marked ``"final": true`` (written when its role stops)
    final_t: float | None = None

    def ingest(self, row: dict[str, Any]) -> None:
        t = float(row["t"])
        if t < self.first_t:
            self.first_t = t
        if row.get("final") is True:
            self.final_t = t if self.final_t is None else max(self.final_t, t)
        if t >= self.last_t:
            self.last_t = t
            self.last.update(row)
        counters = self.counters
        for name in COUNTER_FIELDS.get(self.component, ()):
            v = row.get(name)
            if v is None:
                continue
            kind = type(v)
            if kind is int or (kind is float and math.isfinite(v)):
                series = counters.get(name)
                if series is None:
                    series = counters[name] = CounterSeries()
                series.add(t, v)

    def counter(self, name: str) -> CounterSeries:
        return self.counters.get(name) or CounterSeries()


def _num(v: Any) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    return float(v) if math.isfinite(v) else None


def _sane_time(v: Any) -> float | None:
    """``v`` as a Unix time when it is one a run can have written (see monitor.lines), else None."""
    t = _num(v)
    return t if t is not None and 0 <= t <= time.time() + FUTURE_TOLERANCE_SECONDS else None


def _round(v: float | None, nd: int = 3) -> float | None:
    return None if v is None else round(v, nd)


# ---- the catalog, read-only ----------------------------------------------------------------------

@dataclass
class CatalogFacts:
    """Figures read from catalog.sqlite (None where the catalog lacks the column).

    One aggregate scan per refresh; the windowed counts are one more filtered query
    (:meth:`counts_between`). ``finished_times`` / ``positions_cumsum`` (every game's finish time
    in order, and the running sum of positions) are loaded only on request (plots)."""

    path: Path
    games: int
    positions: int | None
    first_finished: float | None
    last_finished: float | None
    started_first: float | None
    resign: dict[str, int] | None
    shards: int | None
    fin_col: str | None = None
    pos_col: str | None = None
    finished_times: list[float] | None = None
    positions_cumsum: list[float] | None = None
    #: worker id → (first game's start, games): when each worker began, for its own rates
    workers: dict[str, tuple[float | None, int]] = field(default_factory=dict)

    def counts_between(self, start: float, end: float) -> tuple[int, int]:
        """(games, positions) finished in ``(start, end]``."""
        if self.fin_col is None:
            return 0, 0
        if start < (self.first_finished or 0) and end >= (self.last_finished or 0):
            return self.games, self.positions or 0
        pos = f"coalesce(sum({self.pos_col}), 0)" if self.pos_col else "0"
        with _connect_ro(self.path) as con:
            r = con.execute(f"SELECT count(*), {pos} FROM games WHERE {self.fin_col} > ? AND {self.fin_col} <= ?",
                            (start, end)).fetchone()
        return int(r[0]), int(r[1])


def _pick(cols: set[str], *names: str) -> str | None:
    for n in names:
        if n in cols:
            return n
    return None


class _connect_ro:
    """Context manager: a read-only SQLite connection to ``path`` (closed on exit)."""

    def __init__(self, path: Path) -> None:
        try:
            self.con = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5.0)
        except sqlite3.Error as exc:
            raise FormatError(f"cannot open catalog {str(path)!r} read-only: {exc}") from exc
        self.path = path

    def __enter__(self) -> sqlite3.Connection:
        return self.con

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        self.con.close()
        if isinstance(exc, sqlite3.Error):
            raise FormatError(f"cannot read catalog {str(self.path)!r}: {exc}") from exc


def read_catalog(path: Path, keep_times: bool = False) -> CatalogFacts | None:
    """Read the committed games' figures from ``path`` (read-only); None if there is no catalog.

    Column names follow the replay store's schema (selfplay/replay/catalog.py); a few aliases
    are accepted so the monitor keeps working across schema revisions."""
    if not path.exists():
        return None
    with _connect_ro(path) as con:
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if "games" not in tables:
            return None
        cols = {r[1] for r in con.execute("PRAGMA table_info(games)")}
        pos_col = _pick(cols, "positions", "num_positions", "length")
        fin_col = _pick(cols, "finished_at", "finished")
        start_col = _pick(cols, "started_at")
        dis_col, would_col, res_col = _pick(cols, "resign_disabled"), _pick(cols, "resign_would_have"), _pick(cols, "result")
        have_resign = bool(dis_col and would_col and res_col)
        parts = ["count(*)",
                 f"coalesce(sum({pos_col}), 0)" if pos_col else "NULL",
                 f"min({fin_col})" if fin_col else "NULL",
                 f"max({fin_col})" if fin_col else "NULL",
                 f"min(CASE WHEN {start_col} > 0 THEN {start_col} END)" if start_col else "NULL"]
        if have_resign:
            # a false positive: the would-have-resigned player did not lose (result: player 0's view)
            parts += [f"coalesce(sum({dis_col} != 0), 0)",
                      f"coalesce(sum({dis_col} != 0 AND {would_col} >= 0), 0)",
                      f"coalesce(sum({dis_col} != 0 AND (({would_col} = 0 AND {res_col} >= 0) OR "
                      f"({would_col} = 1 AND {res_col} <= 0))), 0)"]
        r = con.execute(f"SELECT {', '.join(parts)} FROM games").fetchone()
        resign = None
        if have_resign:
            resign = {"disabled_games": int(r[5]), "would_resign_games": int(r[6]), "false_positives": int(r[7])}
        shards = int(con.execute("SELECT count(*) FROM shards").fetchone()[0]) if "shards" in tables else None
        facts = CatalogFacts(path, int(r[0]), None if r[1] is None else int(r[1]),
                             None if r[2] is None else float(r[2]), None if r[3] is None else float(r[3]),
                             None if r[4] is None else float(r[4]), resign, shards, fin_col, pos_col)
        if "worker" in cols and start_col:
            for w, first, n in con.execute(f"SELECT worker, min(CASE WHEN {start_col} > 0 THEN {start_col} END), "
                                           f"count(*) FROM games GROUP BY worker"):
                facts.workers[str(w)] = (None if first is None else float(first), int(n))
        if keep_times and fin_col:
            rows = con.execute(f"SELECT {fin_col}, {pos_col or 0} FROM games WHERE {fin_col} IS NOT NULL "
                               f"ORDER BY {fin_col}").fetchall()
            facts.finished_times = [float(x[0]) for x in rows]
            acc, cum = 0.0, []
            for x in rows:
                acc += float(x[1] or 0)
                cum.append(acc)
            facts.positions_cumsum = cum
        return facts


# ---- snapshots -----------------------------------------------------------------------------------

SnapshotMeta = tuple[int, float | None, float | None, float | None]  # version, published_at, steps, samples


def read_snapshot_times(snap_dir: Path, cache: dict[str, SnapshotMeta] | None = None,
                        learner_out: dict[int, tuple[float | None, float | None]] | None = None
                        ) -> dict[int, float | None]:
    """Map snapshot version → published_at (Unix s) from ``snap_dir/NNNNNN.json`` files.

    ``learner_out`` (if given) receives version → (training_steps, samples_seen) as the
    learner stored them with each snapshot."""
    out: dict[int, float | None] = {}
    if not snap_dir.is_dir():
        return out
    for p in snap_dir.glob("*.json"):
        if p.name.startswith("."):
            continue
        if cache is not None and p.name in cache:
            v, ts, steps, samples = cache[p.name]
        else:
            try:
                if p.stat().st_size > 1 << 20:
                    continue  # not a snapshot's metadata
                meta = json.loads(p.read_text())
                v = int(meta.get("version", int(p.stem)))
            except (ValueError, OSError, TypeError, AttributeError, RecursionError):
                continue  # a snapshot being written or foreign; the store validates its own files
            ts = _sane_time(meta.get("published_at", meta.get("created_at")))
            steps, samples = _num(meta.get("training_steps")), _num(meta.get("samples_seen"))
            if cache is not None:
                cache[p.name] = (v, ts, steps, samples)
        out[v] = ts
        if learner_out is not None:
            learner_out[v] = (steps, samples)
    return out


# ---- the monitor ---------------------------------------------------------------------------------

class RunMonitor:
    """Incremental reader of one run directory; :meth:`summary` gives the status dict.

    ``keep_rows=True`` also keeps every metric line, reduced to ``ROW_FIELDS_KEPT`` (for plots),
    and every counter sample; otherwise counters are trimmed
    to the recent window so memory stays bounded however long the run is watched."""

    def __init__(self, run: str | os.PathLike[str], window: float = WINDOW_SECONDS,
                 keep_rows: bool = False) -> None:
        self.run = RunDir.open(run)
        self.window = float(window)
        self.keep_rows = keep_rows
        self.rows: list[dict[str, Any]] = []
        self.sources: dict[tuple[str, str], SourceState] = {}
        self.snapshot_times: dict[int, float | None] = {}
        self.evals: dict[str, dict[str, Any]] = {}
        self.first_t: float | None = None
        self.last_t: float | None = None
        self.catalog: CatalogFacts | None = None
        self.catalog_error: str | None = None
        self.events = RunEvents()
        #: snapshot version → (training_steps, samples_seen) stored with it by the learner
        self.snapshot_learner: dict[int, tuple[float | None, float | None]] = {}
        self._tail = MetricsTail(self.run.metrics)
        self._snap_cache: dict[str, Any] = {}

    # -- reading ----------------------------------------------------------------------------------
    def refresh(self) -> None:
        """Read what the run wrote since the last refresh."""
        if not self.run.root.is_dir():
            raise RunDirError(f"run directory {str(self.run.root)!r} is gone")
        while True:
            rows = self._tail.read_new()
            if not rows:
                break
            for row in rows:
                self._ingest(row)
            self._trim()
        self.snapshot_times.update(read_snapshot_times(self.run.snapshots, self._snap_cache,
                                                       self.snapshot_learner))
        try:
            self.catalog = read_catalog(self.run.catalog, keep_times=self.keep_rows)
            self.catalog_error = None
        except FormatError as exc:
            # unreadable for now (locked, not readable from this machine, damaged): keep
            # monitoring from the metric lines and say why the catalog is missing
            self.catalog = None
            self.catalog_error = str(exc)

    def _trim(self) -> None:
        """Forget counter samples older than the window (live views keep bounded memory)."""
        if self.keep_rows or self.last_t is None:
            return
        horizon = self.last_t - self.window
        for st in self.sources.values():
            for s in st.counters.values():
                s.trim_before(horizon)

    def _ingest(self, row: dict[str, Any]) -> None:
        t = float(row["t"])
        comp = str(row.get("component"))
        src = str(row.get("source") or comp)
        self.first_t = t if self.first_t is None else min(self.first_t, t)
        self.last_t = t if self.last_t is None else max(self.last_t, t)
        if self.keep_rows:
            self.rows.append({k: v for k, v in row.items() if k in ROW_FIELDS_KEPT})
        st = self.sources.get((comp, src))
        if st is None:
            st = self.sources[(comp, src)] = SourceState(comp, src, t, t)
        st.ingest(row)
        if comp == "run":
            self.events.ingest(row)
        elif comp == "snapshots":
            v = row.get("version")
            if isinstance(v, int) and not isinstance(v, bool):
                ts = _sane_time(row.get("published_at"))
                if self.snapshot_times.get(v) is None:
                    self.snapshot_times[v] = ts if ts is not None else t
        elif comp == "eval":
            key = str(row.get("opponent", src))
            self.evals[key] = row

    def of(self, component: str) -> list[SourceState]:
        return [st for (c, _), st in sorted(self.sources.items()) if c == component]

    # -- times ------------------------------------------------------------------------------------
    def _reference_time(self, now: float | None) -> float | None:
        if now is not None:
            return now
        cands = [self.last_t]
        if self.catalog and self.catalog.last_finished is not None:
            cands.append(self.catalog.last_finished)
        cands += [ts for ts in self.snapshot_times.values() if ts is not None]
        cands = [c for c in cands if c is not None]
        return max(cands) if cands else None

    def _run_start(self) -> float | None:
        cands = [self.first_t]
        if self.catalog:
            cands.append(self.catalog.started_first)
            if self.catalog.started_first is None:
                cands.append(self.catalog.first_finished)
        cands = [c for c in cands if c is not None]
        return min(cands) if cands else None

    # -- the summary ------------------------------------------------------------------------------
    def summary(self, now: float | None = None, wall_now: float | None = None) -> dict[str, Any]:
        """The status as a JSON-able dict (keys in docs/metrics.md).

        ``now``: reference time (default: the newest thing the run wrote); ``wall_now``: the
        reader's clock for ``idle_seconds`` (default: time.time())."""
        as_of = self._reference_time(now)
        start = self._run_start()
        wall = time.time() if wall_now is None else wall_now
        w = self.window
        workers = self.of("worker")
        buffers = self.of("buffer")
        learners = self.of("learner")
        last_write = max((x for x in (self.last_t, self.catalog.last_finished if self.catalog else None)
                          if x is not None), default=None)
        state = run_state(self.events, last_write, wall)
        running = state["state"] == RUNNING

        latest_version = max(self.snapshot_times) if self.snapshot_times else None
        latest_snapshot = None
        if latest_version is not None:
            pub = self.snapshot_times[latest_version]
            latest_snapshot = {
                "version": latest_version,
                "published_at": pub,
                "age_seconds": _round(None if pub is None or as_of is None else max(0.0, as_of - pub), 1),
                "count": len(self.snapshot_times),
            }

        # per-source totals (for cross-checking the catalog)
        counts: dict[str, Any] = {"catalog": None, "buffer": None, "workers": None}
        if self.catalog is not None:
            counts["catalog"] = {"games": self.catalog.games, "positions": self.catalog.positions,
                                 "shards": self.catalog.shards}
        if buffers:
            counts["buffer"] = {
                "games": int(LargestOf([b.counter("games_total") for b in buffers]).last_value),
                "positions": int(LargestOf([b.counter("positions_total") for b in buffers]).last_value),
            }
        if workers:
            counts["workers"] = {
                "games": int(sum(s.counter("games_total").last_value for s in workers)),
                "positions": int(sum(s.counter("positions_total").last_value for s in workers)),
            }

        # headline counts: catalog (committed games) > buffer lines > worker lines.
        # headline rates: buffer lines while they are fresh (they count games the moment the
        # buffer accepts them; the catalog only once their shard is written) > catalog > workers.
        cat = self.catalog
        buf_g = LargestOf([b.counter("games_total") for b in buffers])
        buf_p = LargestOf([b.counter("positions_total") for b in buffers])
        wrk_g = [s.counter("games_total") for s in workers]
        wrk_p = [s.counter("positions_total") for s in workers]
        games = positions = 0
        pending = not_stored = None
        gph = gph_start = pps = pps_start = None
        source = rates_source = "none"
        if as_of is not None:
            if cat is not None:
                source = "catalog"
                games, positions = cat.games, cat.positions or 0
                if buffers:
                    # games the buffer reported accepting that the catalog does not hold: waiting
                    # for it while the run runs; in a stopped or crashed run nobody will write
                    # them any more (lost, unless the next start recovers them from its journal)
                    unstored = max(0, int(buf_g.value_at(as_of)) - games)
                    if running:
                        pending = unstored
                    else:
                        not_stored = unstored
            elif buffers:
                source = "buffer"
                games, positions = int(buf_g.value_at(as_of)), int(buf_p.value_at(as_of))
            elif workers:
                source = "workers"
                games = int(sum(s.value_at(as_of) for s in wrk_g))
                positions = int(sum(s.value_at(as_of) for s in wrk_p))
            # a stopped or crashed run's buffer lines end before its last games were stored:
            # its rates come from what it stored (the catalog)
            buffer_fresh = running and bool(buffers) and max(b.last_t for b in buffers) >= as_of - w
            span = window_span(as_of, start, w)
            if buffer_fresh or (cat is None and buffers):
                rates_source = "buffer"
                gph = per_hour(window_rate_per_second([buf_g], as_of, start, w))
                gph_start = per_hour(since_start_rate_per_second([buf_g], as_of, start))
                pps = window_rate_per_second([buf_p], as_of, start, w)
                pps_start = since_start_rate_per_second([buf_p], as_of, start)
            elif cat is not None:
                rates_source = "catalog"
                if span > 0:
                    g_recent, p_recent = cat.counts_between(as_of - span, as_of)
                    g_all, p_all = cat.counts_between(-math.inf, as_of)
                    gph, pps = g_recent / span * 3600.0, p_recent / span
                    if start is not None and as_of > start:
                        gph_start = g_all / (as_of - start) * 3600.0
                        pps_start = p_all / (as_of - start)
                    if cat.pos_col is None:
                        pps = pps_start = None
            elif workers:
                rates_source = "workers"
                gph = per_hour(window_rate_per_second(wrk_g, as_of, start, w))
                gph_start = per_hour(since_start_rate_per_second(wrk_g, as_of, start))
                pps = window_rate_per_second(wrk_p, as_of, start, w)
                pps_start = since_start_rate_per_second(wrk_p, as_of, start)

        # workers
        worker_rows = []
        for st in workers:
            worker_rows.append(self._worker_row(st, as_of, start, latest_version))
        # "recent": reported within the window ending at as_of (for a stopped run: at its stop);
        # "active": recent and the run is still running
        recent = [r for r in worker_rows if r["recent"]]
        for r in worker_rows:
            r["active"] = r["recent"] and (running or state["state"] is None)
        known = [r["evals_per_second"] for r in recent if r["evals_per_second"] is not None]
        evals_ps = sum(known) if known else None
        lags = [r["snapshot_lag_versions"] for r in recent if r["snapshot_lag_versions"] is not None]
        ages = [r["data_age_seconds"] for r in recent if r["data_age_seconds"] is not None]

        summary: dict[str, Any] = {
            "run": str(self.run.root),
            "state": state["state"],
            "stop_reason": state["stop_reason"],
            "stopped_at": state["stopped_at"],
            "state_basis": state["basis"],
            "mode": state["mode"],
            "as_of": as_of,
            "started_at": start,
            "elapsed_seconds": _round(None if as_of is None or start is None else as_of - start, 1),
            "idle_seconds": _round(None if as_of is None else max(0.0, wall - as_of), 1),
            "window_seconds": w,
            "window_span_seconds": None if as_of is None else _round(window_span(as_of, start, w), 1),
            "empty": as_of is None,
            "counts_source": source,
            "rates_source": rates_source,
            "games": int(games),
            "positions": int(positions),
            "pending_games": pending,
            "unstored_games": not_stored,
            "games_per_hour": _round(gph, 2),
            "games_per_hour_since_start": _round(gph_start, 2),
            "positions_per_second": _round(pps, 3),
            "positions_per_second_since_start": _round(pps_start, 3),
            "evals_per_second": _round(evals_ps, 2),
            "latest_snapshot": latest_snapshot,
            "snapshot_lag_versions": max(lags) if lags else None,
            "data_age_seconds": _round(max(ages), 1) if ages else None,
            "workers": worker_rows,
            "active_workers": sum(1 for r in worker_rows if r["active"]),
            "workers_at_stop": None if running or state["state"] is None else len(recent),
            "buffer": self._buffer_block(buffers, latest_version, as_of, None if running else cat),
            "learner": self._learner_block(learners, as_of, start),
            "resignation": self._resign_block(workers),
            "eval_matches": [self._eval_row(r) for _, r in sorted(self.evals.items())],
            "counts": counts,
            "catalog_error": self.catalog_error,
            "metrics_bad_lines": self._tail.bad_lines,
        }
        return summary

    def _worker_row(self, st: SourceState, as_of: float | None, start: float | None,
                    latest_version: int | None) -> dict[str, Any]:
        w = self.window
        last = st.last
        g, p, e = st.counter("games_total"), st.counter("positions_total"), st.counter("evals_total")
        ref = as_of if as_of is not None else st.last_t
        born = self.worker_start(st, start)
        version = last.get("snapshot_version")
        version = int(version) if isinstance(version, (int, float)) and not isinstance(version, bool) else None
        lag = None if version is None or latest_version is None else max(0, latest_version - version)
        pub = self.snapshot_times.get(version) if version is not None else None
        age = None if pub is None else max(0.0, ref - pub)
        # the recent window is the run's (same span for every worker, so the workers' rates add
        # up to the run's); since-start is over the worker's own life
        wstart = start if start is not None else born
        evals_ps = window_rate_per_second([e], ref, wstart, w) if len(e) >= 1 and e.last_value > 0 else None
        if evals_ps is None:
            evals_ps = _num(last.get("evals_per_second"))
        pps = window_rate_per_second([p], ref, wstart, w) if len(p) else _num(last.get("positions_per_second"))
        # since its start: what it reported last over the time from its start to that report
        since = since_start_rate_per_second([g], st.last_t, born) if len(g) else None
        return {
            "id": st.source,
            "games": int(g.value_at(ref)),
            "positions": int(p.value_at(ref)),
            "games_per_hour": _round(per_hour(window_rate_per_second([g], ref, wstart, w)) if len(g) else None, 2),
            "games_per_hour_since_start": _round(per_hour(since), 2),
            "started_at": born,
            "positions_per_second": _round(pps, 3),
            "evals_per_second": _round(evals_ps, 2),
            "snapshot_version": version,
            "snapshot_lag_versions": lag,
            "data_age_seconds": _round(age, 1),
            "games_in_flight": last.get("games_in_flight"),
            "inference": (f"{last['inference_backend']} ({last.get('inference_precision', '?')})"
                          if isinstance(last.get("inference_backend"), str) else None),
            "restarts": g.resets,
            "first_seen": st.first_t,
            "last_seen": st.last_t,
            "seconds_since_seen": _round(ref - st.last_t, 1),
            "recent": ref - st.last_t <= w,
            "final": st.final_t is not None and st.final_t >= st.last_t,
        }

    def worker_start(self, st: SourceState, run_start: float | None) -> float:
        """When worker ``st`` began playing, for rates over its own lifetime (Unix s).

        A worker's first line comes only after its first games finished, so that line is too
        late a start (it inflates the worker's rate). The start of its first committed game
        (catalog) is used when known; else its first line if that reported no game yet; else
        the run's start."""
        first = st.first_t
        cat = self.catalog.workers.get(st.source) if self.catalog is not None else None
        if cat is not None and cat[0] is not None:
            return min(first, cat[0])
        g = st.counters.get("games_total")
        if g is not None and len(g) and g.values[0] > 0 and run_start is not None:
            return min(first, run_start)
        return first

    def _buffer_block(self, buffers: list[SourceState], latest_version: int | None,
                      as_of: float | None, stored: CatalogFacts | None = None) -> dict[str, Any] | None:
        """The buffer's figures; ``stored`` (a stopped run's catalog) replaces its counts."""
        if not buffers:
            return None
        wp = [_num(b.last.get("window_positions")) for b in buffers]
        wc = [_num(b.last.get("window_capacity")) for b in buffers]
        size = sum(v for v in wp if v is not None) if any(v is not None for v in wp) else None
        cap = sum(v for v in wc if v is not None) if any(v is not None for v in wc) else None
        newest = [b.last.get("newest_snapshot_in_data") for b in buffers]
        newest = [int(v) for v in newest if isinstance(v, (int, float)) and not isinstance(v, bool)]
        newest_v = max(newest) if newest else None
        pub = self.snapshot_times.get(newest_v) if newest_v is not None else None
        games = int(LargestOf([b.counter("games_total") for b in buffers]).last_value)
        positions = int(LargestOf([b.counter("positions_total") for b in buffers]).last_value)
        if stored is not None:
            games, positions = stored.games, stored.positions or 0
        return {
            # each buffer shard reports whole-catalog counts (+ its own waiting games): the
            # largest across shards, not the sum
            "games": games,
            "positions": positions,
            "duplicates": int(LargestOf([b.counter("duplicates_total") for b in buffers]).last_value),
            "shards": int(LargestOf([b.counter("shards_total") for b in buffers]).last_value),
            "sources": len(buffers),
            "window_positions": None if size is None else int(size),
            "window_capacity": None if cap is None else int(cap),
            "fill": _round(size / cap, 4) if size is not None and cap else None,
            "newest_snapshot_in_data": newest_v,
            "data_lag_versions": None if newest_v is None or latest_version is None
            else max(0, latest_version - newest_v),
            "data_age_seconds": _round(None if pub is None or as_of is None else max(0.0, as_of - pub), 1),
        }

    def _learner_block(self, learners: list[SourceState], as_of: float | None,
                       start: float | None) -> dict[str, Any] | None:
        if not learners:
            return None
        st = max(learners, key=lambda s: s.last_t)
        last = st.last
        steps = st.counter("step")
        sps = _num(last.get("steps_per_second"))
        if sps is None and len(steps) >= 2 and as_of is not None:
            sps = window_rate_per_second([steps], as_of, st.first_t, self.window)
        step = _num(last.get("step"))
        samples = _num(last.get("samples_trained_total"))
        # the snapshots carry the learner's step and samples at each publish (the final one
        # too): a figure newer than the last periodic line
        for v_steps, v_samples in self.snapshot_learner.values():
            if v_steps is not None and (step is None or v_steps > step):
                step = v_steps
            if v_samples is not None and (samples is None or v_samples > samples):
                samples = v_samples
        return {
            "step": None if step is None else int(step),
            "steps_per_second": _round(sps, 3),
            "loss": _num(last.get("loss")),
            "loss_policy": _num(last.get("loss_policy")),
            "loss_value": _num(last.get("loss_value")),
            "loss_l2": _num(last.get("loss_l2")),
            **({"loss_ownership": _num(last.get("loss_ownership")), "loss_score": _num(last.get("loss_score"))}
               if "loss_ownership" in last else {}),
            "samples_trained": samples,
            "reuse_ratio": _num(last.get("reuse_ratio")),
            "learning_rate": _num(last.get("learning_rate")),
            "snapshot_version": last.get("snapshot_version"),
            "last_seen": st.last_t,
        }

    def _resign_block(self, workers: list[SourceState]) -> dict[str, Any] | None:
        cat = self.catalog.resign if self.catalog is not None else None
        if cat is not None and cat["disabled_games"] > 0:
            disabled, would, fp = cat["disabled_games"], cat["would_resign_games"], cat["false_positives"]
            origin = "catalog"
        elif workers:
            def total(name: str) -> float | None:
                vals = [s.counters[name].last_value for s in workers if name in s.counters]
                return sum(vals) if vals else None
            d, wr, f = (total("resign_disabled_games_total"),
                        total("resign_probe_triggered_total"),
                        total("resign_false_positives_total"))
            if d is None and f is None:
                return None
            disabled, fp = int(d or 0), int(f or 0)
            would = None if wr is None else int(wr)
            origin = "metrics"
        else:
            return None
        denom = would if would is not None else disabled
        return {
            "disabled_games": disabled,
            "would_resign_games": would,
            "false_positives": fp,
            "false_positive_rate": _round(fp / denom, 4) if denom else None,
            "denominator": "would_resign_games" if would is not None else "disabled_games",
            "from": origin,
        }

    @staticmethod
    def _eval_row(row: dict[str, Any]) -> dict[str, Any]:
        return {k: row.get(k) for k in ("t", "source", "opponent", "games", "wins", "draws",
                                         "losses", "elo", "snapshot_version")}


def compute_summary(run: str | os.PathLike[str], now: float | None = None,
                    window: float = WINDOW_SECONDS) -> dict[str, Any]:
    """One-shot status of the run directory ``run`` (what ``selfplay status --json`` prints)."""
    mon = RunMonitor(run, window=window)
    mon.refresh()
    return mon.summary(now=now)
