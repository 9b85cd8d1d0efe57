"""The in-process run (the roles that `selfplay run` uses, composed in one process), the
evaluation tools, and the proof that the run learns.

The slow test trains tic-tac-toe from scratch and checks, against a perfect minimax player,
that the trained snapshot loses far fewer games than the untrained one. It can fail: a learner
that does not learn, a sign error in the value target or a worker that never picks up a new
snapshot each leave the newest snapshot as weak as the first."""

from __future__ import annotations

import json
import math

import pytest
import torch

from selfplay.config import config_from_dict
from selfplay.errors import ConfigError, RunDirError
from selfplay.evaluation import (MinimaxPlayer, MinimaxSolver, PolicyPlayer, RandomPlayer, SearchPlayer,
                                 elo_difference, elo_expected_score, play_match)
from selfplay.evaluators import NetworkEvaluator
from selfplay.games.registry import make_game
from selfplay.loop import LoopConfig
from selfplay.loop import LocalRun, run_local_loop
from selfplay.metrics import read_metrics
from selfplay.network import build_network
from selfplay.replay.catalog import Catalog
from selfplay.snapshots import SnapshotStore


# ---- evaluation tools ----------------------------------------------------------------------

def test_elo_expected_score_formula():
    # Elo's rating system: E = 1 / (1 + 10^(-D/400)); 400 points -> 10:1 odds, E = 10/11
    assert elo_expected_score(0) == 0.5
    assert elo_expected_score(400) == pytest.approx(10 / 11)
    assert elo_expected_score(-400) == pytest.approx(1 / 11)
    for d in (-350.0, -12.5, 0.0, 99.0, 700.0):
        assert elo_difference(elo_expected_score(d)) == pytest.approx(d)
    assert elo_difference(1.0) == math.inf
    assert elo_difference(1.0, games=100) == pytest.approx(-400 * math.log10(1 / 0.995 - 1))
    with pytest.raises(ConfigError):
        elo_difference(1.5)


def test_minimax_solves_tictactoe():
    # well-known results, from memory: 5,478 legal positions reachable from the empty board, and
    # perfect play is a draw
    ttt = make_game("tictactoe")
    solver = MinimaxSolver(ttt, prune=False)
    assert solver.value(ttt.initial_state()) == 0.0
    assert len(solver.table) == 5478
    # a position of our own, worked by hand: X (a3, b3) to move against O (a1, b1). c3 wins at
    # once; c1 also wins (it blocks O and makes two threats, c3 and b2); every other move lets O
    # complete the bottom row at c1
    s = ttt.play_sequence(["a3", "a1", "b3", "b1"])
    assert solver.value(s) == 1.0
    assert sorted(solver.optimal_actions(s)) == sorted([ttt.text_to_action("c3"), ttt.text_to_action("c1")])


def test_minimax_never_loses_and_punishes_random_play():
    ttt = make_game("tictactoe")
    perfect = MinimaxPlayer(ttt)
    res = play_match(ttt, RandomPlayer(), perfect, 100, seed=3)
    assert res.wins == 0 and res.losses > 50  # a random player loses most games to perfect play
    assert res.losses_as_first + res.losses_as_second == res.losses
    assert play_match(ttt, perfect, MinimaxPlayer(ttt), 40, seed=4).draws == 40
    with pytest.raises(ConfigError, match="even"):
        play_match(ttt, perfect, perfect, 5)


# ---- the loop ------------------------------------------------------------------------------

def tiny_config(**run):
    return config_from_dict({
        "game": {"name": "mnk", "options": {"m": 3, "n": 3, "k": 3}},
        "network": {"blocks": 1, "channels": 16, "value_hidden": 16},
        "search": {"simulations": 16, "reduced_simulations": 8, "temperature_moves": 3},
        "worker": {"games_in_parallel": 16, "snapshot_poll_seconds": 0.01},
        "replay": {"window_positions": 20_000},
        "learner": {"batch_size": 32, "steps_per_snapshot": 10, "min_buffer_positions": 100,
                    "target_reuse_ratio": 2.0, "optimizer": "adam", "learning_rate": 0.002},
        "run": {"seed": 5, **run},
    })


def test_loop_runs_resumes_and_keeps_the_run_directory_consistent(tmp_path):
    run_dir = tmp_path / "run"
    first = run_local_loop(tiny_config(games=32), run_dir, loop=LoopConfig(games_per_phase=16))
    assert first.games == 32 and first.stopped_because == "games reached"  # the game budget holds exactly
    store = SnapshotStore(run_dir)
    v_first = store.latest_version()
    assert v_first >= 2  # the untrained version 1 and at least one trained snapshot
    steps_first = store.latest().training_steps
    assert (run_dir / "learner" / "checkpoint.json").exists()
    second = run_local_loop(tiny_config(games=64), run_dir, loop=LoopConfig(games_per_phase=16))
    assert second.games >= 64
    infos = list(store.iter_infos())
    assert [i.version for i in infos] == list(range(1, len(infos) + 1))  # versions only increase
    assert infos[-1].training_steps > steps_first  # the learner continued from its checkpoint
    cat = Catalog(run_dir / "catalog.sqlite", readonly=True)
    try:
        ids = cat.game_ids()
        assert len(ids) == len(set(ids)) == second.games  # every game once, none repeated on resume
    finally:
        cat.close()
    # trained positions never ran ahead of the target reuse ratio
    rows = [r for r in read_metrics(run_dir / "metrics.jsonl") if r["component"] == "learner"]
    assert rows and max(r["reuse_ratio"] for r in rows) <= 2.0 + 1e-9
    assert {r["component"] for r in read_metrics(run_dir / "metrics.jsonl")} >= {
        "learner", "snapshots", "worker", "buffer", "snapshot_server", "run"}


def test_loop_refuses_a_run_directory_of_another_config(tmp_path):
    run_dir = tmp_path / "run"
    run_local_loop(tiny_config(games=16), run_dir, loop=LoopConfig(games_per_phase=16))
    other = tiny_config(games=16).model_copy(update={"game": make_game_config("mnk", m=4, n=4, k=3)})
    with pytest.raises(RunDirError, match="another configuration.*game"):
        LocalRun(other, run_dir)


def make_game_config(name, **options):
    from selfplay.config import GameConfig

    return GameConfig(name=name, options=options)


def test_worker_picks_up_a_users_snapshot_and_refuses_a_foreign_one(tmp_path):
    run = LocalRun(tiny_config(), tmp_path / "run")
    try:
        worker = run.workers[0]
        assert worker.version == 1
        game = run.game
        mine = build_network(game, run.config.network, seed=99)  # a user's own trainer
        v = run.store.publish(mine, parent_version=1)
        assert run.snapshots.refresh() == v and worker.pickup() and worker.version == 1  # compiling
        assert worker.swap(wait=True) and worker.version == v
        assert all(torch.equal(a, b) for a, b in zip(worker.net.state_dict().values(), mine.state_dict().values()))
        run.generate(16)  # positions now record the new version
        assert run.buffer.newest_snapshot == v
        before = {k: t.clone() for k, t in worker.net.state_dict().items()}
        foreign = build_network(make_game("mnk", m=4, n=4, k=3), run.config.network)
        bad = run.store.publish(foreign)
        assert run.snapshots.refresh() == v and not worker.pickup()
        assert "m': 4" in run.snapshots.info()["refused"][bad]  # refused for another board
        assert all(torch.equal(before[k], t) for k, t in worker.net.state_dict().items())
        run.generate(16)  # the worker plays on with its previous weights
    finally:
        run.close()


def test_a_ratio_its_stop_condition_can_never_meet_is_noted_and_the_data_still_made(tmp_path):
    notes = []
    cfg = tiny_config(positions=50)  # fewer positions than learner.min_buffer_positions=100
    run = LocalRun(cfg, tmp_path / "run", say=notes.append)
    try:
        assert run.run_until() == "positions reached"
    finally:
        run.close()
    assert any("min_buffer_positions" in n for n in notes)
    # before the first game the length of a game is unknown: at most one game per slot (G=16) starts
    assert 50 <= run.status.positions <= 50 + 16 * run.game.max_moves


def test_a_second_run_into_a_live_directory_is_refused_and_a_stale_lock_taken_over(tmp_path):
    import os
    import socket
    import subprocess
    import sys

    from selfplay.roles.runlock import RunLock

    run = LocalRun(tiny_config(), tmp_path / "run")
    try:
        with pytest.raises(RunDirError, match=f"in use by pid {os.getpid()} on host {socket.gethostname()}"):
            LocalRun(tiny_config(), tmp_path / "run")
    finally:
        run.close()
    # a lock left by a process that died (same host): taken over with a notice
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(dead.stdout)
    (tmp_path / "run" / "run.lock").write_text(json.dumps({"pid": pid, "host": socket.gethostname()}))
    notes = []
    lock = RunLock.acquire(tmp_path / "run", say=notes.append)
    try:
        assert lock.session == 1  # each opening is a session: game ids never repeat
        assert notes and f"pid {pid}" in notes[0] and "no longer running" in notes[0]
    finally:
        lock.release()
    # a lock of another host cannot be judged from here: refused, naming the file to delete
    (tmp_path / "run" / "run.lock").write_text(json.dumps({"pid": 1, "host": "elsewhere"}))
    with pytest.raises(RunDirError, match="host elsewhere.*delete"):
        RunLock.acquire(tmp_path / "run")


# ---- the proof (short version of scripts/learning_proof.py) --------------------------------

@pytest.mark.slow
def test_tictactoe_from_scratch_stops_losing_to_perfect_play(tmp_path):
    cfg = config_from_dict({
        "game": {"name": "mnk", "options": {"m": 3, "n": 3, "k": 3}},
        "network": {"blocks": 2, "channels": 32, "value_hidden": 32},
        "search": {"simulations": 48, "reduced_simulations": 16, "temperature_moves": 3},
        "worker": {"games_in_parallel": 64, "inference": "torch"},  # the same games on every machine
        "replay": {"window_positions": 40_000},
        "learner": {"batch_size": 128, "optimizer": "adam", "learning_rate": 0.002,
                    "steps_per_snapshot": 100, "min_buffer_positions": 1000, "target_reuse_ratio": 6.0},
        "run": {"seed": 11},
    })
    run_dir = tmp_path / "run"
    status = run_local_loop(cfg, run_dir, stop=lambda st: st.learner_steps >= 1000,
                            loop=LoopConfig(games_per_phase=64, max_steps_per_phase=200))
    assert status.learner_steps >= 500
    game = make_game("tictactoe")
    store = SnapshotStore(run_dir)
    results = {}
    for label, version in (("untrained", 1), ("trained", store.latest_version())):
        net = build_network(game, cfg.network)
        store.load_into(net, version)
        search = play_match(game, SearchPlayer(NetworkEvaluator(net), 48, label), MinimaxPlayer(game), 100, seed=2)
        raw = play_match(game, PolicyPlayer(net, label), MinimaxPlayer(game), 100, seed=2)
        results[label] = (search.losses, raw.losses)
    print(json.dumps(results))
    (u_search, u_raw), (t_search, t_raw) = results["untrained"], results["trained"]
    assert u_search >= 20 and u_raw >= 30  # the untrained snapshot loses many games to perfect play
    assert t_search <= 5 and t_search * 4 <= u_search
    assert t_raw <= 15 and t_raw * 3 <= u_raw


@pytest.mark.parametrize("mode", ["between_moves", "between_games"])
def test_snapshot_pickup_modes(tmp_path, mode):
    cfg = tiny_config()
    cfg = cfg.model_copy(update={"worker": cfg.worker.model_copy(update={"snapshot_pickup": mode})})
    run = LocalRun(cfg, tmp_path / "run")
    try:
        worker = run.workers[0]
        v = run.store.publish(build_network(run.game, cfg.network, seed=3), parent_version=1)
        run.snapshots.refresh()
        run.generate(1)  # a step that finishes a game is a pickup point in both modes
        assert worker.version == v
    finally:
        run.close()


def test_a_diverged_learner_stops_the_loop_and_keeps_the_run_consistent(tmp_path):
    from selfplay.learner import TrainingDivergedError

    run_dir = tmp_path / "run"
    seen = {}

    def poison(run):
        if run.learner.learner.step > 0 and "version" not in seen:
            seen["version"] = run.store.latest_version()
            seen["games"] = run.status.games
            with torch.no_grad():
                run.learner.net.policy_fc.weight.fill_(float("inf"))  # a diverged update

    with pytest.raises(TrainingDivergedError, match="newest good snapshot is version"):
        run_local_loop(tiny_config(games=200), run_dir, loop=LoopConfig(games_per_phase=16), on_phase=poison)
    store = SnapshotStore(run_dir)
    assert store.latest_version() == seen["version"]  # nothing published after the divergence
    net = build_network(make_game("tictactoe"), tiny_config().network)
    store.load_into(net)  # the newest snapshot is a good one
    assert all(torch.isfinite(t).all() for t in net.state_dict().values())
    cat = Catalog(run_dir / "catalog.sqlite", readonly=True)
    try:
        assert len(cat.game_ids()) >= seen["games"]  # finished games were flushed, not lost
    finally:
        cat.close()


def test_reopening_a_run_whose_newest_snapshot_is_corrupt_falls_back_to_the_previous(tmp_path):
    run_dir = tmp_path / "run"
    run_local_loop(tiny_config(games=32), run_dir, loop=LoopConfig(games_per_phase=16))
    store = SnapshotStore(run_dir)
    newest = store.latest_version()
    assert newest >= 2
    weights = run_dir / "snapshots" / f"{newest:06d}.safetensors"
    data = bytearray(weights.read_bytes())
    data[len(data) // 2] ^= 0xFF
    weights.write_bytes(bytes(data))
    run = LocalRun(tiny_config(), run_dir)
    try:
        assert run.snapshots.version == newest - 1 and run.workers[0].version == newest - 1
        assert "checksum" in run.snapshots.info()["refused"][newest]
        run.generate(4)  # and it plays
    finally:
        run.close()


def test_in_process_run_evaluates_every_k_snapshots_and_rates_them(tmp_path):
    """Evaluation during a run: the in-process loop plays a bounded rated round when a snapshot
    is due, and the ladder (Bradley-Terry Elo, snapshot 1 at 0) reads the stored games."""
    from selfplay.config import with_overrides
    from selfplay.metrics import read_metrics
    from selfplay.metrics_schema import line_problems

    cfg = with_overrides(tiny_config(games=96), {"evaluation.enabled": True, "evaluation.every_versions": 1,
                                                 "evaluation.games": 4, "evaluation.opponents": 1,
                                                 "evaluation.simulations": 8})
    run_dir = tmp_path / "run"
    status = run_local_loop(cfg, run_dir, loop=LoopConfig(games_per_phase=16))
    assert status.games == 96
    evals = [r for r in read_metrics(run_dir / "metrics.jsonl") if r["component"] == "eval"]
    assert evals, "no evaluation round was played"
    assert all(not line_problems(r) for r in evals)
    rated = [r for r in evals if r.get("elo") is not None]
    assert rated and all(r["snapshot_version"] >= 2 and r["games"] >= 4 for r in rated)
    from selfplay.cli import main

    assert main(["ladder", str(run_dir), "--json"]) == 0


def test_with_gating_workers_only_play_versions_gating_accepted(tmp_path):
    """AlphaGo Zero's evaluator (Silver et al. 2017, Methods): a new snapshot is used for
    self-play only once it scored at least the threshold against the current one. Every version
    a worker played must be 1 or a version a gating match passed."""
    from selfplay.config import with_overrides
    from selfplay.metrics import read_metrics
    from selfplay.snapshots import SnapshotStore

    cfg = with_overrides(tiny_config(games=128), {"evaluation.gate_threshold": 0.5, "evaluation.gate_games": 2,
                                                  "evaluation.simulations": 4})
    run_dir = tmp_path / "run"
    run_local_loop(cfg, run_dir, loop=LoopConfig(games_per_phase=16))
    rows = list(read_metrics(run_dir / "metrics.jsonl"))
    gates = [r for r in rows if r["component"] == "gate"]
    assert gates, "no gating match was played"
    accepted = {1} | {r["candidate"] for r in gates if r["passed"]}
    played = {r["snapshot_version"] for r in rows if r["component"] == "worker"}
    assert played <= accepted
    assert all(r["passed"] == (r["score"] >= r["threshold"]) for r in gates)
    assert SnapshotStore(run_dir).latest_version() >= max(accepted)


def test_a_seeded_in_process_run_does_not_depend_on_the_clock(tmp_path):
    """Same seed, generation slices of 0.01 s against 10 s: the same games in the same order and
    bit-identical trained snapshots (a phase ends at the step that finishes its last game, not
    at a slice's end; tests/test_loop_learns' learning checks rely on this)."""
    import hashlib

    from selfplay.config import with_overrides

    def run(name: str, slice_seconds: float) -> tuple[list[str], list[str]]:
        cfg = with_overrides(tiny_config(games=80), {"worker.report_seconds": slice_seconds})
        run_dir = tmp_path / name
        run_local_loop(cfg, run_dir, loop=LoopConfig(games_per_phase=20))
        cat = Catalog(run_dir / "catalog.sqlite", readonly=True)
        try:
            ids = cat.game_ids()
        finally:
            cat.close()
        store = SnapshotStore(run_dir)
        # the tensors' bytes (safetensors writes its metadata keys in no fixed order)
        weights = [hashlib.sha256(b"".join(t.numpy().tobytes() for _, t in sorted(store.load(v)[0].items()))).hexdigest()
                   for v in store.versions()]
        return ids, weights

    fast_ids, fast_weights = run("short-slices", 0.01)
    slow_ids, slow_weights = run("long-slices", 10.0)
    assert fast_ids == slow_ids and len(fast_ids) == 80
    assert len(fast_weights) >= 3 and fast_weights == slow_weights
