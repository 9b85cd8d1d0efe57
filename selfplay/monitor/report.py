"""``selfplay report``: PNG plots of a run and one HTML page that shows them with its configuration.

Plots (each a PNG in the output folder; a plot with nothing to show yet says "no data yet"):

- ``games_per_hour.png``   games per hour over the run: over a trailing window (5 minutes, or a
  tenth of the run if that is shorter) and since start
- ``game_length.png``      histogram of game lengths (moves), from the catalog or the records
- ``snapshot_lag.png``     per worker: versions behind the newest snapshot, and data age (s)
- ``losses.png``           learner loss and its parts against the step
- ``value_calibration.png`` root value predicted by the search against the final outcome, both
  from the mover's view, in bins of the prediction (a calibrated value lies on the diagonal)
- ``policy_entropy.png``   entropy (nats) of the stored visit distributions of full-search positions
- ``resign_false_positives.png`` false-positive rate of resignation over time, with the 5 % bound
  that AlphaGo Zero (Silver et al. 2017) kept it under
- ``elo.png``              Elo against each evaluation opponent over time

Everything is read from the run directory; the records-based plots use the newest
``max_games`` committed games.
"""

from __future__ import annotations

import html
import json
import math
import os
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import matplotlib

matplotlib.use("Agg")  # no display needed; must precede pyplot
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from selfplay.errors import ConfigError, SelfplayError  # noqa: E402
from selfplay.monitor.data import newest_records  # noqa: E402
from selfplay.monitor.rates import WINDOW_SECONDS, CounterSeries, window_rate_per_second  # noqa: E402
from selfplay.monitor.summary import RunMonitor  # noqa: E402
from selfplay.monitor.watch import fmt_duration  # noqa: E402
from selfplay.records import GameRecord  # noqa: E402

#: resignation false-positive bound used by AlphaGo Zero (Silver et al., Nature 2017)
RESIGN_FALSE_POSITIVE_TARGET = 0.05

NO_DATA = "no data yet"


@dataclass
class Plot:
    """One plot of the report: file name, title, and whether it had data."""

    file: str
    title: str
    has_data: bool
    note: str = ""


# ---- helpers --------------------------------------------------------------------------------------

def _no_data(ax: Any, what: str) -> None:
    ax.text(0.5, 0.5, f"{NO_DATA}\n({what})", ha="center", va="center", fontsize=14,
            transform=ax.transAxes, color="0.35")
    ax.set_xticks([])
    ax.set_yticks([])
    for spine in ax.spines.values():
        spine.set_color("0.8")


def _save(fig: Any, path: Path) -> None:
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)


def _rel_minutes(ts: Any, t0: float) -> np.ndarray:
    return (np.asarray(ts, dtype=float) - t0) / 60.0


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


def visit_entropies(rec: GameRecord, full_search_only: bool = True) -> np.ndarray:
    """Shannon entropy (nats) of each position's normalised policy target (visit distribution)."""
    out = []
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
    return np.array(out, dtype=float)


# ---- the plots ------------------------------------------------------------------------------------

class ReportBuilder:
    """Draws every plot of one run into ``out``."""

    def __init__(self, run: str | os.PathLike[str], out: str | os.PathLike[str], max_games: int = 2000,
                 window: float = WINDOW_SECONDS) -> None:
        if max_games <= 0:
            raise ConfigError(f"--games {max_games} must be a positive number of games")
        self.mon = RunMonitor(run, window=window, keep_rows=True)
        self.mon.refresh()
        self.run = self.mon.run
        self.out = Path(out)
        try:
            self.out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise SelfplayError(f"cannot create report folder {str(self.out)!r}: {exc}") from exc
        self.window = window
        self.summary = self.mon.summary()
        self.t0 = self.summary.get("started_at") or 0.0
        self.rows = self.mon.rows
        self.records: list[GameRecord] = newest_records(self.run, max_games)
        self.plots: list[Plot] = []

    def rows_of(self, component: str) -> list[dict[str, Any]]:
        return sorted((r for r in self.rows if r.get("component") == component), key=lambda r: r["t"])

    def _plot(self, file: str, title: str, draw: Callable[[Any], str | None], size=(8, 4.5)) -> None:
        fig, ax = plt.subplots(figsize=size)
        note = draw(ax)
        has_data = note != NO_DATA
        ax.set_title(title)
        _save(fig, self.out / file)
        self.plots.append(Plot(file, title, has_data, "" if note in (None, NO_DATA) else note))

    def build(self) -> list[Plot]:
        self._plot("games_per_hour.png", "Games per hour", self.draw_games_per_hour)
        self._plot("game_length.png", "Game length", self.draw_game_length)
        self._plot("snapshot_lag.png", "Snapshot lag of the workers", self.draw_snapshot_lag)
        self._plot("losses.png", "Learner losses", self.draw_losses)
        self._plot("value_calibration.png", "Value calibration", self.draw_value_calibration, size=(6, 6))
        self._plot("policy_entropy.png", "Policy entropy of the visit distributions", self.draw_policy_entropy)
        self._plot("resign_false_positives.png", "Resignation false positives", self.draw_resign)
        self._plot("elo.png", "Elo where evaluated", self.draw_elo)
        self.write_html()
        return self.plots

    # each draw_* returns NO_DATA, or an optional note for the page
    def draw_games_per_hour(self, ax: Any) -> str | None:
        s, mon = self.summary, self.mon
        as_of, start = s.get("as_of"), s.get("started_at")
        if as_of is None or start is None or as_of <= start:
            _no_data(ax, "no finished games over time")
            return NO_DATA
        grid = np.linspace(start, as_of, 200)[1:]
        cat = mon.catalog
        if cat is not None and cat.finished_times:
            series = CounterSeries(times=list(cat.finished_times),
                                   values=[float(i + 1) for i in range(len(cat.finished_times))])
            src = [series]
            label = "catalog"
        else:
            comp = "buffer" if mon.of("buffer") else "worker"
            src = [st.counter("games_total") for st in mon.of(comp)]
            label = f"{comp} counters"
        if not src or sum(x.last_value for x in src) == 0:
            _no_data(ax, "no finished games yet")
            return NO_DATA
        # a run shorter than a few windows is plotted with a shorter window, so the curve shows
        # how the rate changed rather than repeating the since-start line
        win = min(self.window, max(10.0, (as_of - start) / 10.0))
        recent = [window_rate_per_second(src, t, start, win) for t in grid]
        since = [sum(x.value_at(t) for x in src) / (t - start) for t in grid]
        x = _rel_minutes(grid, start)
        ax.plot(x, [3600 * (r or 0) for r in recent], label=f"over the last {fmt_duration(win)}")
        ax.plot(x, [3600 * r for r in since], label="since start", linestyle="--")
        ax.set_xlabel("minutes since start")
        ax.set_ylabel("games per hour")
        ax.legend()
        ax.grid(alpha=0.3)
        return f"counted from the {label}"

    def _lengths(self) -> np.ndarray:
        if self.run.catalog.exists():
            try:
                con = sqlite3.connect(f"file:{self.run.catalog}?mode=ro", uri=True)
                try:
                    cols = {r[1] for r in con.execute("PRAGMA table_info(games)")}
                    col = "length" if "length" in cols else ("positions" if "positions" in cols else None)
                    if col:
                        return np.array([r[0] for r in con.execute(f"SELECT {col} FROM games")], dtype=float)
                finally:
                    con.close()
            except sqlite3.Error:
                pass
        return np.array([r.num_positions for r in self.records], dtype=float)

    def draw_game_length(self, ax: Any) -> str | None:
        lengths = self._lengths()
        if lengths.size == 0:
            _no_data(ax, "no committed games")
            return NO_DATA
        lo, hi = int(lengths.min()), int(lengths.max())
        bins = np.arange(lo, hi + 2) - 0.5 if hi - lo <= 60 else 40
        ax.hist(lengths, bins=bins, color="tab:blue", alpha=0.8)
        ax.axvline(lengths.mean(), color="k", linestyle="--", label=f"mean {lengths.mean():.1f}")
        ax.set_xlabel("moves per game")
        ax.set_ylabel("games")
        ax.legend()
        return f"{lengths.size} games, median {np.median(lengths):.0f} moves"

    def _published_series(self) -> tuple[np.ndarray, np.ndarray]:
        items = sorted((ts, v) for v, ts in self.mon.snapshot_times.items() if ts is not None)
        return (np.array([i[0] for i in items], dtype=float), np.array([i[1] for i in items], dtype=float))

    def draw_snapshot_lag(self, ax: Any) -> str | None:
        pub_t, pub_v = self._published_series()
        rows = [r for r in self.rows_of("worker") if isinstance(r.get("snapshot_version"), (int, float))]
        if not rows or pub_t.size == 0:
            _no_data(ax, "needs worker lines with snapshot_version and published snapshots")
            return NO_DATA
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
        if len(by_worker) <= 10:
            ax.legend(fontsize=8)
        ax.grid(alpha=0.3)
        worst = max(p[1] for pts in by_worker.values() for p in pts)
        return f"{len(by_worker)} workers; worst lag {worst:.0f} versions"

    def draw_losses(self, ax: Any) -> str | None:
        rows = [r for r in self.rows_of("learner") if isinstance(r.get("loss"), (int, float))]
        if not rows:
            _no_data(ax, "no learner lines with a loss")
            return NO_DATA
        xs = [r.get("step", i) for i, r in enumerate(rows)]
        for key, label in (("loss", "total"), ("loss_policy", "policy (cross-entropy)"),
                           ("loss_value", "value (squared error)"), ("loss_l2", "L2")):
            pts = [(x, r[key]) for x, r in zip(xs, rows) if isinstance(r.get(key), (int, float))
                   and math.isfinite(r[key])]
            if pts:
                ax.plot([p[0] for p in pts], [p[1] for p in pts], label=label)
        ax.set_xlabel("learner step")
        ax.set_ylabel("loss")
        ax.legend()
        ax.grid(alpha=0.3)
        return f"{len(rows)} learner reports; last loss {rows[-1]['loss']:.4g}"

    def draw_value_calibration(self, ax: Any) -> str | None:
        if not self.records:
            _no_data(ax, "no committed game records")
            return NO_DATA
        v = np.concatenate([r.root_values for r in self.records]).astype(float)
        z = np.concatenate([r.outcomes for r in self.records]).astype(float)
        if v.size == 0:
            _no_data(ax, "records hold no positions")
            return NO_DATA
        centres, means, counts = value_calibration(v, z)
        ok = counts > 0
        ax.plot([-1, 1], [-1, 1], color="0.6", linestyle="--", label="calibrated")
        ax.plot(centres[ok], means[ok], marker="o", label="mean outcome")
        for c, m, n in zip(centres[ok], means[ok], counts[ok]):
            ax.annotate(str(int(n)), (c, m), textcoords="offset points", xytext=(0, 6), ha="center", fontsize=7)
        ax.set_xlim(-1.05, 1.05)
        ax.set_ylim(-1.05, 1.05)
        ax.set_xlabel("root value predicted by the search (mover's view)")
        ax.set_ylabel("final outcome (mover's view)")
        ax.legend(loc="upper left")
        ax.grid(alpha=0.3)
        err = float(np.nansum(np.abs(means[ok] - centres[ok]) * counts[ok]) / counts[ok].sum())
        return f"{v.size} positions of {len(self.records)} games; mean |outcome - prediction| per bin {err:.3f}"

    def draw_policy_entropy(self, ax: Any) -> str | None:
        ents = [visit_entropies(r) for r in self.records]
        e = np.concatenate(ents) if ents else np.zeros(0)
        if e.size == 0:
            _no_data(ax, "no full-search positions in the records")
            return NO_DATA
        ax.hist(e, bins=40, color="tab:green", alpha=0.8)
        ax.axvline(e.mean(), color="k", linestyle="--", label=f"mean {e.mean():.3f} nats")
        ax.set_xlabel("entropy of the visit distribution (nats)")
        ax.set_ylabel("positions")
        ax.legend()
        return f"{e.size} full-search positions"

    def draw_resign(self, ax: Any) -> str | None:
        rows = self.rows_of("worker")
        pts: list[tuple[float, float]] = []
        uses_would = any("resign_probe_triggered_total" in r for r in rows)
        den_key = "resign_probe_triggered_total" if uses_would else "resign_disabled_games_total"
        fps: dict[str, CounterSeries] = {}
        dens: dict[str, CounterSeries] = {}
        for r in rows:
            src = str(r.get("source"))
            if isinstance(r.get("resign_false_positives_total"), (int, float)):
                fps.setdefault(src, CounterSeries()).add(r["t"], r["resign_false_positives_total"])
            if isinstance(r.get(den_key), (int, float)):
                dens.setdefault(src, CounterSeries()).add(r["t"], r[den_key])
        times = sorted({r["t"] for r in rows if r.get("source") in dens})
        for t in times:
            d = sum(s.value_at(t) for s in dens.values())
            if d > 0:
                pts.append((t, sum(s.value_at(t) for s in fps.values()) / d))
        cat = self.mon.catalog.resign if self.mon.catalog is not None else None
        if not pts and not (cat and cat["would_resign_games"]):
            _no_data(ax, "no resign-disabled games with a would-have-resigned player")
            return NO_DATA
        if pts:
            ax.plot(_rel_minutes([p[0] for p in pts], self.t0), [100 * p[1] for p in pts],
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
        ax.legend()
        ax.grid(alpha=0.3)
        return note or None

    def draw_elo(self, ax: Any) -> str | None:
        rows = [r for r in self.rows_of("eval") if isinstance(r.get("elo"), (int, float))]
        if not rows:
            _no_data(ax, "no evaluation lines")
            return NO_DATA
        by_opp: dict[str, list[dict[str, Any]]] = {}
        for r in rows:
            by_opp.setdefault(str(r.get("opponent")), []).append(r)
        use_version = all(isinstance(r.get("snapshot_version"), (int, float)) for r in rows)
        for opp, rs in sorted(by_opp.items()):
            xs = [r["snapshot_version"] for r in rs] if use_version else _rel_minutes([r["t"] for r in rs], self.t0)
            ax.plot(xs, [r["elo"] for r in rs], marker="o", label=f"vs {opp}")
        ax.axhline(0, color="0.6", linewidth=0.8)
        ax.set_xlabel("snapshot version" if use_version else "minutes since start")
        ax.set_ylabel("Elo difference")
        ax.legend()
        ax.grid(alpha=0.3)
        return f"{len(rows)} evaluations"

    # ---- the page ---------------------------------------------------------------------------------
    def write_html(self) -> Path:
        s = self.summary
        cfg = self.run.config.read_text(errors="replace") if self.run.config.exists() else "(no run.toml)"
        figures = [
            ("games", s.get("games")), ("positions", s.get("positions")),
            ("games per hour, last window", s.get("games_per_hour")),
            ("games per hour, since start", s.get("games_per_hour_since_start")),
            ("positions per second, last window", s.get("positions_per_second")),
            ("evaluations per second", s.get("evals_per_second")),
            ("latest snapshot", (s.get("latest_snapshot") or {}).get("version")),
            ("worst snapshot lag (versions)", s.get("snapshot_lag_versions")),
            ("worst data age (s)", s.get("data_age_seconds")),
            ("learner step", (s.get("learner") or {}).get("step")),
            ("resign false-positive rate", (s.get("resignation") or {}).get("false_positive_rate")),
            ("counts from", s.get("counts_source")),
        ]
        rows = "\n".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape('-' if v is None else str(v))}</td></tr>"
                         for k, v in figures)
        imgs = "\n".join(
            f'<figure><img src="{html.escape(p.file)}" alt="{html.escape(p.title)}">'
            f"<figcaption>{html.escape(p.title)}{' — ' + html.escape(p.note) if p.note else ''}"
            f"{'' if p.has_data else ' — ' + NO_DATA}</figcaption></figure>" for p in self.plots)
        made = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())
        page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<title>Run report: {html.escape(str(self.run.root))}</title>
<style>
body {{ font-family: sans-serif; margin: 2em; max-width: 1200px; }}
table {{ border-collapse: collapse; }} th, td {{ padding: 2px 12px; text-align: left; border-bottom: 1px solid #ddd; }}
figure {{ display: inline-block; margin: 0 1em 1.5em 0; vertical-align: top; }}
img {{ max-width: 560px; border: 1px solid #ccc; }}
pre {{ background: #f6f6f6; padding: 1em; overflow-x: auto; }}
</style></head><body>
<h1>Run report</h1>
<p>Run directory <code>{html.escape(str(self.run.root))}</code>; report made {made}.
Record-based plots use the newest {len(self.records)} committed games.</p>
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
        path.write_text(page)
        return path


def build_report(run: str | os.PathLike[str], out: str | os.PathLike[str], max_games: int = 2000) -> list[Plot]:
    """Write every plot and index.html for ``run`` into ``out``; returns the plots made."""
    return ReportBuilder(run, out, max_games=max_games).build()
