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

go9: the settings of the ``go9-laptop`` preset (``--no-area-heads`` turns its ownership and
score heads off, for the on-versus-off comparison). The latest snapshot plays 100 games against
the first snapshot (64 simulations, random 2-ply openings, colours swapped) and at least 40
against GNU Go 3.8 (``--gnugo``, default ``gnugo --mode gtp --chinese-rules --positional-superko``
at ``--gnugo-level`` 0, komi 7; our side searches ``--gnugo-simulations`` 200) from random 2-ply
openings with colours alternating. Every game against GNU Go is scored twice: by our Tromp-Taylor
count and by GNU Go's own ``final_score`` in a fresh GNU Go (it removes dead stones). Goals: >= 90
of 100 against the first snapshot, >= 50% against GNU Go by its own score. ``--clock cpu``
budgets training in CPU seconds of this process (the fair measure when two runs share a machine).
``python scripts/learning_proof.py compare RUN_A RUN_B`` plays the two runs' latest snapshots.

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
EVAL_SIMULATIONS = {"tictactoe": 64, "fourinrow": 64, "go9": 64}
#: the GNU Go command of the Go proof (GNU Go 3.8 documentation: area scoring, positional superko)
GNUGO_COMMAND = "gnugo --mode gtp --chinese-rules --positional-superko"


def go9_settings(area_heads: bool = True) -> dict[str, Any]:
    """The ``go9-laptop`` preset's settings (what the proof proves), optionally without the
    ownership and score heads."""
    from selfplay.config import load_preset

    data = load_preset("go9-laptop").model_dump(mode="json")
    data.pop("run", None)
    data.pop("evaluation", None)
    if not area_heads:
        data["network"]["area_heads"] = False
        data["learner"]["ownership_loss_weight"] = 0.0
        data["learner"]["score_loss_weight"] = 0.0
    return data


def proof_config(name: str, minutes: float, seed: int, area_heads: bool = True) -> RunConfig:
    data = go9_settings(area_heads) if name == "go9" else json.loads(json.dumps(SETTINGS[name]))
    data["run"] = {"minutes": 0.0, "seed": seed}
    return config_from_dict(data, origin=f"learning proof {name!r}")


def snapshot_net(run: LocalRun, version: int):
    net = build_network(run.game, run.config.network)
    run.store.load_into(net, version)
    return net.eval()


def evaluator(net) -> NetworkEvaluator:
    """The fastest backend here for evaluation games (the worker's own choice, cached per machine)."""
    return NetworkEvaluator(net, backend="auto", batch_hint=64)


def gnugo_match(run: LocalRun, version: int, games: int, seed: int, command: str, level: int,
                simulations: int) -> dict[str, Any]:
    """Snapshot ``version`` (``simulations`` per move) against GNU Go at ``level`` from random
    2-ply openings, colours alternating; every game scored by Tromp-Taylor (ours) and by GNU Go's
    own final_score in a fresh GNU Go. Resigned games count as lost by the resigner in both."""
    from selfplay.gtp.client import GtpClient, GtpPlayer, engine_final_score
    from selfplay.gtp.vertex import vertex_text

    game = run.game
    full = f"{command} --komi {game.komi:g} --level {level}"
    net = snapshot_net(run, version)
    with GtpClient(full, timeout=120) as client:
        opponent = GtpPlayer(client, game, name=f"gnugo-level{level}")
        res = play_match(game, SearchPlayer(evaluator(net), simulations, f"v{version}+search{simulations}"),
                         opponent, games, seed=seed, opening_plies=2)
    wins_gnugo_score = 0
    per_game = []
    for o in res.outcomes:
        ours_black = o.player_first
        if o.ended_by == "resign":
            gnu_text = "resign"
            won = o.result == (1 if ours_black else -1)
        else:
            gnu_text = engine_final_score(full, game, o.actions, timeout=120)
            won = gnu_text.startswith("B+") if ours_black else gnu_text.startswith("W+")
        wins_gnugo_score += int(won)
        state = game.play_sequence(o.actions)
        per_game.append({"ours_black": ours_black, "moves": o.moves, "ended_by": o.ended_by,
                         "tromp_taylor": game.result_text(state), "gnugo_final_score": gnu_text,
                         "won_by_gnugo_score": won, "won_by_tromp_taylor": (o.result == 1) == ours_black
                         if o.result else False,
                         "moves_gtp": " ".join(vertex_text(a, game.size) for a in o.actions)})
    return {"opponent": f"gnugo level {level}", "command": full, "level": level, "version": version,
            "simulations": simulations, "games": res.games, "wins_by_gnugo_score": wins_gnugo_score,
            "win_rate_by_gnugo_score": wins_gnugo_score / res.games, "tromp_taylor": res.to_dict(),
            "mean_moves": float(np.mean([o.moves for o in res.outcomes])), "per_game": per_game}


def quick_eval(name: str, run: LocalRun, version: int, games: int, seed: int,
               gnugo: dict[str, Any] | None = None) -> dict[str, Any]:
    """The evaluation of the learning curve (fewer games than the final one)."""
    net = snapshot_net(run, version)
    sims = EVAL_SIMULATIONS[name]
    if name == "go9":
        first = snapshot_net(run, 1)
        vs_first = play_match(run.game, SearchPlayer(evaluator(net), sims, f"v{version}"),
                              SearchPlayer(evaluator(first), sims, "v1"), games, seed=seed, opening_plies=2)
        out = {"opponent": "first+gnugo", "vs_first": vs_first.to_dict()}
        if gnugo and gnugo["quick_games"]:
            out["vs_gnugo"] = gnugo_match(run, version, gnugo["quick_games"], seed, gnugo["command"],
                                          gnugo["level"], gnugo["simulations"])
            out["vs_gnugo"].pop("per_game")
        return out
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


def final_eval(name: str, run: LocalRun, seed: int, gnugo: dict[str, Any] | None = None) -> dict[str, Any]:
    latest = run.store.latest_version()
    sims = EVAL_SIMULATIONS[name]
    out: dict[str, Any] = {"latest_version": latest, "simulations": sims}
    t0 = time.perf_counter()
    if name == "go9":
        net, first = snapshot_net(run, latest), snapshot_net(run, 1)
        out["vs_first"] = play_match(run.game, SearchPlayer(evaluator(net), sims, f"v{latest}"),
                                     SearchPlayer(evaluator(first), sims, "v1"), 100, seed=seed + 1,
                                     opening_plies=2).to_dict()
        if gnugo:
            out["vs_gnugo"] = gnugo_match(run, latest, gnugo["final_games"], seed + 1, gnugo["command"],
                                          gnugo["level"], gnugo["simulations"])
    elif name == "tictactoe":
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


def plot_curve(name: str, curve: list[dict[str, Any]], losses: list[dict[str, Any]], path: Path,
               cpu_clock: bool = False) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4))
    if losses:
        t = np.array([r["train_seconds"] for r in losses]) / 60
        for key, label in (("loss", "total"), ("loss_policy", "policy"), ("loss_value", "value"),
                           ("loss_ownership", "ownership"), ("loss_score", "score")):
            if key in losses[0]:
                ax1.plot(t, [r[key] for r in losses], label=label)
    ax1.set_xlabel(f"training time (min{', CPU' if cpu_clock else ''})")
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
    elif name == "go9":
        ax2.plot(t, [c["eval"]["vs_first"]["score"] for c in curve], marker="o", label="score vs first snapshot")
        g = [(c["train_seconds"] / 60, c["eval"]["vs_gnugo"]["win_rate_by_gnugo_score"]) for c in curve
             if "vs_gnugo" in c["eval"]]
        if g:
            ax2.plot(*zip(*g), marker="s", label="won vs GNU Go (its own score)")
        ax2.set_ylabel("share of games")
    else:
        ax2.plot(t, [c["eval"]["vs_first"]["win_rate"] for c in curve], marker="o", label="won vs first snapshot")
        ax2.plot(t, [c["eval"]["vs_mcts"]["win_rate"] for c in curve], marker="s", label="won vs pure MCTS")
        ax2.set_ylabel("share of games won")
    ax2.set_ylim(-0.02, 1.02)
    ax2.set_xlabel(f"training time (min{', CPU' if cpu_clock else ''})")
    ax2.set_title(f"{name}: strength of the newest snapshot")
    ax2.legend()
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=100)
    plt.close(fig)


def compare(argv: list[str]) -> int:
    """``compare RUN_A RUN_B``: the latest (or chosen) snapshots of two proof runs of the same game play each
    other (random 2-ply openings, colours swapped); the result is printed and saved in RUN_A."""
    ap = argparse.ArgumentParser(prog="learning_proof.py compare", description=compare.__doc__)
    ap.add_argument("run_a")
    ap.add_argument("run_b")
    ap.add_argument("--version-a", type=int, default=None, help="RUN_A's snapshot (default its latest)")
    ap.add_argument("--version-b", type=int, default=None, help="RUN_B's snapshot (default its latest)")
    ap.add_argument("--games", type=int, default=40)
    ap.add_argument("--simulations", type=int, default=64)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args(argv)
    from selfplay.strength import RunPlayers

    nets, names = [], []
    for root, asked in ((args.run_a, args.version_a), (args.run_b, args.version_b)):
        players = RunPlayers(root)
        game = players.game
        version = asked or players.store.latest_version()
        net = build_network(game, players.config.network)
        players.store.load_into(net, version)
        nets.append(net.eval())
        names.append(f"{Path(root).name}:v{version}")
    res = play_match(game, SearchPlayer(evaluator(nets[0]), args.simulations, names[0]),
                     SearchPlayer(evaluator(nets[1]), args.simulations, names[1]), args.games, seed=args.seed,
                     opening_plies=2)
    out = {"player": names[0], "opponent": names[1], "simulations": args.simulations, **res.to_dict()}
    (Path(args.run_a) / f"compare-{Path(args.run_b).name}.json").write_text(json.dumps(out, indent=2))
    print(json.dumps(out, indent=2))
    return 0


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["compare"]:
        return compare(argv[1:])
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("game", choices=sorted([*SETTINGS, "go9"]))
    ap.add_argument("--minutes", type=float, default=None, help="training time (default 10 / 30 / 120)")
    ap.add_argument("--out", required=True, help="run directory (must not exist yet)")
    ap.add_argument("--eval-seconds", type=float, default=60.0, help="seconds of training between quick evaluations")
    ap.add_argument("--eval-games", type=int, default=40, help="games of each quick evaluation")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--plot", default=None, help="PNG path of the learning curve")
    ap.add_argument("--clock", choices=("wall", "cpu"), default="wall",
                    help="budget training in wall seconds, or in CPU seconds of this process (default wall)")
    ap.add_argument("--no-area-heads", action="store_true", help="go9: without the ownership and score heads")
    ap.add_argument("--gnugo", default=GNUGO_COMMAND, help="go9: the GNU Go command (komi and level are added)")
    ap.add_argument("--gnugo-level", type=int, default=0, help="go9: GNU Go's level (default 0)")
    ap.add_argument("--gnugo-simulations", type=int, default=200, help="go9: our simulations per move against GNU Go")
    ap.add_argument("--gnugo-games", type=int, default=40, help="go9: games against GNU Go at the end (even)")
    ap.add_argument("--gnugo-quick-games", type=int, default=10,
                    help="go9: games against GNU Go in each quick evaluation (0: none)")
    args = ap.parse_args(argv)
    minutes = args.minutes if args.minutes is not None else {"tictactoe": 10.0, "go9": 120.0}.get(args.game, 30.0)
    out = Path(args.out)
    if out.exists():
        print(f"learning_proof: {out} already exists; give a new directory", file=sys.stderr)
        return 2
    gnugo = None
    if args.game == "go9":
        import shlex
        import shutil

        exe = shlex.split(args.gnugo)[0]
        if shutil.which(exe) is None and shutil.which("/usr/games/" + exe) is None:
            print(f"learning_proof: GNU Go {exe!r} not found (apt-get install gnugo); the Go proof needs it",
                  file=sys.stderr)
            return 2
        command = args.gnugo if shutil.which(exe) else "/usr/games/" + args.gnugo
        gnugo = {"command": command, "level": args.gnugo_level, "simulations": args.gnugo_simulations,
                 "final_games": args.gnugo_games, "quick_games": args.gnugo_quick_games}
    config = proof_config(args.game, minutes, args.seed, area_heads=not args.no_area_heads)
    settings = go9_settings(not args.no_area_heads) if args.game == "go9" else SETTINGS[args.game]
    eval_spent = [0.0]
    last_eval = [0.0]
    curve: list[dict[str, Any]] = []
    clock = time.process_time if args.clock == "cpu" else time.time
    t_start = clock()
    wall_start = time.time()

    def train_seconds() -> float:
        return clock() - t_start - eval_spent[0]

    loss_curve: list[dict[str, Any]] = []
    seen_steps = [0]

    def on_phase(run: LocalRun) -> None:
        ts = train_seconds()
        new = [h for h in run.learner.learner.history if h["step"] > seen_steps[0]]
        if new:
            seen_steps[0] = int(new[-1]["step"])
            loss_curve.append({"train_seconds": ts, "step": seen_steps[0],
                               **{k: float(np.mean([h[k] for h in new])) for k in
                                  ("loss", "loss_policy", "loss_value", "loss_ownership", "loss_score")
                                  if k in new[-1]}})
        if ts - last_eval[0] < args.eval_seconds:
            return
        last_eval[0] = ts
        t0 = clock()
        version = run.store.latest_version()
        ev = quick_eval(args.game, run, version, args.eval_games, args.seed, gnugo)
        last = run.learner.learner.history[-1] if run.learner.learner.history else {}
        point = {"train_seconds": ts, "version": version, "games": run.status.games,
                 "positions": run.status.positions, "learner_steps": run.learner.learner.step,
                 "reuse_ratio": run.learner.learner.reuse_ratio, "loss": last.get("loss"), "eval": ev}
        curve.append(point)
        (out / "curve.json").write_text(json.dumps({"curve": curve, "loss_curve": loss_curve}, indent=2))
        logged = ev["search"] if args.game == "tictactoe" else ev["vs_first" if args.game == "go9" else "vs_mcts"]
        MetricsLog(run.run.metrics, "eval", "learning-proof").write(
            opponent=ev["opponent"], version=version, train_seconds=ts,
            **{k: logged[k] for k in ("games", "wins", "draws", "losses", "elo")})
        eval_spent[0] += clock() - t0
        if args.game == "tictactoe":
            brief = (f"lost {ev['search']['losses']}/{ev['search']['games']} (search), "
                     f"{ev['policy']['losses']}/{ev['policy']['games']} (policy)")
        elif args.game == "go9":
            brief = f"score {ev['vs_first']['score']:.2f} vs first" + (
                f", won {ev['vs_gnugo']['wins_by_gnugo_score']}/{ev['vs_gnugo']['games']} vs GNU Go "
                f"(its score; {ev['vs_gnugo']['tromp_taylor']['wins']} by Tromp-Taylor)" if "vs_gnugo" in ev else "")
        else:
            brief = f"won {ev['vs_first']['win_rate']:.2f} vs first, {ev['vs_mcts']['win_rate']:.2f} vs mcts"
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
    print(f"training done ({trained_for / 60:.1f} min, {args.clock} clock); final evaluation", flush=True)
    final = final_eval(args.game, run, args.seed, gnugo)
    # the curve starts at the untrained first snapshot (evaluated now: it is on disk unchanged)
    curve.insert(0, {"train_seconds": 0.0, "version": 1, "games": 0, "positions": 0, "learner_steps": 0,
                     "reuse_ratio": 0.0, "loss": None, "eval": quick_eval(args.game, run, 1, args.eval_games, args.seed, gnugo)})
    results = {
        "game": args.game, "minutes_budget": minutes, "train_seconds": trained_for,
        "clock": args.clock, "wall_seconds_with_evals": time.time() - wall_start, "games": status.games, "positions": status.positions,
        "learner_steps": run.learner.learner.step, "samples_trained": run.learner.learner.samples_trained_total,
        "reuse_ratio": run.learner.learner.reuse_ratio, "snapshots": run.store.latest_version(),
        "settings": settings, "final": final, "curve": curve, "loss_curve": loss_curve,
        "cpu_count": os.cpu_count(), "final_eval_seconds": time.time() - t0,
    }
    (out / "results.json").write_text(json.dumps(results, indent=2))
    if args.plot:
        plot_curve(args.game, curve, loss_curve, Path(args.plot), cpu_clock=args.clock == "cpu")
    print(json.dumps({k: v for k, v in results.items() if k not in ("curve", "settings", "loss_curve")}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
