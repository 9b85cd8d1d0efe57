"""``selfplay watch RUN``: a live view of a run directory, optionally with a Prometheus endpoint."""

from __future__ import annotations

import argparse
import sys

from selfplay.errors import ConfigError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "watch", help="live terminal view of a run (works from any machine that can read RUN)",
        description="Redraw the run's status every --interval seconds until q (typed in the "
        "terminal) or Ctrl-C. In a "
        "non-interactive terminal (a pipe or a file) frames are printed one after another. "
        "With --metrics-port the same figures are also served in Prometheus' text format.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("--interval", type=float, default=2.0, metavar="S", help="seconds between refreshes (default 2)")
    p.add_argument("--once", action="store_true", help="draw one frame and exit")
    p.add_argument("--metrics-port", type=int, default=None, metavar="PORT",
                   help="also serve Prometheus metrics at http://HOST:PORT/metrics while watching")
    p.add_argument("--metrics-host", default="127.0.0.1", metavar="HOST",
                   help="address the metrics endpoint binds to (default 127.0.0.1: this machine only)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from rich.console import Console

    from selfplay.monitor.summary import RunMonitor
    from selfplay.monitor.watch import watch_run

    if not args.interval > 0:
        raise ConfigError(f"--interval {args.interval} must be a positive number of seconds")
    RunMonitor(args.run)  # a missing or foreign run directory is refused before anything starts
    server = None
    if args.metrics_port is not None:
        from selfplay.monitor.prometheus import monitor_source, start_metrics_server

        server = start_metrics_server(args.metrics_port, args.metrics_host, source=monitor_source(args.run))
        print(f"serving Prometheus metrics at {server.url}", file=sys.stderr)
    try:
        watch_run(args.run, interval=args.interval, once=args.once, console=Console())
        if server is not None and args.once:
            import time
            try:
                while True:  # --once with an endpoint: one frame, then keep serving until Ctrl-C
                    time.sleep(3600)
            except KeyboardInterrupt:
                pass
    finally:
        if server is not None:
            server.close()
    return 0
