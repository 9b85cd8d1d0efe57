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
    assert float(parts["loss_l2"]) == pytest.approx(want_l2, rel=1e-5)
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
