#!/usr/bin/env python
"""Proof that the loop learns: train from scratch in one process, then play matches.

    python scripts/learning_proof.py tictactoe --minutes 10 --out /tmp/proof-ttt
    python scripts/learning_proof.py fourinrow --minutes 30 --out /tmp/proof-c4

tictactoe: the snapshot (with a modest PUCT search, no noise, temperature 0, and also its raw
policy) plays 100 games against a perfect minimax player, 50 as X and 50 as O; the untrained
first snapshot plays the same match. Goal: the trained snapshot loses 0 of 100.

fourinrow: the latest snapshot plays 100 games against the first snapshot and 100 against the
pure-MCTS baseline (uniform priors, random rollouts) at the same simulation budget, each pair of
games from one random 2-ply opening with colours swapped. Goals: >= 90% and >= 70% wins.

During training a quick evaluation runs every ``--eval-seconds`` (its time is not counted as
training time); the learning curve (losses and the evaluation against time) goes to
``OUT/curve.json`` and a PNG (``--plot``). The final figures go to ``OUT/results.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

from selfplay.config import RunConfig, config_from_dict
from selfplay.evaluation import MinimaxPlayer, PolicyPlayer, SearchPlayer, play_match
from selfplay.evaluators import NetworkEvaluator, RandomRolloutEvaluator
from selfplay.loop import LoopConfig
from selfplay.loop import LocalRun, LoopStatus, run_local_loop
from selfplay.metrics import MetricsLog
from selfplay.network import build_network

#: training settings of each proof (fields not given take the run config's defaults)
SETTINGS: dict[str, dict[str, Any]] = {
    "tictactoe": {
        "game": {"name": "mnk", "options": {"m": 3, "n": 3, "k": 3}},
        "network": {"blocks": 2, "channels": 32, "value_hidden": 32},
        "search": {"simulations": 64, "reduced_simulations": 16, "temperature_moves": 3,
                   "dirichlet_epsilon": 0.25},
        "worker": {"games_in_parallel": 64, "threads": 1},
        "replay": {"window_positions": 40_000, "shard_max_age_seconds": 30.0},
        "learner": {"batch_size": 128, "optimizer": "adam", "learning_rate": 0.002, "weight_decay": 1e-4,
                    "steps_per_snapshot": 100, "min_buffer_positions": 1000, "target_reuse_ratio": 6.0},
    },
    "fourinrow": {
        "game": {"name": "fourinrow", "options": {"columns": 7, "rows": 6}},
        "network": {"blocks": 2, "channels": 32, "value_hidden": 32},
        "search": {"simulations": 64, "reduced_simulations": 16, "full_search_share": 0.5,
                   "temperature_moves": 10},
        "worker": {"games_in_parallel": 64, "threads": 1},
        # the window holds every position of a 30-minute run (about 300,000 here) and the rate decays:
        # a first run with a 150,000 window and a constant rate ended at 89% against the first
        # snapshot while its snapshot at 15 minutes won 100% (see docs/learning.md)
        "replay": {"window_positions": 400_000, "shard_max_age_seconds": 30.0},
        "learner": {"batch_size": 256, "optimizer": "adam", "learning_rate": 0.002, "weight_decay": 1e-4,
                    "lr_schedule": "cosine", "lr_cosine_steps": 5000, "lr_min": 0.0002,
                    "steps_per_snapshot": 100, "min_buffer_positions": 3000, "target_reuse_ratio": 4.0},
    },
}
EVAL_SIMULATIONS = {"tictactoe": 64, "fourinrow": 64}


def proof_config(name: str, minutes: float, seed: int) -> RunConfig:
    data = json.loads(json.dumps(SETTINGS[name]))
    data["run"] = {"minutes": 0.0, "seed": seed}
    return config_from_dict(data, origin=f"learning proof {name!r}")


def snapshot_net(run: LocalRun, version: int):
    net = build_network(run.game, run.config.network)
    run.store.load_into(net, version)
    return net.eval()


def quick_eval(name: str, run: LocalRun, version: int, games: int, seed: int) -> dict[str, Any]:
    """The evaluation of the learning curve (fewer games than the final one)."""
    net = snapshot_net(run, version)
    sims = EVAL_SIMULATIONS[name]
    if name == "tictactoe":
        res = play_match(run.game, SearchPlayer(NetworkEvaluator(net), sims, f"v{version}+search{sims}"),
                         MinimaxPlayer(run.game), games, seed=seed)
        raw = play_match(run.game, PolicyPlayer(net, f"v{version}-policy"), MinimaxPlayer(run.game), games, seed=seed)
        return {"opponent": "minimax", "search": res.to_dict(), "policy": raw.to_dict()}
    first = snapshot_net(run, 1)
    vs_first = play_match(run.game, SearchPlayer(NetworkEvaluator(net), sims, f"v{version}"),
                          SearchPlayer(NetworkEvaluator(first), sims, "v1"), games, seed=seed, opening_plies=2)
    vs_mcts = play_match(run.game, SearchPlayer(NetworkEvaluator(net), sims, f"v{version}"),
                         SearchPlayer(RandomRolloutEvaluator(), sims, f"mcts{sims}"), games, seed=seed, opening_plies=2)
    return {"opponent": "first+mcts", "vs_first": vs_first.to_dict(), "vs_mcts": vs_mcts.to_dict()}


def final_eval(name: str, run: LocalRun, seed: int) -> dict[str, Any]:
    latest = run.store.latest_version()
    sims = EVAL_SIMULATIONS[name]
    out: dict[str, Any] = {"latest_version": latest, "simulations": sims}
    t0 = time.perf_counter()
    if name == "tictactoe":
        for label, version in (("untrained", 1), ("trained", latest)):
            net = snapshot_net(run, version)
            s = play_match(run.game, SearchPlayer(NetworkEvaluator(net), sims, f"v{version}+search{sims}"),
                           MinimaxPlayer(run.game), 100, seed=seed + 1)
            p = play_match(run.game, PolicyPlayer(net, f"v{version}-policy"), MinimaxPlayer(run.game), 100,
                           seed=seed + 1)
            out[label] = {"version": version, "search": s.to_dict(), "policy": p.to_dict()}
    else:
        net = snapshot_net(run, latest)
        first = snapshot_net(run, 1)
        vs_first = play_match(run.game, SearchPlayer(NetworkEvaluator(net), sims, f"v{latest}"),
                              SearchPlayer(NetworkEvaluator(first), sims, "v1"), 100, seed=seed + 1, opening_plies=2)
        vs_mcts = play_match(run.game, SearchPlayer(NetworkEvaluator(net), sims, f"v{latest}"),
                             SearchPlayer(RandomRolloutEvaluator(), sims, f"mcts{sims}"), 100, seed=seed + 1,
                             opening_plies=2)
        out["vs_first"] = vs_first.to_dict()
        out["vs_mcts"] = vs_mcts.to_dict()
    out["eval_seconds"] = time.perf_counter() - t0
    return out


def plot_curve(name: str, curve: list[dict[str, Any]], losses: list[dict[str, Any]], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4))
    if losses:
        t = np.array([r["train_seconds"] for r in losses]) / 60
        for key, label in (("loss", "total"), ("loss_policy", "policy"), ("loss_value", "value")):
            ax1.plot(t, [r[key] for r in losses], label=label)
    ax1.set_xlabel("training time (min)")
    ax1.set_ylabel("loss")
    ax1.set_title(f"{name}: learner loss")
    ax1.legend()
    t = [c["train_seconds"] / 60 for c in curve]
    if name == "tictactoe":
        ax2.plot(t, [c["eval"]["search"]["losses"] / c["eval"]["search"]["games"] for c in curve],
                 marker="o", label="lost vs minimax (search)")
        ax2.plot(t, [c["eval"]["policy"]["losses"] / c["eval"]["policy"]["games"] for c in curve],
                 marker="s", label="lost vs minimax (raw policy)")
        ax2.set_ylabel("share of games lost")
    else:
        ax2.plot(t, [c["eval"]["vs_first"]["win_rate"] for c in curve], marker="o", label="won vs first snapshot")
        ax2.plot(t, [c["eval"]["vs_mcts"]["win_rate"] for c in curve], marker="s", label="won vs pure MCTS")
        ax2.set_ylabel("share of games won")
    ax2.set_ylim(-0.02, 1.02)
    ax2.set_xlabel("training time (min)")
    ax2.set_title(f"{name}: strength of the newest snapshot")
    ax2.legend()
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=100)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("game", choices=sorted(SETTINGS))
    ap.add_argument("--minutes", type=float, default=None, help="training time (default 10 / 30)")
    ap.add_argument("--out", required=True, help="run directory (must not exist yet)")
    ap.add_argument("--eval-seconds", type=float, default=60.0, help="seconds of training between quick evaluations")
    ap.add_argument("--eval-games", type=int, default=40, help="games of each quick evaluation")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--plot", default=None, help="PNG path of the learning curve")
    args = ap.parse_args(argv)
    minutes = args.minutes if args.minutes is not None else (10.0 if args.game == "tictactoe" else 30.0)
    out = Path(args.out)
    if out.exists():
        print(f"learning_proof: {out} already exists; give a new directory", file=sys.stderr)
        return 2
    config = proof_config(args.game, minutes, args.seed)
    eval_spent = [0.0]
    last_eval = [0.0]
    curve: list[dict[str, Any]] = []
    t_start = time.time()

    def train_seconds() -> float:
        return time.time() - t_start - eval_spent[0]

    loss_curve: list[dict[str, Any]] = []
    seen_steps = [0]

    def on_phase(run: LocalRun) -> None:
        ts = train_seconds()
        new = [h for h in run.learner.learner.history if h["step"] > seen_steps[0]]
        if new:
            seen_steps[0] = int(new[-1]["step"])
            loss_curve.append({"train_seconds": ts, "step": seen_steps[0],
                               **{k: float(np.mean([h[k] for h in new])) for k in ("loss", "loss_policy", "loss_value")}})
        if ts - last_eval[0] < args.eval_seconds:
            return
        last_eval[0] = ts
        t0 = time.perf_counter()
        version = run.store.latest_version()
        ev = quick_eval(args.game, run, version, args.eval_games, args.seed)
        last = run.learner.learner.history[-1] if run.learner.learner.history else {}
        point = {"train_seconds": ts, "version": version, "games": run.status.games,
                 "positions": run.status.positions, "learner_steps": run.learner.learner.step,
                 "reuse_ratio": run.learner.learner.reuse_ratio, "loss": last.get("loss"), "eval": ev}
        curve.append(point)
        MetricsLog(run.run.metrics, "eval", "learning-proof").write(
            opponent=ev["opponent"], version=version, train_seconds=ts,
            **({"games": ev["search"]["games"], "wins": ev["search"]["wins"], "draws": ev["search"]["draws"],
                "losses": ev["search"]["losses"], "elo": ev["search"]["elo"]} if args.game == "tictactoe" else
               {"games": ev["vs_mcts"]["games"], "wins": ev["vs_mcts"]["wins"], "draws": ev["vs_mcts"]["draws"],
                "losses": ev["vs_mcts"]["losses"], "elo": ev["vs_mcts"]["elo"]}))
        eval_spent[0] += time.perf_counter() - t0
        brief = (f"lost {ev['search']['losses']}/{ev['search']['games']} (search), "
                 f"{ev['policy']['losses']}/{ev['policy']['games']} (policy)" if args.game == "tictactoe" else
                 f"won {ev['vs_first']['win_rate']:.2f} vs first, {ev['vs_mcts']['win_rate']:.2f} vs mcts")
        print(f"[{ts / 60:5.1f} min] v{version} games {run.status.games} steps {run.learner.learner.step} "
              f"loss {point['loss']} reuse {run.learner.learner.reuse_ratio:.2f}: {brief}", flush=True)

    holder: dict[str, LocalRun] = {}

    def keep(run: LocalRun) -> None:
        holder["run"] = run
        on_phase(run)

    status: LoopStatus = run_local_loop(config, out, stop=lambda st: train_seconds() >= minutes * 60,
                                        loop=LoopConfig(games_per_phase=64, max_steps_per_phase=400),
                                        on_phase=keep)
    trained_for = train_seconds()
    run = holder["run"]
    t0 = time.time()
    # the final snapshot was published by close(); evaluate it with the run's pieces
    final = final_eval(args.game, run, args.seed)
    # the curve starts at the untrained first snapshot (evaluated now: it is on disk unchanged)
    curve.insert(0, {"train_seconds": 0.0, "version": 1, "games": 0, "positions": 0, "learner_steps": 0,
                     "reuse_ratio": 0.0, "loss": None, "eval": quick_eval(args.game, run, 1, args.eval_games, args.seed)})
    results = {
        "game": args.game, "minutes_budget": minutes, "train_seconds": trained_for,
        "wall_seconds_with_evals": time.time() - t_start, "games": status.games, "positions": status.positions,
        "learner_steps": run.learner.learner.step, "samples_trained": run.learner.learner.samples_trained_total,
        "reuse_ratio": run.learner.learner.reuse_ratio, "snapshots": run.store.latest_version(),
        "settings": SETTINGS[args.game], "final": final, "curve": curve, "loss_curve": loss_curve,
        "cpu_count": os.cpu_count(), "final_eval_seconds": time.time() - t0,
    }
    (out / "results.json").write_text(json.dumps(results, indent=2))
    if args.plot:
        plot_curve(args.game, curve, loss_curve, Path(args.plot))
    print(json.dumps({k: v for k, v in results.items() if k not in ("curve", "settings", "loss_curve")}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
