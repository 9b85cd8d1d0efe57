"""``selfplay bench all``: every figure of the project in one run, each beside its target.

Parts, in order (about 5 minutes on 2 cores; ``--quick`` for a shorter, noisier pass):

1. rules — random-playout moves/s through the game interface (``selfplay bench rules``);
2. search — self-play on every inference backend against its own bound (``selfplay bench search``);
3. replay — buffer ingest and sampling rates, bytes per position (``selfplay bench replay``);
4. scaling — 1 then 2 worker processes side by side on this machine (no Ray: the workers' own
   scaling), alternating trials; efficiency = positions/s of 2 / (2 x positions/s of 1);
5. cost — self-play positions/s against board size (Go 9/13/19) and simulations (16..256);
6. memory — peak resident memory of one self-play worker process (network, G games, trees).

Each part prints its figures as it finishes; ``--json`` prints one object with every part.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import multiprocessing as mp
import os
import statistics
import sys
import time
from typing import Any, Callable

from selfplay.errors import ConfigError

#: targets of the project's issues, printed beside the figures
TARGETS = {
    "rules_go9_moves_per_second": 100_000,
    "speedup_vs_torch_bf16": 2.0,
    "speedup_vs_torch_f32": 1.3,
    "search_efficiency": 0.85,
    "batching_speedup": 3.0,
    "scaling_efficiency": 0.9,
}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--quick", action="store_true", help="shorter measurements (about 2 minutes; noisier)")
    parser.add_argument("--parts", default="rules,search,replay,scaling,cost,memory",
                        help="comma-separated parts to run (default: all of them)")


def _module_args(module: Any, **overrides: Any) -> argparse.Namespace:
    """The argparse namespace ``module``'s own parser gives with its defaults, then ``overrides``."""
    parser = argparse.ArgumentParser()
    module.add_arguments(parser)
    args = parser.parse_args([])
    for k, v in overrides.items():
        setattr(args, k, v)
    args.json = True
    return args


def _json_of(run: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> dict[str, Any]:
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        run(args)
    return json.loads(buf.getvalue())


# ---- worker processes (scaling, cost, memory) ---------------------------------------------------

def _worker_process(spec: dict[str, Any], ready: Any, start: Any, out: Any) -> None:
    """Child: build a worker as ``spec`` says, warm it up, say so on ``ready``, wait for
    ``start``, play for ``spec['seconds']`` and put (positions/s, evals/s, peak RSS bytes) on
    ``out``."""
    import resource

    from selfplay.evaluators import NetworkEvaluator
    from selfplay.games.registry import make_game
    from selfplay.network import NetworkConfig, build_network
    from selfplay.search.config import SearchConfig
    from selfplay.worker import SelfPlayWorker

    game = make_game("go", size=spec["size"])
    net = build_network(game, NetworkConfig.reference(), seed=0)
    ev = NetworkEvaluator(net, threads=1, game=game, backend=spec["backend"], batch_hint=spec["games"])
    worker = SelfPlayWorker(game, ev, SearchConfig(simulations=spec["simulations"], temperature_moves=10_000),
                            games_in_parallel=spec["games"], worker_id=f"b{os.getpid()}", seed=spec["seed"])
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < 1.0:
        worker.step()
    ready.put(os.getpid())
    start.wait()
    moves0, evals0 = worker.positions_total_moves(), worker.evals_total
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < spec["seconds"]:
        worker.step()
    dt = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux reports KiB
    out.put(((worker.positions_total_moves() - moves0) / dt, (worker.evals_total - evals0) / dt,
             (_resident_bytes(), peak)))


def _resident_bytes() -> int:
    """This process's resident memory now (bytes; Linux /proc, else the peak)."""
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        import resource

        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def run_workers(n: int, spec: dict[str, Any], timeout: float = 300.0) -> list[tuple[float, float, tuple[int, int]]]:
    """Start ``n`` worker processes with ``spec``, let them play together; their figures."""
    ctx = mp.get_context("spawn")
    ready, start, out = ctx.Queue(), ctx.Event(), ctx.Queue()
    procs = [ctx.Process(target=_worker_process, args=({**spec, "seed": i}, ready, start, out), daemon=True)
             for i in range(n)]
    for p in procs:
        p.start()
    for _ in procs:  # every child has imported, compiled and warmed up: start them together
        ready.get(timeout=timeout)
    start.set()
    results = [out.get(timeout=timeout) for _ in procs]
    for p in procs:
        p.join(timeout=30)
    return results


def _best_backend() -> str:
    from selfplay.games.registry import make_game
    from selfplay.inference.choose import choose_backend
    from selfplay.network import NetworkConfig, build_network

    net = build_network(make_game("go", size=9), NetworkConfig.reference())
    return choose_backend(net, batch=64, say=None).backend


# ---- parts --------------------------------------------------------------------------------------

def part_rules(quick: bool) -> dict[str, Any]:
    from selfplay.bench import rules

    return _json_of(rules.run, _module_args(rules, seconds=0.5 if quick else 1.0, repeats=3))


def part_search(quick: bool) -> dict[str, Any]:
    from selfplay.bench import search

    return search.measure(_module_args(search, seconds=2.0 if quick else 4.0, repeats=3))


def part_replay(quick: bool) -> dict[str, Any]:
    from selfplay.bench import replay

    overrides = {"fill": 200_000, "positions": 100_000} if quick else {}
    return _json_of(replay.run, _module_args(replay, **overrides))


def part_scaling(quick: bool, backend: str) -> dict[str, Any]:
    spec = {"size": 9, "simulations": 64, "games": 64, "backend": backend, "seconds": 5.0 if quick else 10.0}
    ones, twos = [], []
    for _ in range(1 if quick else 2):
        ones.append(sum(r[0] for r in run_workers(1, spec)))
        twos.append(sum(r[0] for r in run_workers(2, spec)))
    one, two = statistics.median(ones), statistics.median(twos)
    return {"backend": backend, "positions_per_second_1": one, "positions_per_second_2": two,
            "efficiency": two / (2 * one), "trials": len(ones), "seconds": spec["seconds"]}


def part_cost(quick: bool, backend: str) -> dict[str, Any]:
    seconds = 3.0 if quick else 6.0
    boards, sims = {}, {}
    for size in (9, 13, 19):
        pps, eps, _ = run_workers(1, {"size": size, "simulations": 64, "games": 64, "backend": backend,
                                      "seconds": seconds})[0]
        boards[str(size)] = {"positions_per_second": pps, "evals_per_second": eps}
    for n in (16, 64, 256):
        pps, eps, _ = run_workers(1, {"size": 9, "simulations": n, "games": 64, "backend": backend,
                                      "seconds": seconds})[0]
        sims[str(n)] = {"positions_per_second": pps, "evals_per_second": eps}
    return {"backend": backend, "simulations_for_boards": 64, "boards": boards, "simulations": sims}


def part_memory(quick: bool, backend: str) -> dict[str, Any]:
    now, peak = {}, {}
    for games in (16, 64, 256):
        _, _, (rss, top) = run_workers(1, {"size": 9, "simulations": 64, "games": games, "backend": backend,
                                           "seconds": 2.0})[0]
        now[str(games)], peak[str(games)] = rss, top
    return {"backend": backend, "rss_bytes_by_games_in_parallel": now, "peak_rss_bytes_by_games_in_parallel": peak}


# ---- report -------------------------------------------------------------------------------------

def _say(text: str) -> None:
    print(text, flush=True)


def _print_part(name: str, figs: dict[str, Any]) -> None:
    if name == "rules":
        for key, g in figs["games"].items():
            _say(f"  {g['label']:<22} {g['moves_per_second']:>12,.0f} moves/s")
        go9 = figs["games"].get("go9")
        if go9:
            _say(f"  target: Go 9x9 >= {TARGETS['rules_go9_moves_per_second']:,} moves/s -> "
                 f"{go9['moves_per_second'] / TARGETS['rules_go9_moves_per_second']:.2f}x")
    elif name == "search":
        from selfplay.bench.search import print_figures

        print_figures(figs)
        bf16 = figs["backends"][figs["best_backend"]]["precision"] == "bfloat16"
        key = "speedup_vs_torch_bf16" if bf16 else "speedup_vs_torch_f32"
        if figs["speedup_vs_torch"] is not None:
            _say(f"  target: speedup vs torch >= {TARGETS[key]} -> {figs['speedup_vs_torch']:.2f}; "
                 f"efficiency >= {TARGETS['search_efficiency']} -> {figs['efficiency']:.2f}; "
                 f"batching speedup >= {TARGETS['batching_speedup']} -> {figs['batching_speedup']:.2f}")
    elif name == "replay":
        _say(f"  ingest to disk {figs['ingest_disk_positions_per_second']:>12,.0f} positions/s "
             f"(target {figs['targets']['ingest_positions_per_second']:,})")
        _say(f"  sample         {figs['sample_positions_per_second']:>12,.0f} positions/s "
             f"(target {figs['targets']['sample_positions_per_second']:,})")
        _say(f"  disk           {figs['disk_bytes_per_position']:>12,.1f} bytes/position; "
             f"RAM {figs['ram_bytes_per_position']:,.1f} bytes/position")
    elif name == "scaling":
        _say(f"  1 worker {figs['positions_per_second_1']:,.1f} positions/s, 2 workers "
             f"{figs['positions_per_second_2']:,.1f} -> efficiency {figs['efficiency']:.2f} "
             f"(target >= {TARGETS['scaling_efficiency']}; {figs['backend']})")
    elif name == "cost":
        for size, f in figs["boards"].items():
            _say(f"  Go {size}x{size}, 64 simulations: {f['positions_per_second']:8.1f} positions/s "
                 f"({f['evals_per_second']:,.0f} evals/s)")
        for n, f in figs["simulations"].items():
            _say(f"  Go 9x9, {n:>3} simulations: {f['positions_per_second']:8.1f} positions/s "
                 f"({f['evals_per_second']:,.0f} evals/s)")
    elif name == "memory":
        for games, rss in figs["rss_bytes_by_games_in_parallel"].items():
            top = figs["peak_rss_bytes_by_games_in_parallel"][games]
            _say(f"  one worker, {games:>3} games in parallel: {rss / 2**20:,.0f} MiB resident while playing "
                 f"(peak {top / 2**20:,.0f} MiB)")


def run(args: argparse.Namespace) -> int:
    parts = [p.strip() for p in args.parts.split(",") if p.strip()]
    known = ("rules", "search", "replay", "scaling", "cost", "memory")
    for p in parts:
        if p not in known:
            raise ConfigError(f"--parts: {p!r} is not one of {', '.join(known)}")
    as_json = bool(getattr(args, "json", False))
    t_start = time.perf_counter()
    out: dict[str, Any] = {"cpus": os.cpu_count(), "quick": bool(args.quick),
                           "load_average_at_start": os.getloadavg()}
    backend = None
    for name in parts:
        t0 = time.perf_counter()
        if not as_json:
            _say(f"{name} ...")
        if name in ("scaling", "cost", "memory") and backend is None:
            backend = _best_backend()
        fn = {"rules": lambda: part_rules(args.quick), "search": lambda: part_search(args.quick),
              "replay": lambda: part_replay(args.quick), "scaling": lambda: part_scaling(args.quick, backend),
              "cost": lambda: part_cost(args.quick, backend), "memory": lambda: part_memory(args.quick, backend)}[name]
        figs = fn()
        figs["seconds_taken"] = time.perf_counter() - t0
        out[name] = figs
        if not as_json:
            _print_part(name, figs)
    out["seconds_total"] = time.perf_counter() - t_start
    out["load_average_at_end"] = os.getloadavg()
    out["targets"] = TARGETS
    if as_json:
        print(json.dumps(out))
    else:
        _say(f"bench all: {out['seconds_total'] / 60:.1f} minutes; load average at start "
             f"{out['load_average_at_start'][0]:.2f}, at end {out['load_average_at_end'][0]:.2f}")
    sys.stdout.flush()
    return 0
