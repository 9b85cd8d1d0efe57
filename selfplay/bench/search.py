"""``selfplay bench search``: how close self-play comes to the network's own speed.

Measured in one run, same network, same torch thread count:

- ``inference_bound_evals_per_second``: evaluations/s of the network alone (one forward pass of
  ready-made input planes) at the mean batch size the search fed it;
- ``selfplay_evals_per_second`` and ``positions_per_second`` of the vectorised worker with
  ``--games-in-parallel`` games;
- ``efficiency`` = self-play evals/s / inference bound (target >= 0.8);
- ``batching_speedup`` = positions/s with G games over positions/s of ONE game with batch-1
  evaluation (target >= 3);
- the share of self-play time in rules, tree and network (and input encoding within network).

Figures are medians over repeats of ``--seconds`` each; within a repeat the three measurements
run in interleaved one-second slices. The machine may be shared, so read the ratios.
"""

from __future__ import annotations

import argparse
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
    parser.add_argument("--seconds", type=float, default=8.0, help="seconds per measurement (default 8)")
    parser.add_argument("--repeats", type=int, default=3, help="repeats of each measurement; medians are shown (default 3)")
    parser.add_argument("--games-in-parallel", type=int, default=64, help="games per worker, G (default 64)")
    parser.add_argument("--leaves-per-game", type=int, default=1, help="leaves per game per batch, virtual loss beyond 1 (default 1)")
    parser.add_argument("--simulations", type=int, default=64, help="simulations per move (default 64)")
    parser.add_argument("--algorithm", default="puct", choices=["puct", "gumbel"], help="root search (default puct)")
    parser.add_argument("--threads", type=int, default=1, help="torch threads (default 1)")
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
        self.sums = dict.fromkeys(("evals_total", "batches_total", "seconds_rules", "seconds_tree",
                                   "seconds_network", "moves", "encode", "forward"), 0.0)

    def _snapshot(self) -> dict[str, float]:
        st = self.worker.stats()
        ev = self.worker.evaluator.times
        return {**{k: float(st[k]) for k in ("evals_total", "batches_total", "seconds_rules", "seconds_tree",
                                             "seconds_network")},
                "moves": float(self.worker.positions_total_moves()), "encode": ev.encode, "forward": ev.forward}

    def run(self, seconds: float) -> None:
        before = self._snapshot()
        t0 = time.perf_counter()
        while time.perf_counter() - t0 < seconds:
            self.worker.step()
        self.elapsed += time.perf_counter() - t0
        after = self._snapshot()
        for k in self.sums:
            self.sums[k] += after[k] - before[k]

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
    """Evaluations/s of the evaluator's net alone (its inference form, a ready input tensor in
    the same memory format, same threads, inference mode) on random 0/1 planes at ``batch``."""
    import torch

    planes = np.random.default_rng(0).random((batch, *input_shape), dtype=np.float32).round()
    x = evaluator.input_tensor(planes)
    net = evaluator.inference_net
    n = 0
    with torch.inference_mode():
        for _ in range(3):
            net(x)
        t0 = time.perf_counter()
        while time.perf_counter() - t0 < seconds:
            net(x)
            n += batch
    return n / (time.perf_counter() - t0)


def run(args: argparse.Namespace) -> int:
    from selfplay.evaluators import NetworkEvaluator
    from selfplay.network import NetworkConfig, build_network
    from selfplay.worker import SelfPlayWorker

    _check(args)
    name, options = _GAMES[args.game]
    game = make_game(name, **options)
    net_cfg = NetworkConfig.reference() if args.net == "reference" else NetworkConfig.tiny()
    net = build_network(game, net_cfg, seed=args.seed)
    search = SearchConfig(algorithm=args.algorithm, simulations=args.simulations,
                          leaves_per_game=args.leaves_per_game, temperature_moves=10_000)
    evaluator = NetworkEvaluator(net, threads=args.threads, game=game, precision=args.precision)
    many = SelfPlayWorker(game, evaluator, search, games_in_parallel=args.games_in_parallel,
                          worker_id="bench", seed=args.seed)
    single_search = search.model_copy(update={"leaves_per_game": 1})
    one = SelfPlayWorker(game, NetworkEvaluator(net, threads=args.threads, game=game, precision=args.precision),
                         single_search,
                         games_in_parallel=1, worker_id="bench1", seed=args.seed)
    many.step()  # warm-up (compilation, allocator)
    one.step()
    # Each repeat interleaves one-second slices of the three measurements (G games, the net
    # alone, one game), so that a drifting load on a shared machine touches all three alike.
    many_runs, one_runs, bounds, bounds_1 = [], [], [], []
    slices = max(1, round(args.seconds))
    piece = args.seconds / slices
    for _ in range(args.repeats):
        m, o = _Meter(many), _Meter(one)
        evals_alone, evals_alone_1, seconds_alone = 0.0, 0.0, 0.0
        for _ in range(slices):
            m.run(piece)
            batch = max(1, round(m.mean_batch()))
            evals_alone += inference_bound(evaluator, tuple(game.input_shape), batch, piece / 2) * piece / 2
            evals_alone_1 += inference_bound(evaluator, tuple(game.input_shape), 1, piece / 2) * piece / 2
            seconds_alone += piece / 2
            o.run(piece)
        many_runs.append(m.figures())
        one_runs.append(o.figures())
        bounds.append(evals_alone / seconds_alone)
        bounds_1.append(evals_alone_1 / seconds_alone)

    def med(runs: list[dict[str, Any]], key: str) -> float:
        return float(statistics.median(r[key] for r in runs))

    bound = float(statistics.median(bounds))
    evals = med(many_runs, "evals_per_second")
    pps = med(many_runs, "positions_per_second")
    pps_one = med(one_runs, "positions_per_second")
    out = {
        "game": args.game,
        "network": f"{net_cfg.blocks}x{net_cfg.channels}",
        "threads": args.threads,
        "precision": evaluator.precision,
        "algorithm": args.algorithm,
        "simulations": args.simulations,
        "games_in_parallel": args.games_in_parallel,
        "leaves_per_game": args.leaves_per_game,
        "mean_batch_size": med(many_runs, "mean_batch"),
        "inference_bound_evals_per_second": bound,
        "selfplay_evals_per_second": evals,
        "positions_per_second": pps,
        # ratios per repeat (each from measurements taken back to back), then their median:
        # steadier on a shared machine than a ratio of medians
        "efficiency": float(statistics.median(m["evals_per_second"] / b for m, b in zip(many_runs, bounds))),
        "single_game_positions_per_second": pps_one,
        "single_game_evals_per_second": med(one_runs, "evals_per_second"),
        # the network's own gain from batching: an upper bound on batching_speedup when the
        # single game runs its network near speed
        "inference_bound_batch1_evals_per_second": float(statistics.median(bounds_1)),
        "network_batch_scaling": float(statistics.median(b / max(b1, 1e-9) for b, b1 in zip(bounds, bounds_1))),
        "batching_speedup": float(statistics.median(m["positions_per_second"] / max(o["positions_per_second"], 1e-9)
                                                    for m, o in zip(many_runs, one_runs))),
        "time_share_rules": med(many_runs, "share_rules"),
        "time_share_tree": med(many_runs, "share_tree"),
        "time_share_network": med(many_runs, "share_network"),
        "time_share_encode": med(many_runs, "share_encode"),
        "time_share_forward": med(many_runs, "share_forward"),
        "microseconds_per_eval_outside_forward": med(many_runs, "us_per_eval_outside_forward"),
        # the evaluator's forward calls inside self-play (with masking and softmax), evals per
        # second of forward time: compare with the inference bound to see whether the network
        # itself ran slower inside self-play than alone
        "selfplay_forward_evals_per_second": med(many_runs, "forward_evals_per_second"),
        "repeats": args.repeats,
        "seconds_per_measurement": args.seconds,
    }
    if getattr(args, "json", False):
        print(json.dumps(out))
        return 0
    print(f"search benchmark: {out['game']}, net {out['network']} ({out['precision']}), {args.threads} thread(s), {args.algorithm}, "
          f"{args.simulations} simulations, G={args.games_in_parallel}, leaves/game={args.leaves_per_game}")
    print(f"  inference bound (batch {out['mean_batch_size']:.1f}):  {bound:10.0f} evals/s")
    print(f"  self-play:                         {evals:10.0f} evals/s  {pps:8.1f} positions/s")
    print(f"  efficiency:                        {out['efficiency']:10.2f}   (target >= 0.8)")
    print(f"  one game, batch 1:                 {out['single_game_evals_per_second']:10.0f} evals/s  {pps_one:8.1f} positions/s")
    print(f"  batching speedup:                  {out['batching_speedup']:10.2f}   (target >= 3)")
    print(f"  the net alone at batch 1:          {out['inference_bound_batch1_evals_per_second']:10.0f} evals/s "
          f"(its own batching gain: {out['network_batch_scaling']:.2f}x)")
    print(f"  time shares: rules {out['time_share_rules']:.1%}  tree {out['time_share_tree']:.1%}  "
          f"network {out['time_share_network']:.1%} (encode {out['time_share_encode']:.1%}, "
          f"forward {out['time_share_forward']:.1%})")
    print(f"  outside the forward pass: {out['microseconds_per_eval_outside_forward']:.0f} us per evaluation; "
          f"forward calls inside self-play ran at {out['selfplay_forward_evals_per_second']:.0f} evals/s")
    return 0
