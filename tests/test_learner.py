"""Learner: the AlphaZero loss and the policy-gradient objective against their published
formulas, learning-rate schedules, the reuse ratio, checkpoint/resume with optimiser state,
supervised bootstrap, and bad input (zero learning rate, NaN loss, unreachable ratio)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import torch

from selfplay.errors import ConfigError
from selfplay.evaluation import MinimaxSolver
from selfplay.games.registry import make_game
from selfplay.learner import (CheckpointError, Learner, ReuseRatioError, TrainingDivergedError,
                              compute_loss, learning_rate_at)
from selfplay.learner_config import LearnerConfig
from selfplay.metrics import read_metrics
from selfplay.network import NetworkConfig, build_network
from selfplay.records import GameRecordBuilder
from selfplay.replay.buffer import ReplayBuffer
from selfplay.snapshots import SnapshotStore


@pytest.fixture()
def ttt():
    return make_game("tictactoe")


def _batch(ttt, rng, n=6):
    """A random batch in the replay buffer's sample format (tic-tac-toe positions)."""
    states = []
    for _ in range(n):
        s = ttt.initial_state()
        for _ in range(int(rng.integers(0, 5))):
            legal = ttt.legal_actions(s)
            s = ttt.play(s, int(legal[rng.integers(legal.size)]))
        states.append(s)
    planes = np.stack([ttt.encode(s) for s in states])
    mask = np.stack([ttt.legal_mask(s) for s in states])
    policy = rng.random((n, 9)).astype(np.float32) * mask
    policy /= policy.sum(1, keepdims=True)
    return {
        "planes": planes.astype(np.float32), "policy": policy.astype(np.float32),
        "value": rng.choice([-1.0, 0.0, 1.0], size=n).astype(np.float32), "mask": mask,
        "full_search": np.array([True, False] * (n // 2)), "snapshot": np.zeros(n, np.int32),
        "action": np.array([int(np.flatnonzero(m)[0]) for m in mask]),
    }


def test_alphazero_loss_matches_the_published_formula(ttt):
    # l = (z - v)^2 - pi^T log p + c ||theta||^2 (Silver et al. 2017, Methods, Eq. 1), the policy
    # term averaged over full-search positions only (playout cap randomisation, Wu 2019)
    rng = np.random.default_rng(0)
    net = build_network(ttt, NetworkConfig.tiny(), seed=0)
    batch = _batch(ttt, rng)
    cfg = LearnerConfig(weight_decay=1e-3)
    net.eval()
    total, parts = compute_loss(net, batch, cfg)
    with torch.no_grad():
        logits, v = net(torch.from_numpy(batch["planes"]))
    logits = logits.numpy().astype(np.float64)
    v = v.numpy().astype(np.float64)
    ce = []
    for i in range(len(v)):
        legal = batch["mask"][i]
        lg = logits[i][legal]
        logp = lg - np.log(np.exp(lg - lg.max()).sum()) - lg.max()
        ce.append(-(batch["policy"][i][legal] * logp).sum())
    full = batch["full_search"]
    want_policy = np.mean(np.array(ce)[full])
    want_value = np.mean((batch["value"] - v) ** 2)
    want_l2 = 1e-3 * sum(float((p.detach().double() ** 2).sum()) for p in net.parameters())
    assert float(parts["loss_policy"].detach()) == pytest.approx(want_policy, rel=1e-5)
    assert float(parts["loss_value"].detach()) == pytest.approx(want_value, rel=1e-5)
    assert float(parts["loss_l2"].detach()) == pytest.approx(want_l2, rel=1e-5)
    assert float(total.detach()) == pytest.approx(want_policy + want_value + want_l2, rel=1e-5)


def test_policy_gradient_loss_is_reinforce_with_the_outcome(ttt):
    # REINFORCE (Williams 1992) as in AlphaGo's RL stage (Silver et al. 2016): -z log p(a|s)
    rng = np.random.default_rng(1)
    net = build_network(ttt, NetworkConfig.tiny(), seed=0).eval()
    batch = _batch(ttt, rng)
    cfg = LearnerConfig(objective="policy_gradient", weight_decay=0.0)
    _, parts = compute_loss(net, batch, cfg)
    with torch.no_grad():
        logits, v = net(torch.from_numpy(batch["planes"]))
    logits = logits.masked_fill(~torch.from_numpy(batch["mask"]), float("-inf"))
    logp = torch.log_softmax(logits, 1).gather(1, torch.from_numpy(batch["action"])[:, None])[:, 0]
    want = -(torch.from_numpy(batch["value"]) * logp).mean()
    assert float(parts["loss_policy"].detach()) == pytest.approx(float(want), rel=1e-5)
    cfg_b = LearnerConfig(objective="policy_gradient", weight_decay=0.0, pg_baseline=True)
    _, parts_b = compute_loss(net, batch, cfg_b)
    want_b = -((torch.from_numpy(batch["value"]) - v) * logp).mean()
    assert float(parts_b["loss_policy"].detach()) == pytest.approx(float(want_b), rel=1e-5)
    no_action = {k: v for k, v in batch.items() if k != "action"}
    with pytest.raises(ConfigError, match="action"):
        compute_loss(net, no_action, cfg)


def test_learning_rate_schedules():
    const = LearnerConfig(learning_rate=0.1)
    assert learning_rate_at(const, 0) == learning_rate_at(const, 10**6) == 0.1
    step = LearnerConfig(learning_rate=0.1, lr_schedule="step", lr_step_every=100, lr_step_gamma=0.5)
    assert [learning_rate_at(step, s) for s in (0, 99, 100, 250)] == pytest.approx([0.1, 0.1, 0.05, 0.025])
    # cosine annealing (Loshchilov & Hutter 2017): halfway is the mean of start and floor
    cos = LearnerConfig(learning_rate=0.1, lr_schedule="cosine", lr_cosine_steps=1000, lr_min=0.01)
    assert learning_rate_at(cos, 0) == pytest.approx(0.1)
    assert learning_rate_at(cos, 500) == pytest.approx(0.055)
    assert learning_rate_at(cos, 1000) == learning_rate_at(cos, 5000) == pytest.approx(0.01)


@pytest.mark.parametrize("field,value,words", [
    ("learning_rate", 0.0, "learning_rate=0.0: Input should be greater than 0"),
    ("learning_rate", -1.0, "learning_rate"),
    ("batch_size", 0, "batch_size"),
    ("target_reuse_ratio", 0.0, "target_reuse_ratio"),
    ("optimizer", "rmsprop", "optimizer"),
    ("momentum", 1.0, "momentum"),
    ("no_such_field", 1, "no_such_field"),
])
def test_bad_learner_config_is_refused_with_the_field(field, value, words):
    with pytest.raises(ConfigError, match=words.replace("(", r"\(")):
        LearnerConfig(**{field: value})


# ---- with the real replay buffer -----------------------------------------------------------


def random_records(game, n_games, seed, *, expert=None):
    """Finished games of uniformly random play (policy target: uniform over the legal moves),
    or, with ``expert`` (a MinimaxSolver), supervised games whose every move is minimax-optimal
    with a one-hot target on it."""
    rng = np.random.default_rng(seed)
    out = []
    for g in range(n_games):
        b = GameRecordBuilder(f"test-{seed}-{g}", game.name, game.options(), "test", seed, {}, 0.0)
        s = game.initial_state()
        while not game.is_terminal(s):
            legal = game.legal_actions(s)
            if expert is not None:
                best = expert.optimal_actions(s)
                a = best[int(rng.integers(len(best)))]
                pa, pw = np.array([a]), np.array([1.0])
            else:
                a = int(legal[rng.integers(legal.size)])
                pa, pw = legal, np.ones(legal.size)
            b.add_position(game.compact(s), game.to_play(s), a, game.legal_mask(s), pa, pw, 0.0,
                           bool(len(out) % 2 == 0 or expert is not None), 1)
            s = game.play(s, a)
        out.append(b.finish(int(game.outcome(s)), 0.0))
    return out


def make_learner(tmp_path, game, records, **cfg):
    buf = ReplayBuffer(game, 50_000, augment=True, seed=0)
    for r in records:
        buf.add(r)
    net = build_network(game, NetworkConfig.tiny(), seed=0)
    store = SnapshotStore(tmp_path, create=True)
    config = LearnerConfig(**{"batch_size": 32, "min_buffer_positions": 10, **cfg})
    return Learner(game, net, config, buf, store), buf, store


def test_sampled_action_follows_the_board_symmetry(ttt):
    recs = random_records(ttt, 20, seed=3)
    buf = ReplayBuffer(ttt, 10_000, augment=True, seed=1)
    for r in recs:
        buf.add(r)
    batch = buf.sample(512)
    # the move played was legal, so after the same symmetry it is legal in the transformed mask
    assert batch["mask"][np.arange(512), batch["action"]].all()
    assert len(set(batch["symmetry"].tolist())) == 8
    plain = ReplayBuffer(ttt, 10_000, augment=False, seed=1)
    plain.add(recs[0])
    got = plain.sample(256)
    played = {(bytes(ttt.encode(ttt.play_sequence(recs[0].actions[:t])).tobytes()), int(recs[0].actions[t]))
              for t in range(recs[0].num_positions)}
    assert all((p.tobytes(), int(a)) in played for p, a in zip(got["planes"], got["action"]))


def test_reuse_ratio_is_held_and_snapshots_every_k_steps(tmp_path, ttt):
    learner, buf, store = make_learner(tmp_path, ttt, random_records(ttt, 30, 0), target_reuse_ratio=2.0,
                                       steps_per_snapshot=5, min_buffer_positions=100)
    assert learner.train_available(99) == 0  # below min_buffer_positions
    took = learner.train_available(160)
    assert took == (2 * 160) // 32 == 10
    assert learner.samples_trained_total == 320 <= 2.0 * 160
    assert learner.train_available(160) == 0  # no new data: the ratio holds the learner back
    assert learner.reuse_ratio == pytest.approx(2.0)
    assert store.versions() == [1, 2]  # every K = 5 steps
    assert [store.info(v).training_steps for v in (1, 2)] == [5, 10]
    rows = [r for r in read_metrics(store.run.metrics) if r["component"] == "learner"]
    need = {"step", "steps_per_second", "loss", "loss_policy", "loss_value", "loss_l2",
            "samples_trained_total", "reuse_ratio", "learning_rate", "snapshot_version"}
    assert rows and all(need <= set(r) for r in rows)  # the field names of RULES.md
    assert rows[-1]["step"] == 10 and rows[-1]["snapshot_version"] == 2


def test_a_ratio_that_can_never_be_met_is_a_clear_error(tmp_path, ttt):
    learner, buf, store = make_learner(tmp_path, ttt, random_records(ttt, 10, 0), target_reuse_ratio=1.0,
                                       max_wait_seconds=0.3)
    with pytest.raises(ReuseRatioError, match="no new positions.*ratio"):
        learner.train_waiting(lambda: 64, steps=10, poll_seconds=0.05)
    assert learner.step == 2  # it trained what the data allowed, then gave up waiting
    with pytest.raises(ConfigError, match="min_buffer_positions"):
        learner.check_reachable(5)
    with pytest.raises(ConfigError, match="never be met"):
        make_learner(tmp_path / "b", ttt, [], target_reuse_ratio=0.01, batch_size=256,
                     min_buffer_positions=10)[0].check_reachable(1000)


def test_waiting_learner_continues_when_data_arrives(tmp_path, ttt):
    learner, buf, store = make_learner(tmp_path, ttt, random_records(ttt, 10, 0), target_reuse_ratio=1.0,
                                       max_wait_seconds=5.0)
    produced = iter([32, 32, 32, 64, 64, 96, 96, 128] + [128] * 1000)
    assert learner.train_waiting(lambda: next(produced), steps=4, poll_seconds=0.01) == 4
    assert learner.samples_trained_total == 128


def test_nan_loss_stops_and_keeps_the_last_good_snapshot(tmp_path, ttt):
    learner, buf, store = make_learner(tmp_path, ttt, random_records(ttt, 20, 0), steps_per_snapshot=3)
    learner.train_available(10_000, max_steps=3)
    assert store.latest_version() == 1
    good = store.load(1)[0]
    ckpt = (tmp_path / "learner" / "checkpoint.json").read_bytes()
    with torch.no_grad():
        learner.net.value_fc2.bias.fill_(float("nan"))  # a diverged parameter
    with pytest.raises(TrainingDivergedError, match="nan.*step 3.*version 1"):
        learner.train_step()
    assert store.versions() == [1] and torch.equal(store.load(1)[0]["value_fc2.bias"], good["value_fc2.bias"])
    assert (tmp_path / "learner" / "checkpoint.json").read_bytes() == ckpt
    assert learner.step == 3


@pytest.mark.parametrize("optimizer", ["adam", "sgd"])
def test_checkpoint_and_resume_with_optimizer_state(tmp_path, ttt, optimizer):
    recs = random_records(ttt, 20, 0)
    a, buf, store = make_learner(tmp_path, ttt, recs, optimizer=optimizer, steps_per_snapshot=4,
                                 lr_schedule="cosine", lr_cosine_steps=50, learning_rate=0.01)
    a.train_available(10_000, max_steps=8)  # checkpoint written with snapshot 2 at step 8
    b, _, _ = make_learner(tmp_path, ttt, recs, optimizer=optimizer, steps_per_snapshot=4,
                           lr_schedule="cosine", lr_cosine_steps=50, learning_rate=0.01)
    assert b.resume() == "checkpoint"
    assert (b.step, b.samples_trained_total, b.snapshot_version) == (8, 256, 2)
    sa, sb = a.optimizer.state_dict()["state"], b.optimizer.state_dict()["state"]
    assert sa.keys() == sb.keys() and sa
    for idx in sa:
        for key, val in sa[idx].items():
            assert torch.equal(torch.as_tensor(val), torch.as_tensor(sb[idx][key])), (idx, key)
    # the same batch from the same state gives the same weights: the optimiser state was restored
    batch = buf.sample(32)
    a.train_on_batch(batch)
    b.train_on_batch(batch)
    for (k, va), vb in zip(a.net.state_dict().items(), b.net.state_dict().values()):
        assert torch.allclose(va, vb, atol=1e-6), k


def test_bad_checkpoints_are_refused(tmp_path, ttt):
    recs = random_records(ttt, 10, 0)
    a, _, _ = make_learner(tmp_path, ttt, recs, optimizer="adam", steps_per_snapshot=2)
    a.train_available(10_000, max_steps=2)
    b, _, _ = make_learner(tmp_path, ttt, recs, optimizer="sgd")
    with pytest.raises(CheckpointError, match="optimizer"):
        b.resume()
    path = tmp_path / "learner" / "checkpoint.safetensors"
    data = bytearray(path.read_bytes())
    data[-3] ^= 0x55
    path.write_bytes(bytes(data))
    c, _, _ = make_learner(tmp_path, ttt, recs, optimizer="adam")
    with pytest.raises(CheckpointError, match="checksum"):
        c.resume()


def test_resume_without_checkpoint_starts_from_the_newest_snapshot(tmp_path, ttt):
    recs = random_records(ttt, 10, 0)
    a, _, store = make_learner(tmp_path, ttt, recs, steps_per_snapshot=3)
    a.train_available(10_000, max_steps=3)
    (tmp_path / "learner" / "checkpoint.json").unlink()
    b, _, _ = make_learner(tmp_path, ttt, recs)
    assert b.resume() == "snapshot" and b.step == 3 and b.samples_trained_total == 96
    assert all(torch.equal(x, y) for x, y in zip(a.net.state_dict().values(), b.net.state_dict().values()))


def test_policy_gradient_objective_trains_from_the_buffer(tmp_path, ttt):
    learner, buf, store = make_learner(tmp_path, ttt, random_records(ttt, 20, 0), objective="policy_gradient",
                                       steps_per_snapshot=4)
    assert learner.train_available(10_000, max_steps=4) == 4
    assert store.latest_version() == 1 and math.isfinite(learner.history[-1]["loss"])


@pytest.mark.slow
def test_pretrain_on_supervised_records_learns_the_expert_moves(tmp_path, ttt):
    # supervised first stage (AlphaGo, Silver et al. 2016): one-hot targets on an expert's moves;
    # the expert here is perfect play computed by minimax
    expert = random_records(ttt, 60, 5, expert=MinimaxSolver(ttt))
    learner, _, store = make_learner(tmp_path, ttt, [], optimizer="adam", learning_rate=0.01, weight_decay=0.0)
    probe = ReplayBuffer(ttt, 10_000, augment=False, seed=2)
    for r in expert:
        probe.add(r)
    batch = probe.sample(400)

    def expert_log_likelihood() -> float:
        learner.net.eval()
        with torch.no_grad():
            _, parts = compute_loss(learner.net, batch, learner.config)
        return -float(parts["loss_policy"])

    before = expert_log_likelihood()
    learner.pretrain(expert, steps=150)
    after = expert_log_likelihood()
    assert after > before + 0.25, (before, after)  # nats per position
    info = store.latest()
    assert info.version == 1 and info.extra["phase"] == "pretrain" and info.extra["pretrain_steps"] == 150
    assert learner.samples_trained_total == 0 and learner.step == 0  # self-play ratio untouched
    with pytest.raises(ConfigError, match="no records"):
        learner.pretrain([], steps=5)


def test_pretrain_from_sgf_imports(tmp_path):
    # a short 5x5 game of our own in SGF FF[4] (the open standard), imported as supervised records
    from selfplay.replay.sgf_records import sgf_to_record

    sgf = "(;GM[1]FF[4]SZ[5]KM[0.5]RE[B+R];B[cc];W[bc];B[cb];W[bb];B[cd];W[bd];B[ca];W[ba];B[ce];W[be])"
    rec = sgf_to_record(sgf, "own-game.sgf")
    go = make_game(rec.game, **rec.game_options)
    learner, _, store = make_learner(tmp_path, go, [], optimizer="adam", learning_rate=0.01, batch_size=16)
    parts = learner.pretrain([rec], steps=40)
    assert parts[-1].loss_policy < parts[0].loss_policy
    assert store.latest().game == "go"


def test_learner_thread_treats_subnormal_floats_as_zero(tmp_path, ttt):
    """IEEE 754 subnormals (below 2**-126 = 1.18e-38 in float32) are computed in microcode on x86;
    a 9x9 Go learner's step went from 181 to 1,935 ms after an hour of weight decay made some
    activations subnormal. The learner's thread flushes them to zero (FTZ/DAZ) while it trains, and
    gives the thread back its default (hypothesis, for one, refuses to run with subnormals off)."""
    import threading

    seen: dict[str, float] = {}

    def train_in_a_fresh_thread() -> None:
        tiny = torch.tensor([1e-39], dtype=torch.float32)  # subnormal in float32
        seen["before"] = float(tiny * 1.0)
        learner, _, _ = make_learner(tmp_path, ttt, random_records(ttt, 30, 0), min_buffer_positions=10)
        learner.net.register_forward_pre_hook(lambda *_: seen.__setitem__("during", float(tiny * 1.0)))
        learner.train_available(64, max_steps=1)
        seen["after"] = float(tiny * 1.0)

    t = threading.Thread(target=train_in_a_fresh_thread)
    t.start()
    t.join()
    if not torch.set_flush_denormal(False):  # this CPU cannot flush (not x86 with SSE3)
        pytest.skip("torch.set_flush_denormal is not supported on this CPU (the flush check did NOT run)")
    assert seen["before"] == pytest.approx(1e-39, rel=1e-3)  # a new thread starts without flushing
    assert seen["during"] == 0.0  # flushed while the learner computes
    assert seen["after"] == pytest.approx(1e-39, rel=1e-3)  # and the thread's default after it
