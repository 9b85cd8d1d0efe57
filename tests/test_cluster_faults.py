"""Faults on a multi-node Ray cluster simulated on this machine (ray.cluster_utils.Cluster, every
node on 127.0.0.1): a worker killed mid-game, a worker node removed and another added, the
learner killed. After each, every game reported finished is in the catalog exactly once, buffer
and catalog agree, snapshot versions only increase, and the run goes on.

The head has no CPU of its own, so the buffer, learner and snapshot store (pinned to the head)
are the only actors there and every worker runs on a worker node."""

from __future__ import annotations

import os
import signal
import time

import pytest

from cluster import session
from cluster_support import check_run_consistent, metric_rows, tiny_config

pytestmark = [pytest.mark.ray, pytest.mark.slow]

TIME_LIMIT = 120.0  # seconds a scenario may take before it counts as stuck


@pytest.fixture(scope="module")
def cluster():
    session.local_only_environment()
    import ray
    from ray.cluster_utils import Cluster

    c = Cluster(initialize_head=True, connect=True,
                head_node_args={"num_cpus": 0, "node_ip_address": "127.0.0.1", "include_dashboard": False})
    try:
        yield c
    finally:
        ray.shutdown()
        c.shutdown()


@pytest.fixture
def worker_nodes(cluster):
    """Two 1-CPU worker nodes for one test; whatever nodes the test left are removed after it."""
    nodes = [cluster.add_node(num_cpus=1, node_ip_address="127.0.0.1") for _ in range(2)]
    cluster.wait_for_nodes()
    yield nodes
    for node in list(cluster.worker_nodes):
        cluster.remove_node(node)


def _launcher(tmp_path, **overrides):
    from cluster.driver import Driver
    from selfplay.rundir import RunDir

    lines: list[str] = []
    driver = Driver(tiny_config(**overrides), RunDir(tmp_path / "run"), say=lines.append, progress=False)
    driver.lines = lines
    return driver


def _finish(driver):
    stats = driver.finish()
    driver.kill_actors()
    return stats


def _games(launcher) -> int:
    return int(launcher.buffer_stats["games_total"])


def test_worker_killed_mid_game(cluster, worker_nodes, tmp_path):
    import ray

    from selfplay.commands.run import check_worker_count
    from cluster.placement import head_node_id
    from selfplay.errors import ConfigError

    # more workers than the cluster has CPUs: refused with the numbers
    with pytest.raises(ConfigError, match=r"--workers 3: the test cluster has 2 CPU\(s\)"):
        check_worker_count(tiny_config(run__workers=3), session.cluster_cpus(), "the test cluster")

    launcher = _launcher(tmp_path)
    launcher.start()
    state: dict = {}
    t0 = time.monotonic()
    # placement: buffer, learner, snapshot store on the head; one worker per CPU, spread over the nodes
    head = head_node_id()
    assert head == cluster.head_node.node_id
    assert ray.get(launcher.learner.where.remote())["node_id"] == head
    assert ray.get(launcher.buffer.handles[0].where.remote())["node_id"] == head
    assert ray.get(launcher.snapshots.info.remote())["node_id"] == head
    assert len(launcher.slots) == 2
    assert {ray.get(ws.handle.where.remote())["node_id"] for ws in launcher.slots.values()} == \
        {n.node_id for n in worker_nodes}

    def tick(la) -> bool:
        assert time.monotonic() - t0 < TIME_LIMIT, la.lines[-5:]
        ws = la.slots[0]
        if "killed_at" not in state and _games(la) >= 20:
            where = ray.get(ws.handle.where.remote())
            os.kill(where["pid"], signal.SIGKILL)  # the worker process dies with its games in flight
            state.update(killed_at=_games(la), old_tag=where["tag"])
        if "killed_at" in state:
            replaced = ws.last_tag and ws.last_tag != state["old_tag"]
            return bool(replaced) and _games(la) >= state["killed_at"] + 30
        return False

    try:
        launcher.loop(tick=tick)
    finally:
        stats = _finish(launcher)
    assert launcher.slots[0].restarts_seen >= 1
    assert any("was restarted by Ray" in line for line in launcher.lines)
    facts = check_run_consistent(tmp_path / "run", list(launcher.reported_game_ids), stats)
    assert facts["games"] >= state["killed_at"] + 30


def test_snapshot_that_does_not_fit_is_refused_and_the_run_goes_on(cluster, worker_nodes, tmp_path):
    import ray

    from selfplay.games.registry import make_game
    from selfplay.network import NetworkConfig, build_network
    from selfplay.snapshots import SnapshotStore

    launcher = _launcher(tmp_path, run__learner=False)
    launcher.start()
    try:
        launcher.loop(tick=lambda la: _games(la) >= 10)
        # a snapshot of another architecture (16 channels, the run's net has 8), as a user's trainer might publish
        wrong = build_network(make_game("mnk"), NetworkConfig(blocks=1, channels=16, value_hidden=8))
        bad = SnapshotStore(tmp_path / "run").publish(wrong)
        assert ray.get(launcher.snapshots.refresh.remote()) == 1
        refused = ray.get(launcher.snapshots.info.remote())["refused"]
        assert bad in refused and "does not fit this network" in refused[bad]
        games = _games(launcher)
        launcher.loop(tick=lambda la: _games(la) >= games + 10)
    finally:
        stats = _finish(launcher)
    facts = check_run_consistent(tmp_path / "run", list(launcher.reported_game_ids), stats)
    assert all(r["snapshot_version"] == 1 for r in metric_rows(tmp_path / "run", "worker"))
    assert facts["games"] >= games + 10


def test_worker_node_removed_and_another_added(cluster, worker_nodes, tmp_path):
    import ray

    launcher = _launcher(tmp_path)
    launcher.start()
    state: dict = {}
    t0 = time.monotonic()
    try:
        launcher.loop(tick=lambda la: _games(la) >= 20)
        victim_slot = next(s for s, ws in launcher.slots.items()
                           if ray.get(ws.handle.where.remote())["node_id"] == worker_nodes[1].node_id)
        cluster.remove_node(worker_nodes[1])
        state["removed_at"] = _games(launcher)
        # A 2-CPU node joins: the lost worker comes back on it and one more worker is started there.
        new_node = cluster.add_node(num_cpus=2, node_ip_address="127.0.0.1")

        def tick(la) -> bool:
            assert time.monotonic() - t0 < TIME_LIMIT, la.lines[-5:]
            return (len(la.slots) == 3 and la.slots[2].games_total > 0
                    and la.slots[victim_slot].restarts_seen >= 1
                    and _games(la) >= state["removed_at"] + 30)

        launcher.loop(tick=tick)
        assert ray.get(launcher.slots[victim_slot].handle.where.remote())["node_id"] == new_node.node_id
        assert ray.get(launcher.slots[2].handle.where.remote())["node_id"] == new_node.node_id
    finally:
        stats = _finish(launcher)
    check_run_consistent(tmp_path / "run", list(launcher.reported_game_ids), stats)


def test_learner_killed_restarts_from_its_checkpoint(cluster, worker_nodes, tmp_path):
    import ray

    launcher = _launcher(tmp_path)
    launcher.start()
    state: dict = {}
    t0 = time.monotonic()

    def tick(la) -> bool:
        assert time.monotonic() - t0 < TIME_LIMIT, la.lines[-5:]
        if "killed" not in state and la.snapshot_version >= 3:
            where = ray.get(la.learner.where.remote())
            state.update(killed=True, pid=where["pid"], version=la.snapshot_version,
                         step=la.learner_status.get("step", 0), games=_games(la))
            os.kill(where["pid"], signal.SIGKILL)
        if "killed" in state:
            st = la.learner_status
            return (st.get("resumed_from") == "checkpoint" and la.snapshot_version >= state["version"] + 2
                    and _games(la) >= state["games"] + 20)
        return False

    try:
        launcher.loop(tick=tick)
        now = ray.get(launcher.learner.where.remote())
        assert now["pid"] != state["pid"]
    finally:
        stats = _finish(launcher)
    assert launcher.learner_status["step"] >= state["step"]
    facts = check_run_consistent(tmp_path / "run", list(launcher.reported_game_ids), stats)
    assert facts["snapshots"] >= state["version"] + 2
    assert any("learner lost" in line for line in launcher.lines)
    # the closing summary's "newest snapshot" is the newest on disk, the learner's last one included
    from selfplay.snapshots import SnapshotStore
    assert launcher.snapshot_version == SnapshotStore(tmp_path / "run").latest_version()


def test_selfplay_run_joins_a_cluster_by_address(cluster, worker_nodes, tmp_path):
    import subprocess
    import sys

    from cluster_support import catalog_count
    from selfplay.config import dump_config

    cfg = tmp_path / "tiny.toml"
    cfg.write_text(dump_config(tiny_config()))
    env = {k: v for k, v in os.environ.items() if k != "RAY_ADDRESS"}
    proc = subprocess.run([sys.executable, "-m", "selfplay.cli", "run", "--config", str(cfg), "--out",
                           str(tmp_path / "run"), "--games", "40", "--address", cluster.address],
                          capture_output=True, text=True, timeout=300, env=env)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "2 worker(s)" in proc.stderr  # one per CPU of the cluster's two worker nodes
    assert "stopped: games reached" in proc.stderr
    assert catalog_count(tmp_path / "run") == 40  # the game budget: no game starts once 40 are finished or in flight
    check_run_consistent(tmp_path / "run")
    assert catalog_count(tmp_path / "run") >= 40


def test_buffer_totals_do_not_fall_when_a_shard_is_written(cluster, tmp_path):
    """The buffer's games_total (catalog + waiting) must not go down when waiting games move
    into a shard: the monitor would read the fall as a restart and count games twice."""
    import numpy as np
    import ray

    from cluster.actors import BufferActor
    from selfplay.games.registry import make_game
    from selfplay.replay import synthetic
    from selfplay.rundir import RunDir

    config = tiny_config(replay__shard_max_games=3, replay__shard_max_age_seconds=600.0)
    run = RunDir.create(tmp_path / "run")
    game = make_game(config.game.name, **config.game.options)
    rng = np.random.default_rng(5)
    records = [synthetic.random_record(game, rng, f"g{i}") for i in range(3)]
    buffer = BufferActor.remote(str(run.root), config.model_dump(mode="json"))
    try:
        assert ray.get(buffer.stats.remote())["games_durable"] == 0  # counts cached now
        ray.get(buffer.add_games.remote(records[:2]))
        first = ray.get(buffer.stats.remote())
        ray.get(buffer.add_games.remote(records[2:]))  # the third game fills a shard
        second = ray.get(buffer.stats.remote())  # well within the cache's second
    finally:
        ray.kill(buffer)
    assert first["games_durable"] + first["pending_games"] == 2
    assert second["pending_games"] == 0
    assert second["games_durable"] + second["pending_games"] == 3


def test_evaluation_rounds_run_beside_the_workers_on_ray(cluster, worker_nodes, tmp_path):
    """`[evaluation] enabled` adds the evaluation actor: rated rounds appear in the run's
    metrics while self-play goes on, and workers report their inference backend."""
    launcher = _launcher(tmp_path, **{"evaluation.enabled": True, "evaluation.every_versions": 1,
                                      "evaluation.games": 2, "evaluation.opponents": 1,
                                      "evaluation.simulations": 4})
    from selfplay.config import dump_config

    (tmp_path / "run" / "run.toml").write_text(dump_config(launcher.config))  # as `selfplay run` does
    launcher.start()
    t0 = time.monotonic()

    def tick(la) -> bool:
        assert time.monotonic() - t0 < TIME_LIMIT, la.lines[-5:]
        return la.last_eval is not None and la.last_eval.get("elo") is not None

    try:
        launcher.loop(tick=tick)
    finally:
        stats = _finish(launcher)
    check_run_consistent(tmp_path / "run", list(launcher.reported_game_ids), stats)
    evals = metric_rows(tmp_path / "run", "eval")
    assert evals and evals[-1]["snapshot_version"] >= 2
    assert any(line.startswith("evaluation: v") for line in launcher.lines)
    workers = metric_rows(tmp_path / "run", "worker")
    assert {w.get("inference_backend") for w in workers} <= {"torch", "openvino", "onnxruntime", None}
    assert any(w.get("inference_backend") for w in workers)
