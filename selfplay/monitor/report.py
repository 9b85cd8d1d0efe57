"""``selfplay report``: PNG plots of a run and one HTML page that shows them with its configuration.

Plots (each a PNG in the output folder; a plot with nothing to show says why in the image):

- ``games_per_hour.png``   games per hour over the run, over the status window (the last 5
  minutes, clipped to the run's start) and since start
- ``results_by_colour.png`` share of games won by player 0 (first to move), drawn, and won by
  player 1, over time
- ``game_length.png``      histogram of game lengths (moves) and the mean length by snapshot
  version (over time when the games come from one version)
- ``snapshot_lag.png``     per worker: versions behind the newest snapshot
- ``losses.png``           learner loss and its parts against the step
- ``learning_rate.png``    the learner's learning rate against the step
- ``sample_reuse.png``     samples trained per position generated, against the step
- ``buffer_fill.png``      replay window fill (positions held / capacity) over time
- ``value_calibration.png`` root value predicted by the search against the final outcome, both
  from the mover's view, in bins of the prediction (a calibrated value lies on the diagonal)
- ``policy_entropy.png``   entropy (nats) of the stored visit distributions of full-search
  positions: histogram, and mean by snapshot version
- ``resign_false_positives.png`` false-positive rate of resignation over time, with the 5 % bound
  that AlphaGo Zero (Silver et al. 2017) kept it under; says so when resignation is off
- ``elo.png``              Elo from the run's ``eval`` lines, with its interval when given,
  by snapshot version and over time

Everything is read from the run directory; the record-based plots use the newest
``max_games`` committed games.
"""

from __future__ import annotations

import html
import io
import json
import math
import os
import sqlite3
import textwrap
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import matplotlib

matplotlib.use("Agg")  # no display needed; must precede pyplot
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402

from selfplay.errors import ConfigError, SelfplayError  # noqa: E402
from selfplay.monitor.data import newest_records  # noqa: E402
from selfplay.monitor.rates import WINDOW_SECONDS, CounterSeries, window_rate_per_second  # noqa: E402
from selfplay.monitor.summary import RunMonitor  # noqa: E402
from selfplay.monitor.watch import fmt_duration, fmt_num, fmt_time, state_line  # noqa: E402
from selfplay.overwrite import check_output  # noqa: E402
from selfplay.records import GameRecord  # noqa: E402
from selfplay.rundir import atomic_write_bytes  # noqa: E402

#: resignation false-positive bound used by AlphaGo Zero (Silver et al., Nature 2017)
RESIGN_FALSE_POSITIVE_TARGET = 0.05

NO_DATA = "no data yet"

#: legend of an Elo series by its ``opponent`` field; the evaluation role's ladder lines carry
#: each snapshot's Bradley–Terry rating (anchor at 0), with its 95 % interval
ELO_LABELS = {"ladder": "ladder rating (Bradley–Terry, 95% interval)"}


@dataclass
class Plot:
    """One plot of the report: file name, title, whether it had data, and a note for the page."""

    file: str
    title: str
    has_data: bool
    note: str = ""


class Empty(Exception):
    """Raised by a draw function: the plot has nothing to show; the message says why."""

    def __init__(self, why: str, headline: str = NO_DATA) -> None:
        super().__init__(why)
        self.why = why
        self.headline = headline


# ---- helpers --------------------------------------------------------------------------------------

def _message(ax: Any, headline: str, why: str) -> None:
    ax.text(0.5, 0.56, headline, ha="center", va="center", fontsize=15, transform=ax.transAxes, color="0.3")
    if why:
        ax.text(0.5, 0.42, textwrap.fill(f"({why})", 60), ha="center", va="top", fontsize=10,
                transform=ax.transAxes, color="0.4")
    ax.set_xticks([])
    ax.set_yticks([])
    for spine in ax.spines.values():
        spine.set_color("0.8")


def _rel_minutes(ts: Any, t0: float) -> np.ndarray:
    return (np.asarray(ts, dtype=float) - t0) / 60.0


def _legend_outside(ax: Any) -> None:
    """Legend to the right of the axes, so it never covers a curve."""
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)


def _line(ax: Any, xs: Any, ys: Any, **kw: Any) -> None:
    """A line that stays visible with a single point (markers when there are few points)."""
    n = len(xs)
    if n <= 30:
        kw.setdefault("marker", "o")
        kw.setdefault("markersize", 4)
    ax.plot(xs, ys, **kw)


def _finite(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def value_calibration(root_values: np.ndarray, outcomes: np.ndarray, bins: int = 10
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bin predictions in [-1, 1] into ``bins`` equal bins: (bin centres, mean outcome per bin —
    NaN where empty —, count per bin). Both inputs from the same player's view."""
    v = np.clip(np.asarray(root_values, dtype=float), -1.0, 1.0)
    z = np.asarray(outcomes, dtype=float)
    edges = np.linspace(-1.0, 1.0, bins + 1)
    idx = np.clip(np.digitize(v, edges[1:-1]), 0, bins - 1)
    counts = np.bincount(idx, minlength=bins)
    sums = np.bincount(idx, weights=z, minlength=bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    return (edges[:-1] + edges[1:]) / 2, means, counts


def visit_entropies(rec: GameRecord, full_search_only: bool = True, with_snapshot: bool = False) -> Any:
    """Shannon entropy (nats) of each position's normalised policy target (visit distribution);
    with ``with_snapshot`` also the snapshot version of each of those positions."""
    out, snaps = [], []
    offs = rec.policy_offsets
    for t in range(rec.num_positions):
        if full_search_only and not bool(rec.full_search[t]):
            continue
        w = np.asarray(rec.policy_weights[offs[t]:offs[t + 1]], dtype=float)
        s = w.sum()
        if s <= 0:
            continue
        p = w[w > 0] / s
        out.append(float(-(p * np.log(p)).sum()))
        snaps.append(int(rec.snapshot[t]))
    ent = np.array(out, dtype=float)
    return (ent, np.array(snaps, dtype=np.int64)) if with_snapshot else ent


def results_over_time(finished: np.ndarray, results: np.ndarray, bins: int
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Split games into ``bins`` equal time bins by finish time: (bin edges, counts per bin,
    shares per bin as rows [player 0 won, draw, player 1 won]; NaN for an empty bin).
    ``results`` from player 0's view (+1, 0, -1)."""
    finished = np.asarray(finished, dtype=float)
    lo, hi = float(finished.min()), float(finished.max())
    edges = np.linspace(lo, hi if hi > lo else lo + 1.0, bins + 1)
    idx = np.clip(np.digitize(finished, edges[1:-1]), 0, bins - 1)
    counts = np.bincount(idx, minlength=bins).astype(float)
    shares = np.full((bins, 3), np.nan)
    for k, r in enumerate((1, 0, -1)):
        hits = np.bincount(idx, weights=(np.asarray(results) == r).astype(float), minlength=bins)
        with np.errstate(invalid="ignore", divide="ignore"):
            shares[:, k] = np.where(counts > 0, hits / np.maximum(counts, 1), np.nan)
    return edges, counts, shares


def _mean_by(keys: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(distinct keys, mean value per key, count per key)."""
    uniq, inv = np.unique(keys, return_inverse=True)
    counts = np.bincount(inv)
    return uniq, np.bincount(inv, weights=values) / counts, counts


# ---- the plots ------------------------------------------------------------------------------------

class ReportBuilder:
    """Draws every plot of one run into ``out``."""

    def __init__(self, run: str | os.PathLike[str], out: str | os.PathLike[str], max_games: int = 2000,
                 window: float = WINDOW_SECONDS, overwrite: bool = False) -> None:
        if max_games <= 0:
            raise ConfigError(f"--last {max_games} must be a positive number of games")
        self.mon = RunMonitor(run, window=window, keep_rows=True)
        self.mon.refresh()
        self.run = self.mon.run
        self.out = check_output(out, overwrite, folder=True)
        try:
            self.out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise SelfplayError(f"cannot create report folder {str(self.out)!r}: {exc}") from exc
        self.window = window
        self.summary = self.mon.summary()
        self.t0 = self.summary.get("started_at") or 0.0
        self.rows = self.mon.rows
        self.records: list[GameRecord] = newest_records(self.run, max_games)
        self.games = self._catalog_games()
        self.plots: list[Plot] = []

    def rows_of(self, component: str) -> list[dict[str, Any]]:
        return sorted((r for r in self.rows if r.get("component") == component), key=lambda r: r["t"])

    def _catalog_games(self) -> list[Any]:
        """Every committed game's listing row (finish time, length, result, snapshots)."""
        if not self.run.catalog.exists():
            return []
        from selfplay.replay.catalog import Catalog

        try:
            cat = Catalog(self.run.catalog, readonly=True)
            try:
                return cat.game_rows()
            finally:
                cat.close()
        except (SelfplayError, sqlite3.Error):
            return []  # unreadable now: the status block names why (catalog_error)

    def _plot(self, file: str, title: str, draw: Callable[[Any], str | None], size=(8, 4.5), panels: int = 1) -> None:
        fig, axes = plt.subplots(1, panels, figsize=size)
        ax = axes if panels == 1 else list(axes)
        try:
            note = draw(ax)
            has_data = True
        except Empty as e:
            for a in (ax if isinstance(ax, list) else [ax]):
                a.remove()
            _message(fig.add_subplot(111), e.headline, e.why)
            note, has_data = (e.headline if e.headline != NO_DATA else ""), False
        fig.suptitle(title)
        fig.tight_layout()
        buf = io.BytesIO()
        fig.savefig(buf, dpi=100, format="png")
        plt.close(fig)
        atomic_write_bytes(self.out / file, buf.getvalue())
        self.plots.append(Plot(file, title, has_data, note or ""))

    def build(self) -> list[Plot]:
        self._plot("games_per_hour.png", "Games per hour", self.draw_games_per_hour)
        self._plot("results_by_colour.png", "Results by colour over time", self.draw_results_by_colour)
        self._plot("game_length.png", "Game length", self.draw_game_length, size=(11, 4.5), panels=2)
        self._plot("snapshot_lag.png", "Snapshot lag of the workers", self.draw_snapshot_lag)
        self._plot("losses.png", "Learner losses", self.draw_losses)
        self._plot("learning_rate.png", "Learning rate", self.draw_learning_rate)
        self._plot("sample_reuse.png", "Sample reuse", self.draw_sample_reuse)
        self._plot("buffer_fill.png", "Replay window fill", self.draw_buffer_fill)
        self._plot("value_calibration.png", "Value calibration", self.draw_value_calibration, size=(6, 6))
        self._plot("policy_entropy.png", "Policy entropy of the visit distributions", self.draw_policy_entropy,
                   size=(11, 4.5), panels=2)
        self._plot("resign_false_positives.png", "Resignation false positives", self.draw_resign)
        self._plot("elo.png", "Elo", self.draw_elo, size=(12, 4.5), panels=2)
        self.write_html()
        return self.plots

    # each draw_* returns an optional note for the page, or raises Empty
    def draw_games_per_hour(self, ax: Any) -> str | None:
        s, mon = self.summary, self.mon
        as_of, start = s.get("as_of"), s.get("started_at")
        if as_of is None or start is None or as_of <= start:
            raise Empty("no finished games over time")
        grid = np.linspace(start, as_of, 200)[1:]
        cat = mon.catalog
        if cat is not None and cat.finished_times:
            src: list[Any] = [CounterSeries(times=list(cat.finished_times),
                                            values=[float(i + 1) for i in range(len(cat.finished_times))])]
            label = "catalog"
        else:
            comp = "buffer" if mon.of("buffer") else "worker"
            src = [st.counter("games_total") for st in mon.of(comp)]
            label = f"{comp} counters"
        if not src or sum(x.last_value for x in src) == 0:
            raise Empty("no finished games yet")
        # the status window: the last 5 minutes, clipped so it never reaches before the start
        recent = [window_rate_per_second(src, t, start, self.window) for t in grid]
        since = [sum(x.value_at(t) for x in src) / (t - start) for t in grid]
        x = _rel_minutes(grid, start)
        ax.plot(x, [3600 * (r or 0) for r in recent],
                label=f"over the last {fmt_duration(self.window)} (clipped to the start)")
        ax.plot(x, [3600 * r for r in since], label="since start", linestyle="--")
        ax.set_xlabel("minutes since start")
        ax.set_ylabel("games per hour")
        ax.set_ylim(bottom=0)
        ax.legend(loc="lower right", fontsize=8)
        ax.grid(alpha=0.3)
        return f"counted from the {label}"

    def draw_results_by_colour(self, ax: Any) -> str | None:
        games = [g for g in self.games if g.finished_at is not None]
        if not games:
            raise Empty("no committed games")
        fin = np.array([g.finished_at for g in games], dtype=float)
        res = np.array([g.result for g in games], dtype=int)
        bins = int(min(30, max(1, len(games) // 25)))
        edges, counts, shares = results_over_time(fin, res, bins)
        ok = counts > 0
        mid = _rel_minutes((edges[:-1] + edges[1:]) / 2, self.t0)[ok]
        sh = shares[ok]
        colours = ("tab:blue", "0.7", "tab:orange")
        labels = ("player 0 (first to move) won", "draw", "player 1 won")
        if len(mid) == 1:
            ax.bar(["all games"], [sh[0, 0]], color=colours[0], label=labels[0])
            ax.bar(["all games"], [sh[0, 1]], bottom=[sh[0, 0]], color=colours[1], label=labels[1])
            ax.bar(["all games"], [sh[0, 2]], bottom=[sh[0, 0] + sh[0, 1]], color=colours[2], label=labels[2])
        else:
            ax.stackplot(mid, sh[:, 0], sh[:, 1], sh[:, 2], colors=colours, labels=labels, alpha=0.85)
            ax.set_xlabel("minutes since start (finish time)")
        ax.set_ylim(0, 1)
        ax.set_ylabel("share of games")
        _legend_outside(ax)
        total = [int((res == r).sum()) for r in (1, 0, -1)]
        return (f"{len(games)} games: player 0 won {fmt_num(total[0])}, {fmt_num(total[1])} draws, "
                f"player 1 won {fmt_num(total[2])}")

    def draw_game_length(self, axes: list[Any]) -> str | None:
        games = self.games
        if games:
            lengths = np.array([g.length for g in games], dtype=float)
            snaps = np.array([-1 if g.snapshot_max is None else g.snapshot_max for g in games], dtype=float)
            fin = np.array([np.nan if g.finished_at is None else g.finished_at for g in games], dtype=float)
        else:
            lengths = np.array([r.num_positions for r in self.records], dtype=float)
            snaps = np.array([int(r.snapshot.max()) if r.num_positions else -1 for r in self.records], dtype=float)
            fin = np.array([r.finished_at for r in self.records], dtype=float)
        if lengths.size == 0:
            raise Empty("no committed games")
        ax, by = axes
        lo, hi = int(lengths.min()), int(lengths.max())
        bins = np.arange(lo, hi + 2) - 0.5 if hi - lo <= 60 else 40
        ax.hist(lengths, bins=bins, color="tab:blue", alpha=0.8)
        ax.axvline(lengths.mean(), color="k", linestyle="--", label=f"mean {lengths.mean():.1f}")
        ax.set_xlabel("moves per game")
        ax.set_ylabel("games")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.legend(fontsize=8)
        self._by_version_or_time(by, snaps, fin, lengths, "mean moves per game")
        return f"{fmt_num(int(lengths.size))} games, median {np.median(lengths):.0f} moves"

    def _by_version_or_time(self, ax: Any, versions: np.ndarray, times: np.ndarray, values: np.ndarray,
                            ylabel: str) -> None:
        """Mean of ``values`` by snapshot version (when there are several), else over time."""
        known = versions >= 0
        if np.unique(versions[known]).size >= 2:
            keys, means, counts = _mean_by(versions[known].astype(int), values[known])
            _line(ax, keys, means, color="tab:purple")
            ax.set_xlabel("snapshot version")
            ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        else:
            ok = np.isfinite(times)
            if not ok.any():
                ax.set_axis_off()
                return
            bins = int(min(30, max(1, ok.sum() // 25)))
            t = times[ok]
            edges = np.linspace(t.min(), t.max() if t.max() > t.min() else t.min() + 1, bins + 1)
            idx = np.clip(np.digitize(t, edges[1:-1]), 0, bins - 1)
            keys, means, _ = _mean_by(idx, values[ok])
            _line(ax, _rel_minutes((edges[keys] + edges[keys + 1]) / 2, self.t0), means, color="tab:purple")
            ax.set_xlabel("minutes since start")
        ax.set_ylabel(ylabel)
        ax.grid(alpha=0.3)

    def _published_series(self) -> tuple[np.ndarray, np.ndarray]:
        items = sorted((ts, v) for v, ts in self.mon.snapshot_times.items() if ts is not None)
        return (np.array([i[0] for i in items], dtype=float), np.array([i[1] for i in items], dtype=float))

    def draw_snapshot_lag(self, ax: Any) -> str | None:
        pub_t, pub_v = self._published_series()
        rows = [r for r in self.rows_of("worker") if _finite(r.get("snapshot_version"))]
        if not rows or pub_t.size == 0:
            raise Empty("needs worker lines with snapshot_version and published snapshots")
        by_worker: dict[str, list[tuple[float, float]]] = {}
        for r in rows:
            i = np.searchsorted(pub_t, r["t"], side="right")
            latest = float(np.max(pub_v[:i])) if i > 0 else float(r["snapshot_version"])
            by_worker.setdefault(str(r.get("source")), []).append(
                (r["t"], max(0.0, latest - float(r["snapshot_version"]))))
        for w, pts in sorted(by_worker.items())[:20]:
            ax.step(_rel_minutes([p[0] for p in pts], self.t0), [p[1] for p in pts], where="post", label=w)
        ax.set_xlabel("minutes since start")
        ax.set_ylabel("versions behind the newest snapshot")
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_ylim(bottom=0)
        if len(by_worker) <= 10:
            _legend_outside(ax)
        ax.grid(alpha=0.3)
        worst = max(p[1] for pts in by_worker.values() for p in pts)
        return f"{len(by_worker)} workers; worst lag {worst:.0f} versions"

    def _learner_series(self, key: str) -> list[tuple[float, float]]:
        rows = self.rows_of("learner")
        return [(float(r["step"]) if _finite(r.get("step")) else float(i), float(r[key]))
                for i, r in enumerate(rows) if _finite(r.get(key))]

    def draw_losses(self, ax: Any) -> str | None:
        total = self._learner_series("loss")
        if not total:
            raise Empty("no learner lines with a loss")
        for key, label in (("loss", "total"), ("loss_policy", "policy (cross-entropy)"),
                           ("loss_value", "value (squared error)"), ("loss_l2", "L2"),
                           ("loss_ownership", "ownership (unweighted)"), ("loss_score", "score (unweighted)")):
            pts = self._learner_series(key)
            if pts:
                _line(ax, [p[0] for p in pts], [p[1] for p in pts], label=label)
        ax.set_xlabel("learner step")
        ax.set_ylabel("loss")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        _legend_outside(ax)
        ax.grid(alpha=0.3)
        return f"{len(total)} learner report(s); last loss {total[-1][1]:.4g}"

    def _learner_field(self, ax: Any, key: str, what: str, ylabel: str, **style: Any) -> str:
        """One learner field against the step (whole-number step ticks, y from 0)."""
        pts = self._learner_series(key)
        if not pts:
            raise Empty(f"no learner lines with {what}")
        _line(ax, [p[0] for p in pts], [p[1] for p in pts], **style)
        ax.set_xlabel("learner step")
        ax.set_ylabel(ylabel)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_ylim(bottom=0)
        ax.grid(alpha=0.3)
        return f"last {pts[-1][1]:.3g}"

    def draw_learning_rate(self, ax: Any) -> str | None:
        return self._learner_field(ax, "learning_rate", "a learning rate", "learning rate",
                                   drawstyle="steps-post", color="tab:green")

    def draw_sample_reuse(self, ax: Any) -> str | None:
        return self._learner_field(ax, "reuse_ratio", "a reuse ratio", "samples trained per position generated",
                                   color="tab:red")

    def draw_buffer_fill(self, ax: Any) -> str | None:
        by_src: dict[str, CounterSeries] = {}
        cap: dict[str, float] = {}
        for r in self.rows_of("buffer"):
            if _finite(r.get("window_positions")) and _finite(r.get("window_capacity")) and r["window_capacity"] > 0:
                src = str(r.get("source"))
                s = by_src.setdefault(src, CounterSeries())
                s.times.append(float(r["t"]))
                s.values.append(float(r["window_positions"]))
                cap[src] = float(r["window_capacity"])
        if not by_src:
            raise Empty("no buffer lines with window_positions and window_capacity")
        times = sorted({t for s in by_src.values() for t in s.times})
        total_cap = sum(cap.values())
        fill = [100 * sum(s.value_at(t) for s in by_src.values()) / total_cap for t in times]
        _line(ax, _rel_minutes(times, self.t0), fill, color="tab:cyan")
        ax.set_xlabel("minutes since start")
        ax.set_ylabel("replay window fill (%)")
        ax.set_ylim(0, 105)
        ax.grid(alpha=0.3)
        return f"{fill[-1]:.1f}% of {fmt_num(int(total_cap))} positions at the end"

    def draw_value_calibration(self, ax: Any) -> str | None:
        if not self.records:
            raise Empty("no committed game records")
        v = np.concatenate([r.root_values for r in self.records]).astype(float)
        z = np.concatenate([r.outcomes for r in self.records]).astype(float)
        ok = np.isfinite(v)  # imported games have no search value
        v, z = v[ok], z[ok]
        if v.size == 0:
            raise Empty("no positions with a search value")
        centres, means, counts = value_calibration(v, z)
        ok = counts > 0
        ax.plot([-1, 1], [-1, 1], color="0.6", linestyle="--", label="calibrated")
        ax.plot(centres[ok], means[ok], marker="o", label="mean outcome")
        for c, m, n in zip(centres[ok], means[ok], counts[ok]):
            ax.annotate(fmt_num(int(n)), (c, m), textcoords="offset points", xytext=(0, 6), ha="center", fontsize=7)
        ax.set_xlim(-1.05, 1.05)
        ax.set_ylim(-1.05, 1.05)
        ax.set_xlabel("root value predicted by the search (mover's view)")
        ax.set_ylabel("final outcome (mover's view)")
        ax.legend(loc="upper left")
        ax.grid(alpha=0.3)
        err = float(np.nansum(np.abs(means[ok] - centres[ok]) * counts[ok]) / counts[ok].sum())
        return (f"{fmt_num(int(v.size))} positions of {len(self.records)} games; "
                f"mean |outcome - prediction| per bin {err:.3f}")

    def draw_policy_entropy(self, axes: list[Any]) -> str | None:
        parts = [visit_entropies(r, with_snapshot=True) for r in self.records]
        e = np.concatenate([p[0] for p in parts]) if parts else np.zeros(0)
        if e.size == 0:
            raise Empty("no full-search positions in the records")
        snaps = np.concatenate([p[1] for p in parts]).astype(float)
        times = np.concatenate([np.full(p[0].size, r.finished_at, dtype=float) for p, r in zip(parts, self.records)])
        ax, by = axes
        ax.hist(e, bins=40, color="tab:green", alpha=0.8)
        ax.axvline(e.mean(), color="k", linestyle="--", label=f"mean {e.mean():.3f} nats")
        ax.set_xlabel("entropy of the visit distribution (nats)")
        ax.set_ylabel("positions")
        ax.legend(fontsize=8)
        self._by_version_or_time(by, snaps, times, e, "mean entropy (nats)")
        return f"{fmt_num(int(e.size))} full-search positions of the newest {len(self.records)} games"

    def _resignation_off(self) -> bool:
        """True when run.toml says the run never resigns (no ``search.resign_threshold``)."""
        try:
            cfg = tomllib.loads(self.run.config.read_text())
        except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError):
            return False
        search = cfg.get("search")
        return isinstance(search, dict) and search.get("resign_threshold") is None

    def draw_resign(self, ax: Any) -> str | None:
        rows = self.rows_of("worker")
        pts: list[tuple[float, float]] = []
        uses_would = any("resign_probe_triggered_total" in r for r in rows)
        den_key = "resign_probe_triggered_total" if uses_would else "resign_disabled_games_total"
        fps: dict[str, CounterSeries] = {}
        dens: dict[str, CounterSeries] = {}
        for r in rows:
            src = str(r.get("source"))
            if _finite(r.get("resign_false_positives_total")):
                fps.setdefault(src, CounterSeries()).add(r["t"], r["resign_false_positives_total"])
            if _finite(r.get(den_key)):
                dens.setdefault(src, CounterSeries()).add(r["t"], r[den_key])
        times = sorted({r["t"] for r in rows if r.get("source") in dens})
        for t in times:
            d = sum(s.value_at(t) for s in dens.values())
            if d > 0:
                pts.append((t, sum(s.value_at(t) for s in fps.values()) / d))
        cat = self.mon.catalog.resign if self.mon.catalog is not None else None
        if not pts and not (cat and cat["would_resign_games"]):
            if self._resignation_off():
                raise Empty("search.resign_threshold is unset in run.toml: no game resigns, "
                            "so there is nothing to measure", headline="resignation is off in this run")
            raise Empty("no resign-disabled games with a would-have-resigned player")
        if pts:
            _line(ax, _rel_minutes([p[0] for p in pts], self.t0), [100 * p[1] for p in pts],
                  label="cumulative rate (worker counters)")
            ax.set_xlabel("minutes since start")
        note = ""
        if cat and cat["would_resign_games"]:
            rate = cat["false_positives"] / cat["would_resign_games"]
            ax.axhline(100 * rate, color="tab:purple", label=f"catalog: {cat['false_positives']}/"
                                                               f"{cat['would_resign_games']} = {100 * rate:.1f}%")
            note = f"catalog: {cat['false_positives']} false positives in {cat['would_resign_games']} games"
        ax.axhline(100 * RESIGN_FALSE_POSITIVE_TARGET, color="tab:red", linestyle="--",
                   label="5% bound (AlphaGo Zero)")
        ax.set_ylabel("false positives (%)")
        ax.set_ylim(bottom=0)
        _legend_outside(ax)
        ax.grid(alpha=0.3)
        return note or None

    def draw_elo(self, axes: Any) -> str | None:
        """Elo against snapshot version (left, when the lines name one) and against time (right)."""
        rows = [r for r in self.rows_of("eval") if _finite(r.get("elo"))]
        if not rows:
            raise Empty("no eval lines in metrics.jsonl; `selfplay ladder` or a match writes them",
                        headline="no evaluation in this run")
        by_opp: dict[str, list[dict[str, Any]]] = {}
        for r in rows:
            by_opp.setdefault(str(r.get("opponent", r.get("source", "?"))), []).append(r)
        use_version = all(_finite(r.get("snapshot_version")) for r in rows)
        panels = list(axes) if isinstance(axes, list) else [axes]
        for i, ax in enumerate(panels):
            by_version = use_version and i == 0
            for opp, rs in sorted(by_opp.items()):
                xs = np.array([r["snapshot_version"] for r in rs]) if by_version else \
                    _rel_minutes([r["t"] for r in rs], self.t0)
                ys = np.array([r["elo"] for r in rs], dtype=float)
                lo = np.array([r["elo_low"] if _finite(r.get("elo_low")) else r["elo"] for r in rs], dtype=float)
                hi = np.array([r["elo_high"] if _finite(r.get("elo_high")) else r["elo"] for r in rs], dtype=float)
                ax.errorbar(xs, ys, yerr=[np.maximum(0, ys - lo), np.maximum(0, hi - ys)], marker="o",
                            capsize=3, label=ELO_LABELS.get(opp, f"vs {opp}"))
            ax.axhline(0, color="0.6", linewidth=0.8)
            ax.set_xlabel("snapshot version" if by_version else "minutes since start")
            if by_version:
                ax.xaxis.set_major_locator(MaxNLocator(integer=True))
            ax.set_ylabel("Elo (95% interval)")
            ax.grid(alpha=0.3)
        _legend_outside(panels[-1])
        return f"{len(rows)} evaluation(s)"

    # ---- the page ---------------------------------------------------------------------------------
    def write_html(self) -> Path:
        s = self.summary
        cfg = self.run.config.read_text(errors="replace") if self.run.config.exists() else "(no run.toml)"
        running = s.get("state") in (None, "running")
        at = "" if running else (" (at stop)" if s.get("state") == "stopped" else " (at the last write)")
        span = s.get("window_span_seconds")
        window = fmt_duration(s.get("window_seconds") if span is None or span >= (s.get("window_seconds") or 0) else span)
        res = s.get("resignation") or {}
        rate = res.get("false_positive_rate")
        learner = s.get("learner") or {}
        buf = s.get("buffer") or {}
        figures = [
            ("state", state_line(s)[0] if s.get("state") else "no data yet"),
            ("started", fmt_time(s.get("started_at"))),
            ("figures as of", fmt_time(s.get("as_of")) + at),
            ("games", fmt_num(s.get("games"))), ("positions", fmt_num(s.get("positions"))),
            (f"games per hour, last {window}{at}", fmt_num(s.get("games_per_hour"))),
            ("games per hour, since start", fmt_num(s.get("games_per_hour_since_start"))),
            (f"positions per second, last {window}{at}", fmt_num(s.get("positions_per_second"))),
            ("network evals per second" + at, fmt_num(s.get("evals_per_second"))),
            ("latest snapshot", fmt_num((s.get("latest_snapshot") or {}).get("version"))),
            ("worst snapshot lag (versions)", fmt_num(s.get("snapshot_lag_versions"))),
            ("worst data age", fmt_duration(s.get("data_age_seconds"))),
            ("replay window fill", "-" if buf.get("fill") is None else f"{100 * buf['fill']:.1f}%"),
            ("learner step", fmt_num(learner.get("step"))),
            ("sample reuse", fmt_num(learner.get("reuse_ratio"))),
            ("resign false-positive rate", "-" if rate is None else f"{100 * rate:.1f}%"),
            ("counts from", str(s.get("counts_source"))),
        ]
        rows = "\n".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>" for k, v in figures)
        imgs = "\n".join(
            f'<figure><img src="{html.escape(p.file)}" alt="{html.escape(p.title)}">'
            f"<figcaption>{html.escape(p.title)}{' — ' + html.escape(p.note) if p.note else ''}"
            f"{'' if p.has_data or p.note else ' — ' + NO_DATA}</figcaption></figure>" for p in self.plots)
        made = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())
        page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<title>Run report: {html.escape(str(self.run.root))}</title>
<style>
body {{ font-family: sans-serif; margin: 2em; max-width: 1200px; }}
table {{ border-collapse: collapse; }} th, td {{ padding: 2px 12px; text-align: left; border-bottom: 1px solid #ddd; }}
td {{ text-align: right; font-variant-numeric: tabular-nums; }}
figure {{ display: inline-block; margin: 0 1em 1.5em 0; vertical-align: top; max-width: 560px; }}
img {{ max-width: 560px; border: 1px solid #ccc; }}
pre {{ background: #f6f6f6; padding: 1em; overflow-x: auto; }}
</style></head><body>
<h1>Run report</h1>
<p>Run directory <code>{html.escape(str(self.run.root))}</code>; report made {made}.
Record-based plots use the newest {fmt_num(len(self.records))} committed games.</p>
<h2>Status</h2>
<table>
{rows}
</table>
<h2>Plots</h2>
{imgs}
<h2>Configuration (run.toml)</h2>
<pre>{html.escape(cfg)}</pre>
<h2>Status as JSON</h2>
<pre>{html.escape(json.dumps(s, indent=2))}</pre>
</body></html>
"""
        path = self.out / "index.html"
        atomic_write_bytes(path, page.encode())
        return path


def build_report(run: str | os.PathLike[str], out: str | os.PathLike[str], max_games: int = 2000,
                 overwrite: bool = False) -> list[Plot]:
    """Write every plot and index.html for ``run`` into ``out``; returns the plots made.

    ``out`` may be a new or empty folder; a folder with files in it only with ``overwrite``."""
    return ReportBuilder(run, out, max_games=max_games, overwrite=overwrite).build()
