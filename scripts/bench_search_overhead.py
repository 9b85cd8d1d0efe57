"""Time the self-play loop spends outside the network, per simulation.

Runs the vectorised worker on a game with an evaluator that builds the network's input planes
(the encoding a network evaluator does) but returns uniform priors and value 0 instead of running
a network, so every second measured is search, rules and encoding. By default it answers as a
network does, with raw logits (all zero: uniform priors over the legal moves), so the search
takes the network's path (softmax in the store; in Go, legal moves worked out when a descent
first needs them); ``--priors`` answers with the priors themselves, as rollout evaluators do. Prints microseconds per
simulation (leaf evaluation) as the median of ``--repeats`` runs of ``--seconds`` each: CPU
time of this process (steady on a shared machine) and wall time.

    PYTHONPATH=$PWD python scripts/bench_search_overhead.py --game go9 --games 64 --simulations 64
"""

from __future__ import annotations

import argparse
import json
import statistics
import time

import numpy as np

from selfplay.evaluators import EvaluatorTimes, LeafBatch, uniform_priors
from selfplay.games.registry import make_game
from selfplay.search.config import SearchConfig
from selfplay.worker import SelfPlayWorker

GAMES = {"go9": ("go", {"size": 9}), "fourinrow": ("fourinrow", {}), "tictactoe": ("tictactoe", {})}


class EncodingOnlyEvaluator:
    """Builds the input planes like a network evaluator, then answers uniform priors, value 0."""

    def __init__(self) -> None:
        self.times = EvaluatorTimes()

    def check_game(self, game) -> None:
        return None

    def _encode(self, batch: LeafBatch) -> None:
        """The network evaluator's encoding step, counted as it counts it."""
        t0 = time.perf_counter()
        batch.planes()
        self.times.encode += time.perf_counter() - t0
        self.times.calls += 1
        self.times.leaves += len(batch)

    def evaluate(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        self._encode(batch)
        return uniform_priors(batch.legal), np.zeros(len(batch), dtype=np.float32)


class EncodingOnlyLogitsEvaluator(EncodingOnlyEvaluator):
    """The same, answering raw logits as a network evaluator does (zeros: uniform priors)."""

    def __init__(self, actions: int) -> None:
        super().__init__()
        self.actions = actions

    def evaluate_logits(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        self._encode(batch)
        return np.zeros((len(batch), self.actions), dtype=np.float32), np.zeros(len(batch), dtype=np.float32)


def measure(args: argparse.Namespace) -> dict[str, float]:
    name, options = GAMES[args.game]
    game = make_game(name, **options)
    search = SearchConfig(algorithm=args.algorithm, simulations=args.simulations,
                          leaves_per_game=args.leaves_per_game, temperature_moves=10_000)
    ev = EncodingOnlyEvaluator() if args.priors else EncodingOnlyLogitsEvaluator(game.num_actions)
    worker = SelfPlayWorker(game, ev, search, games_in_parallel=args.games, worker_id="b", seed=args.seed)
    worker.step()  # warm up (compilation, first roots)
    e0, enc0 = worker.evals_total, ev.times.encode
    t0, c0 = time.perf_counter(), time.process_time()
    while time.perf_counter() - t0 < args.seconds:
        worker.step()
    elapsed, cpu = time.perf_counter() - t0, time.process_time() - c0
    evals = worker.evals_total - e0
    encode = ev.times.encode - enc0
    return {"cpu_us_per_simulation": 1e6 * cpu / evals, "wall_us_per_simulation": 1e6 * elapsed / evals,
            "wall_us_encode_per_simulation": 1e6 * encode / evals, "evals": float(evals)}


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--game", default="go9", choices=sorted(GAMES))
    p.add_argument("--games", type=int, default=64)
    p.add_argument("--simulations", type=int, default=64)
    p.add_argument("--leaves-per-game", type=int, default=1)
    p.add_argument("--algorithm", default="puct", choices=["puct", "gumbel"])
    p.add_argument("--seconds", type=float, default=6.0)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--priors", action="store_true", help="answer priors (as rollout evaluators do), not logits")
    args = p.parse_args()
    runs = [measure(args) for _ in range(args.repeats)]
    out = {k: statistics.median(r[k] for r in runs) for k in runs[0]}
    out["runs_cpu_us_per_simulation"] = [round(r["cpu_us_per_simulation"], 2) for r in runs]
    print(json.dumps({k: (round(v, 2) if isinstance(v, float) else v) for k, v in out.items()}))


if __name__ == "__main__":
    main()
