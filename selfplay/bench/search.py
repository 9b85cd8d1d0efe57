"""``selfplay bench search``: how close self-play comes to the network's own speed, per backend.

Measured in one run, same network, same thread count, for every inference backend that imports
here (``--backends``):

- ``bound_evals_per_second``: evaluations/s of the compiled network alone (one forward pass of
  ready-made input planes) at the mean batch size the search fed it — the *inference bound*;
- ``selfplay_evals_per_second`` and ``positions_per_second`` of the vectorised worker with
  ``--games-in-parallel`` games on that backend;
- ``efficiency`` = self-play evals/s / that backend's own bound (target >= 0.85), taken slice by
  slice: each one-second slice of self-play against the bound timed right after it, the median
  over all slices of all repeats (``efficiency_low`` / ``efficiency_high``: their quartiles). A
  second-long stall of the machine then spoils one slice's ratio, not a whole repeat's;

and at the top level ``best_backend`` (most self-play positions/s), ``speedup_vs_torch`` (its
positions/s over torch's, in the same run) and ``efficiency`` (the best backend's). For the best
backend also: ``batching_speedup`` = positions/s with G games over positions/s of ONE game with
batch-1 evaluation (target >= 3), and the share of self-play time in rules, tree and network.

Figures are medians over repeats; within a repeat the backends' measurements run in interleaved
one-second slices, so that a drifting load on a shared machine touches all alike. Each slice, of
self-play as of the network alone, starts timing after one untimed round (call), so neither
pays for the switch from another backend. Read the ratios.
"""

from __future__ import annotations

import argparse
import gc
import json
import statistics
import time
from typing import TYPE_CHECKING, Any

import numpy as np

from selfplay.errors import ConfigError
from selfplay.games.registry import make_game
from selfplay.search.config import SearchConfig

if TYPE_CHECKING:  # torch comes with these; imported where used, not when the CLI builds its parser
    from selfplay.evaluators import NetworkEvaluator
    from selfplay.worker import SelfPlayWorker

_GAMES = {
    "go9": ("go", {"size": 9}),
    "go": ("go", {"size": 9}),
    "fourinrow": ("fourinrow", {}),
    "tictactoe": ("tictactoe", {}),
    "gomoku9": ("gomoku", {"m": 9, "n": 9, "k": 5}),
}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--game", default="go9", choices=sorted(_GAMES),
                        help="game to play (default go9: Go on 9x9)")
    parser.add_argument("--net", default="reference", choices=["tiny", "reference"],
                        help="network size: reference = 6 blocks x 64 channels (default)")
    parser.add_argument("--seconds", type=float, default=6.0, help="seconds per measurement (default 6)")
    parser.add_argument("--repeats", type=int, default=3, help="repeats of each measurement; medians are shown (default 3)")
    parser.add_argument("--games-in-parallel", type=int, default=64, help="games per worker, G (default 64)")
    parser.add_argument("--leaves-per-game", type=int, default=1, help="leaves per game per batch, virtual loss beyond 1 (default 1)")
    parser.add_argument("--simulations", type=int, default=64, help="simulations per move (default 64)")
    from selfplay.search.root import VARIANTS

    parser.add_argument("--algorithm", default="puct", choices=sorted(VARIANTS), help="root search (default puct)")
    parser.add_argument("--threads", type=int, default=1, help="forward-pass threads (default 1)")
    parser.add_argument("--backends", default="all",
                        help="comma-separated inference backends to compare, or 'all' that import here "
                        "(default all: torch, openvino, onnxruntime)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the worker (default 0)")
    parser.add_argument("--precision", default="auto", choices=["auto", "float32", "bfloat16"],
                        help="forward-pass precision (default auto: bfloat16 where the CPU has matrix units)")


def _check(args: argparse.Namespace) -> None:
    for name in ("seconds",):
        if getattr(args, name) <= 0:
            raise ConfigError(f"--{name}={getattr(args, name)} must be positive")
    for name in ("repeats", "games_in_parallel", "leaves_per_game", "simulations", "threads"):
        if getattr(args, name) < 1:
            raise ConfigError(f"--{name.replace('_', '-')}={getattr(args, name)} must be at least 1")


class _Meter:
    """Counters of one worker summed over the time slices it ran in."""

    def __init__(self, worker: SelfPlayWorker) -> None:
        self.worker = worker
        self.elapsed = 0.0
        #: evals/s of each slice run
        self.slice_rates: list[float] = []
        self.sums = dict.fromkeys(("evals_total", "batches_total", "seconds_rules", "seconds_tree",
                                   "seconds_network", "moves", "encode", "forward"), 0.0)

    def _snapshot(self) -> dict[str, float]:
        st = self.worker.stats()
        ev = self.worker.evaluator.times
        return {**{k: float(st[k]) for k in ("evals_total", "batches_total", "seconds_rules", "seconds_tree",
                                             "seconds_network")},
                "moves": float(self.worker.positions_total_moves()), "encode": ev.encode, "forward": ev.forward}

    def run(self, seconds: float) -> None:
        # one untimed round first, as the bound's timing starts after one untimed call: the
        # slices of the backends alternate, and the first call after a switch runs cold
        self.worker.play_round()
        before = self._snapshot()
        t0 = time.perf_counter()
        while time.perf_counter() - t0 < seconds:
            self.worker.step()
        elapsed = time.perf_counter() - t0
        self.elapsed += elapsed
        after = self._snapshot()
        for k in self.sums:
            self.sums[k] += after[k] - before[k]
        self.slice_rates.append((after["evals_total"] - before["evals_total"]) / elapsed)

    def mean_batch(self) -> float:
        return self.sums["evals_total"] / max(self.sums["batches_total"], 1.0)

    def figures(self) -> dict[str, float]:
        d = self.sums
        total = max(d["seconds_rules"] + d["seconds_tree"] + d["seconds_network"], 1e-9)
        return {
            "evals_per_second": d["evals_total"] / self.elapsed,
            "positions_per_second": d["moves"] / self.elapsed,
            "mean_batch": self.mean_batch(),
            "share_rules": d["seconds_rules"] / total,
            "share_tree": d["seconds_tree"] / total,
            "share_network": d["seconds_network"] / total,
            "share_encode": d["encode"] / total,
            "share_forward": d["forward"] / total,
            "us_per_eval_outside_forward": 1e6 * (total - d["forward"]) / max(d["evals_total"], 1.0),
            "forward_evals_per_second": d["evals_total"] / max(d["forward"], 1e-9),
        }


def inference_bound(evaluator: NetworkEvaluator, input_shape: tuple[int, ...], batch: int, seconds: float) -> float:
    """Evaluations/s of the evaluator's compiled network alone (same backend, threads and
    precision) on random 0/1 planes at ``batch``."""
    from selfplay.inference.choose import time_forward

    planes = np.random.default_rng(0).random((batch, *input_shape), dtype=np.float32).round()
    return time_forward(evaluator.compiled, planes, seconds)


def _backends(arg: str) -> list[str]:
    from selfplay.inference import BACKEND_NAMES, backend_available

    if arg == "all":
        return [b for b in BACKEND_NAMES if backend_available(b) is None]
    names = [b.strip() for b in arg.split(",") if b.strip()]
    for b in names:
        problem = backend_available(b)
        if problem:
            raise ConfigError(f"--backends: {b} cannot run here ({problem})")
    if not names:
        raise ConfigError("--backends: name at least one backend, or 'all'")
    return list(dict.fromkeys(names))


def measure(args: argparse.Namespace) -> dict[str, Any]:
    """Run the benchmark described by ``args``; returns the figures (see the module docstring)."""
    from selfplay.evaluators import NetworkEvaluator
    from selfplay.network import NetworkConfig, build_network
    from selfplay.worker import SelfPlayWorker

    _check(args)
    backends = _backends(getattr(args, "backends", "all"))
    name, options = _GAMES[args.game]
    game = make_game(name, **options)
    net_cfg = NetworkConfig.reference() if args.net == "reference" else NetworkConfig.tiny()
    net = build_network(game, net_cfg, seed=args.seed)
    search = SearchConfig(algorithm=args.algorithm, simulations=args.simulations,
                          leaves_per_game=args.leaves_per_game, temperature_moves=10_000)
    single_search = search.model_copy(update={"leaves_per_game": 1})
    evaluators, many, one = {}, {}, {}
    for b in backends:
        # the worker's batch, as a self-play role passes it (OpenVINO compiles a fixed shape for it)
        evaluators[b] = NetworkEvaluator(net, threads=args.threads, game=game, precision=args.precision, backend=b,
                                         batch_hint=args.games_in_parallel * args.leaves_per_game)
        many[b] = SelfPlayWorker(game, evaluators[b], search, games_in_parallel=args.games_in_parallel,
                                 worker_id="bench", seed=args.seed)
        one[b] = SelfPlayWorker(game, NetworkEvaluator(net, threads=args.threads, game=game,
                                                       precision=args.precision, backend=b),
                                single_search, games_in_parallel=1, worker_id="bench1", seed=args.seed)
        many[b].step()  # warm-up (compilation, allocator)
        one[b].step()
    gc.freeze()  # as a worker process does after start-up (selfplay.roles.selfplay)
    runs: dict[str, list[dict[str, float]]] = {b: [] for b in backends}
    one_runs: dict[str, list[dict[str, float]]] = {b: [] for b in backends}
    bounds: dict[str, list[float]] = {b: [] for b in backends}
    bounds_1: dict[str, list[float]] = {b: [] for b in backends}
    slice_ratios: dict[str, list[float]] = {b: [] for b in backends}  # self-play slice / the bound after it
    slices = max(1, round(args.seconds))
    piece = args.seconds / slices
    shape = tuple(game.input_shape)
    for _ in range(args.repeats):
        meters = {b: (_Meter(many[b]), _Meter(one[b])) for b in backends}
        alone = {b: [0.0, 0.0] for b in backends}
        for _ in range(slices):
            for b in backends:
                m, o = meters[b]
                m.run(piece)
                batch = max(1, round(m.mean_batch()))
                bound = inference_bound(evaluators[b], shape, batch, piece / 2)
                alone[b][0] += bound
                slice_ratios[b].append(m.slice_rates[-1] / bound)
                alone[b][1] += inference_bound(evaluators[b], shape, 1, piece / 4)
                o.run(piece / 2)
        for b in backends:
            runs[b].append(meters[b][0].figures())
            one_runs[b].append(meters[b][1].figures())
            bounds[b].append(alone[b][0] / slices)
            bounds_1[b].append(alone[b][1] / slices)

    def med(values: Any) -> float:
        return float(statistics.median(list(values)))

    per_backend: dict[str, dict[str, Any]] = {}
    for b in backends:
        per_backend[b] = {
            "precision": evaluators[b].precision,
            "bound_evals_per_second": med(bounds[b]),
            "selfplay_evals_per_second": med(r["evals_per_second"] for r in runs[b]),
            "positions_per_second": med(r["positions_per_second"] for r in runs[b]),
            # ratios per repeat (each from measurements taken back to back), then their median
            "efficiency": med(slice_ratios[b]),
            "efficiency_low": float(np.percentile(slice_ratios[b], 25)),
            "efficiency_high": float(np.percentile(slice_ratios[b], 75)),
            "mean_batch_size": med(r["mean_batch"] for r in runs[b]),
            "microseconds_per_eval_outside_forward": med(r["us_per_eval_outside_forward"] for r in runs[b]),
        }
    best = max(backends, key=lambda b: per_backend[b]["positions_per_second"])
    r_best, o_best = runs[best], one_runs[best]
    out: dict[str, Any] = {
        "game": args.game,
        "network": f"{net_cfg.blocks}x{net_cfg.channels}",
        "threads": args.threads,
        "algorithm": args.algorithm,
        "simulations": args.simulations,
        "games_in_parallel": args.games_in_parallel,
        "leaves_per_game": args.leaves_per_game,
        "backends": per_backend,
        "best_backend": best,
        "speedup_vs_torch": (med(r["positions_per_second"] / t["positions_per_second"]
                                 for r, t in zip(r_best, runs["torch"]))
                             if "torch" in backends else None),
        "efficiency": per_backend[best]["efficiency"],
        "efficiency_low": per_backend[best]["efficiency_low"],
        "efficiency_high": per_backend[best]["efficiency_high"],
        "precision": per_backend[best]["precision"],
        "mean_batch_size": per_backend[best]["mean_batch_size"],
        "inference_bound_evals_per_second": per_backend[best]["bound_evals_per_second"],
        "selfplay_evals_per_second": per_backend[best]["selfplay_evals_per_second"],
        "positions_per_second": per_backend[best]["positions_per_second"],
        "single_game_positions_per_second": med(o["positions_per_second"] for o in o_best),
        "single_game_evals_per_second": med(o["evals_per_second"] for o in o_best),
        # the network's own gain from batching: an upper bound on batching_speedup when the
        # single game runs its network near speed
        "inference_bound_batch1_evals_per_second": med(bounds_1[best]),
        "network_batch_scaling": med(x / max(x1, 1e-9) for x, x1 in zip(bounds[best], bounds_1[best])),
        "batching_speedup": med(m["positions_per_second"] / max(o["positions_per_second"], 1e-9)
                                for m, o in zip(r_best, o_best)),
        "time_share_rules": med(r["share_rules"] for r in r_best),
        "time_share_tree": med(r["share_tree"] for r in r_best),
        "time_share_network": med(r["share_network"] for r in r_best),
        "time_share_encode": med(r["share_encode"] for r in r_best),
        "time_share_forward": med(r["share_forward"] for r in r_best),
        "microseconds_per_eval_outside_forward": per_backend[best]["microseconds_per_eval_outside_forward"],
        # the evaluator's forward calls inside self-play (with masking and softmax), evals per
        # second of forward time: compare with the bound to see whether the network itself ran
        # slower inside self-play than alone
        "selfplay_forward_evals_per_second": med(r["forward_evals_per_second"] for r in r_best),
        "repeats": args.repeats,
        "seconds_per_measurement": args.seconds,
    }
    return out


def print_figures(out: dict[str, Any]) -> None:
    print(f"search benchmark: {out['game']}, net {out['network']}, {out['threads']} thread(s), {out['algorithm']}, "
          f"{out['simulations']} simulations, G={out['games_in_parallel']}, leaves/game={out['leaves_per_game']}")
    print(f"  {'backend':<12} {'precision':<9} {'bound evals/s':>14} {'self-play evals/s':>18} "
          f"{'positions/s':>12} {'efficiency':>10}")
    for b, f in out["backends"].items():
        print(f"  {b:<12} {f['precision']:<9} {f['bound_evals_per_second']:>14,.0f} "
              f"{f['selfplay_evals_per_second']:>18,.0f} {f['positions_per_second']:>12,.1f} {f['efficiency']:>10.2f}")
    best = out["best_backend"]
    speed = out["speedup_vs_torch"]
    print(f"  best: {best}; positions/s vs torch: {speed:.2f}x (target >= 2 with bfloat16 matrix units)"
          if speed is not None else f"  best: {best}")
    print(f"  efficiency of {best} against its own bound: {out['efficiency']:.2f} (target >= 0.85; "
          f"quartiles of the slices {out['efficiency_low']:.2f}-{out['efficiency_high']:.2f})")
    print(f"  one game, batch 1 ({best}):       {out['single_game_evals_per_second']:10,.0f} evals/s "
          f"{out['single_game_positions_per_second']:8.1f} positions/s")
    print(f"  batching speedup:                 {out['batching_speedup']:10.2f}   (target >= 3)")
    print(f"  the net alone at batch 1:         {out['inference_bound_batch1_evals_per_second']:10,.0f} evals/s "
          f"(its own batching gain: {out['network_batch_scaling']:.2f}x)")
    print(f"  time shares ({best}): rules {out['time_share_rules']:.1%}  tree {out['time_share_tree']:.1%}  "
          f"network {out['time_share_network']:.1%} (encode {out['time_share_encode']:.1%}, "
          f"forward {out['time_share_forward']:.1%})")
    print(f"  outside the forward pass: {out['microseconds_per_eval_outside_forward']:.0f} us per evaluation; "
          f"forward calls inside self-play ran at {out['selfplay_forward_evals_per_second']:,.0f} evals/s")


def run(args: argparse.Namespace) -> int:
    out = measure(args)
    if getattr(args, "json", False):
        print(json.dumps(out))
    else:
        print_figures(out)
    return 0
