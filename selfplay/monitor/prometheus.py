"""The status figures in the Prometheus text exposition format, and an opt-in HTTP endpoint.

Names follow Prometheus' naming conventions: a ``selfplay_`` prefix, the unit in the name
(``_seconds``, ``_per_second``, ``_per_hour``, ``_ratio``, ``_versions``) and ``_total`` for
counters. The full list is in docs/metrics.md. The collector turns one status summary (see
:mod:`selfplay.monitor.summary`) into metric families at every scrape; the endpoint is served
by prometheus_client's own HTTP server, bound to 127.0.0.1 unless another host is given.

Typical use (what the launcher does with ``--metrics-port``)::

    server = start_metrics_server(9100, source=monitor_source(run_dir))
    ...
    server.close()
"""

from __future__ import annotations

import errno
import threading
from typing import Any, Callable, Iterator

from prometheus_client.core import CollectorRegistry, CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.exposition import generate_latest, start_http_server

from selfplay.errors import ConfigError, SelfplayError
from selfplay.monitor.summary import RunMonitor

Summary = dict[str, Any]
SummarySource = Callable[[], Summary]


def _f(v: Any) -> float | None:
    if isinstance(v, bool):
        return float(v)
    if isinstance(v, (int, float)):
        return float(v)
    return None


class _Families:
    """Collects metric families, skipping figures that are not known yet (None)."""

    def __init__(self) -> None:
        self.out: list[Metric] = []
        self._by_name: dict[str, Metric] = {}

    def gauge(self, name: str, doc: str, value: Any, labels: dict[str, str] | None = None) -> None:
        self._add(GaugeMetricFamily, name, doc, value, labels)

    def counter(self, name: str, doc: str, value: Any, labels: dict[str, str] | None = None) -> None:
        self._add(CounterMetricFamily, name, doc, value, labels)

    def _add(self, kind: type, name: str, doc: str, value: Any, labels: dict[str, str] | None) -> None:
        v = _f(value)
        if v is None:
            return
        labels = labels or {}
        fam = self._by_name.get(name)
        if fam is None:
            fam = kind(name, doc, labels=sorted(labels))
            self._by_name[name] = fam
            self.out.append(fam)
        fam.add_metric([labels[k] for k in sorted(labels)], v)


def families_from_summary(s: Summary) -> list[Metric]:
    """Metric families for one status summary (what a scrape returns)."""
    m = _Families()
    m.gauge("selfplay_monitor_up", "1 if the run directory could be read at this scrape", 1)
    state = s.get("state")
    running = state == "running"
    if state is not None:
        m.gauge("selfplay_run_up", "1 while the run is running; 0 once it stopped or crashed", running)
        for name in ("running", "stopped", "crashed"):
            m.gauge("selfplay_run_state", "1 for the run's state (running, stopped or crashed), 0 for the others",
                    name == state, {"state": name})
    m.gauge("selfplay_run_stopped_timestamp_seconds", "Unix time the run stopped (stop line) or was last heard of (crashed)",
            s.get("stopped_at"))
    m.gauge("selfplay_status_timestamp_seconds", "Unix time the figures refer to (newest write of the run)", s.get("as_of"))
    m.gauge("selfplay_run_elapsed_seconds", "seconds from the run's first record to as_of", s.get("elapsed_seconds"))
    m.gauge("selfplay_idle_seconds", "seconds since the run last wrote anything (reader's clock)", s.get("idle_seconds"))
    m.counter("selfplay_games", "finished games committed (catalog, else buffer, else workers)", s.get("games"))
    m.counter("selfplay_positions", "positions in finished games", s.get("positions"))
    m.gauge("selfplay_pending_games", "games the buffer accepted that the catalog does not hold yet (running run)", s.get("pending_games"))
    m.gauge("selfplay_unstored_games", "games reported accepted that a stopped or crashed run never stored", s.get("unstored_games"))
    m.gauge("selfplay_games_per_hour", "games per hour over the last window (window_seconds, 5 minutes by default)", s.get("games_per_hour"))
    m.gauge("selfplay_games_per_hour_since_start", "games per hour since the run started", s.get("games_per_hour_since_start"))
    m.gauge("selfplay_positions_per_second", "positions per second over the last window", s.get("positions_per_second"))
    m.gauge("selfplay_positions_per_second_since_start", "positions per second since the run started", s.get("positions_per_second_since_start"))
    m.gauge("selfplay_evals_per_second", "network evaluations per second summed over active workers", s.get("evals_per_second"))
    m.gauge("selfplay_active_workers", "workers that reported within the last window (0 once the run stopped or crashed)",
            s.get("active_workers"))
    snap = s.get("latest_snapshot") or {}
    m.gauge("selfplay_latest_snapshot_version", "newest published snapshot version", snap.get("version"))
    m.gauge("selfplay_latest_snapshot_age_seconds", "seconds since the newest snapshot was published", snap.get("age_seconds"))
    m.gauge("selfplay_snapshot_lag_versions", "versions the stalest active worker is behind the newest snapshot", s.get("snapshot_lag_versions"))
    m.gauge("selfplay_data_age_seconds", "seconds since the snapshot the stalest active worker plays with was published", s.get("data_age_seconds"))

    for w in s.get("workers") or []:
        lab = {"worker": str(w.get("id"))}
        m.gauge("selfplay_worker_up", "1 if the worker reported within the last window of a running run",
                w.get("active"), lab)
        m.counter("selfplay_worker_games", "games finished by the worker", w.get("games"), lab)
        m.counter("selfplay_worker_positions", "positions played by the worker", w.get("positions"), lab)
        m.gauge("selfplay_worker_games_per_hour", "worker's games per hour over the last window", w.get("games_per_hour"), lab)
        m.gauge("selfplay_worker_positions_per_second", "worker's positions per second over the last window", w.get("positions_per_second"), lab)
        m.gauge("selfplay_worker_evals_per_second", "worker's network evaluations per second", w.get("evals_per_second"), lab)
        m.gauge("selfplay_worker_snapshot_version", "snapshot version the worker plays with", w.get("snapshot_version"), lab)
        m.gauge("selfplay_worker_snapshot_lag_versions", "versions the worker is behind the newest snapshot", w.get("snapshot_lag_versions"), lab)
        m.gauge("selfplay_worker_data_age_seconds", "seconds since the worker's snapshot was published", w.get("data_age_seconds"), lab)
        m.gauge("selfplay_worker_games_in_flight", "games the worker is playing now", w.get("games_in_flight"), lab)
        m.gauge("selfplay_worker_last_seen_timestamp_seconds", "Unix time of the worker's last report", w.get("last_seen"), lab)

    b = s.get("buffer") or {}
    m.gauge("selfplay_buffer_window_positions", "positions held in the replay window", b.get("window_positions"))
    m.gauge("selfplay_buffer_window_capacity_positions", "capacity of the replay window in positions", b.get("window_capacity"))
    m.gauge("selfplay_buffer_fill_ratio", "replay window fill, window_positions / window_capacity", b.get("fill"))
    m.counter("selfplay_buffer_duplicates", "duplicate games the buffer ignored", b.get("duplicates"))
    m.counter("selfplay_buffer_shards", "shards the buffer finalised", b.get("shards"))
    m.gauge("selfplay_buffer_newest_snapshot_version", "newest snapshot version among the buffered data", b.get("newest_snapshot_in_data"))
    m.gauge("selfplay_buffer_data_lag_versions", "versions the newest buffered data is behind the newest snapshot", b.get("data_lag_versions"))

    ln = s.get("learner") or {}
    m.counter("selfplay_learner_steps", "learner optimisation steps", ln.get("step"))
    m.gauge("selfplay_learner_steps_per_second", "learner steps per second", ln.get("steps_per_second"))
    for part, key in (("total", "loss"), ("policy", "loss_policy"), ("value", "loss_value"), ("l2", "loss_l2"),
                      ("ownership", "loss_ownership"), ("score", "loss_score")):
        if key not in ln and part in ("ownership", "score"):
            continue
        m.gauge("selfplay_learner_loss", "learner loss by part (latest reported)", ln.get(key), {"part": part})
    m.counter("selfplay_learner_samples_trained", "samples the learner has trained on", ln.get("samples_trained"))
    m.gauge("selfplay_learner_sample_reuse_ratio", "samples trained per sample generated", ln.get("reuse_ratio"))
    m.gauge("selfplay_learner_learning_rate", "current learning rate", ln.get("learning_rate"))
    m.gauge("selfplay_learner_snapshot_version", "snapshot version the learner last published", ln.get("snapshot_version"))

    r = s.get("resignation") or {}
    m.counter("selfplay_resign_disabled_games", "games played with resignation disabled", r.get("disabled_games"))
    m.counter("selfplay_resign_would_resign_games", "resign-disabled games in which a player would have resigned", r.get("would_resign_games"))
    m.counter("selfplay_resign_false_positives", "resign-disabled games the would-have-resigned player did not lose", r.get("false_positives"))
    m.gauge("selfplay_resign_false_positive_ratio", "false positives / would-resign games (or / disabled games, see docs)", r.get("false_positive_rate"))

    for e in s.get("eval_matches") or []:
        lab = {"opponent": str(e.get("opponent"))}
        m.gauge("selfplay_eval_elo", "Elo difference against the opponent at the latest evaluation", e.get("elo"), lab)
        m.gauge("selfplay_eval_games", "games in the latest evaluation against the opponent", e.get("games"), lab)
    return m.out


class SummaryCollector:
    """prometheus_client custom collector: calls ``source()`` at each scrape."""

    def __init__(self, source: SummarySource) -> None:
        self.source = source

    def collect(self) -> Iterator[Metric]:
        try:
            summary = self.source()
        except SelfplayError:
            down = GaugeMetricFamily("selfplay_monitor_up", "1 if the run directory could be read at this scrape")
            down.add_metric([], 0.0)
            yield down
            return
        yield from families_from_summary(summary)


def exposition_text(summary: Summary) -> str:
    """The Prometheus text format of one summary (what the endpoint serves)."""
    reg = CollectorRegistry(auto_describe=False)
    reg.register(SummaryCollector(lambda: summary))
    return generate_latest(reg).decode()


def monitor_source(run: Any, window: float | None = None) -> SummarySource:
    """A thread-safe source that refreshes one :class:`RunMonitor` of ``run`` at each call."""
    mon = RunMonitor(run) if window is None else RunMonitor(run, window=window)
    lock = threading.Lock()

    def source() -> Summary:
        with lock:
            mon.refresh()
            return mon.summary()

    return source


class MetricsServer:
    """A running Prometheus endpoint; ``url`` to scrape, :meth:`close` to stop."""

    def __init__(self, port: int, host: str, source: SummarySource) -> None:
        if not isinstance(port, int) or isinstance(port, bool) or not 0 <= port <= 65535:
            raise ConfigError(f"metrics port {port!r} must be an integer in 0..65535 (0 picks a free one)")
        self.registry = CollectorRegistry(auto_describe=False)
        self.registry.register(SummaryCollector(source))
        try:
            self._server, self._thread = start_http_server(port, addr=host, registry=self.registry)
        except OSError as exc:
            if exc.errno == errno.EADDRINUSE:
                raise SelfplayError(
                    f"metrics port {port} on {host} is already in use; pick another --metrics-port") from exc
            raise SelfplayError(f"cannot serve metrics on {host}:{port}: {exc.strerror or exc}") from exc
        self.host = host
        self.port = int(self._server.server_address[1])

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}/metrics"

    def close(self) -> None:
        """Stop serving and release the port."""
        self._server.shutdown()
        self._server.server_close()
        self._thread.join(timeout=5)

    def __enter__(self) -> "MetricsServer":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def start_metrics_server(port: int, host: str = "127.0.0.1", *, source: SummarySource) -> MetricsServer:
    """Serve ``source()``'s figures at ``http://host:port/metrics`` in a background thread.

    Bound to 127.0.0.1 by default (local only); a port in use raises SelfplayError naming it."""
    return MetricsServer(port, host, source)
