"""The optional area heads of the network (``[network] area_heads``) and their loss terms in
the learner (``ownership_loss_weight``, ``score_loss_weight``): off by default with exactly the
tensors of before, the loss formula, and training that lowers it.

Ownership and score-margin targets as auxiliary training signals: D. J. Wu 2019, "Accelerating
Self-Play Learning in Go". The ownership loss below is the cross-entropy between the final owner
o in {-1, 0, 1} read as the probability (1 + o) / 2 and the prediction (1 + tanh u) / 2, the form
of that paper's ownership term (from memory of the paper).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import torch

from selfplay.errors import ConfigError, SnapshotError
from selfplay.games.go import GoGame
from selfplay.games.registry import make_game
from selfplay.learner import Learner, area_losses, compute_loss
from selfplay.learner_config import LearnerConfig
from selfplay.network import NetworkConfig, build_network, fold_for_inference
from selfplay.replay import synthetic
from selfplay.replay.buffer import ReplayBuffer
from selfplay.snapshots import SnapshotStore, read_weights_file

OLD_SNAPSHOT = Path(__file__).parent / "corpus" / "snapshots" / "tiny_ttt_3e38.safetensors"
AREA = NetworkConfig(blocks=1, channels=16, value_hidden=16, area_heads=True)
GO5 = GoGame(size=5, komi=0.5)


def _go_buffer(n_games: int = 12, seed: int = 0) -> ReplayBuffer:
    rng = np.random.default_rng(seed)
    buf = ReplayBuffer(GO5, 20_000, seed=seed)
    buf.add_many(synthetic.random_record(GO5, rng, f"g{i}", game_name="go", game_options=GO5.options())
                 for i in range(n_games))
    return buf


def test_off_by_default_with_the_tensors_of_before():
    assert NetworkConfig().area_heads is False
    old = read_weights_file(OLD_SNAPSHOT)
    old = old[0] if isinstance(old, tuple) else old
    net = build_network(make_game("tictactoe"), NetworkConfig.tiny())
    # a snapshot written before the heads existed has exactly the default net's tensors
    assert {k: tuple(v.shape) for k, v in old.items()} == {k: tuple(v.shape) for k, v in net.state_dict().items()}
    on = build_network(make_game("tictactoe"), NetworkConfig.tiny().model_copy(update={"area_heads": True}))
    extra = set(on.state_dict()) - set(net.state_dict())
    assert extra == {"ownership_conv.weight", "ownership_conv.bias", "score_fc.weight", "score_fc.bias"}
    with pytest.raises(ValueError, match="no area heads"):
        net.forward_with_area(torch.zeros(1, *make_game("tictactoe").input_shape))


def test_heads_leave_policy_and_value_unchanged_and_inference_ignores_them():
    off = build_network(GO5, AREA.model_copy(update={"area_heads": False}), seed=3)
    on = build_network(GO5, AREA, seed=3)
    x = torch.as_tensor(np.stack([GO5.encode(GO5.play_sequence(["C3", "B2"])), GO5.encode(GO5.initial_state())]))
    with torch.no_grad():
        p0, v0 = off(x)
        p1, v1 = on(x)
        out = on.forward_with_area(x)
        pf, vf = fold_for_inference(on, channels_last=False)(x)
    torch.testing.assert_close(p0, p1)
    torch.testing.assert_close(v0, v1)
    torch.testing.assert_close(out["policy"], p1)
    torch.testing.assert_close(pf, p1, rtol=1e-4, atol=1e-4)
    torch.testing.assert_close(vf, v1, rtol=1e-4, atol=1e-4)
    assert out["ownership_logit"].shape == (2, 5, 5) and out["score"].shape == (2,)


def test_area_losses_follow_the_formula():
    rng = np.random.default_rng(1)
    own = rng.integers(-1, 2, size=(4, 3, 3)).astype(np.int8)
    margin = np.array([3.5, -2.5, 0.5, 9.0], dtype=np.float32)
    weight = np.array([1, 0, 1, 1], dtype=np.float32)
    u = rng.normal(size=(4, 3, 3))
    s = rng.normal(size=4)
    out = {"ownership_logit": torch.tensor(u, dtype=torch.float32), "score": torch.tensor(s, dtype=torch.float32)}
    lo, ls = area_losses(out, {"ownership": own, "score_margin": margin, "ownership_weight": weight})
    q = (1 + np.tanh(u)) / 2
    t = (1 + own) / 2
    ce = -(t * np.log(q) + (1 - t) * np.log(1 - q)).reshape(4, -1).mean(axis=1)
    se = (s - margin / 9) ** 2
    assert math.isclose(float(lo), float((ce * weight).sum() / weight.sum()), rel_tol=1e-5)
    assert math.isclose(float(ls), float((se * weight).sum() / weight.sum()), rel_tol=1e-5)
    # no scored row: the terms are zero
    lo0, ls0 = area_losses(out, {"ownership": own, "score_margin": margin, "ownership_weight": np.zeros(4, np.float32)})
    assert float(lo0) == 0.0 and float(ls0) == 0.0


def test_loss_terms_need_the_heads_and_area_targets(tmp_path):
    cfg = LearnerConfig(ownership_loss_weight=1.0)
    batch = _go_buffer().sample(8)
    with pytest.raises(ConfigError, match="area_heads = true"):
        compute_loss(build_network(GO5, NetworkConfig.tiny()), batch, cfg)
    ttt = make_game("tictactoe")
    rec = synthetic.random_record(ttt, np.random.default_rng(0), "t", game_name="tictactoe", game_options={})
    tbuf = ReplayBuffer(ttt, 100, seed=0)
    tbuf.add(rec)
    tnet = build_network(ttt, NetworkConfig.tiny().model_copy(update={"area_heads": True}))
    with pytest.raises(ConfigError, match="scored by area"):
        compute_loss(tnet, tbuf.sample(4), cfg)
    # off (the default): a net with the heads trains on policy and value alone
    total, parts = compute_loss(build_network(GO5, AREA), batch, LearnerConfig())
    assert "loss_ownership" not in parts and math.isfinite(float(total.detach()))


def test_training_lowers_the_area_losses_and_snapshots_round_trip(tmp_path):
    buf = _go_buffer()
    net = build_network(GO5, AREA, seed=0)
    store = SnapshotStore(tmp_path, create=True)
    cfg = LearnerConfig(batch_size=64, min_buffer_positions=1, learning_rate=0.05, ownership_loss_weight=1.0,
                        score_loss_weight=1.0, weight_decay=0.0)
    learner = Learner(GO5, net, cfg, buf, store)
    batch = buf.sample(64)
    assert batch["ownership_weight"].sum() > 0
    first = learner.train_on_batch(batch)
    for _ in range(40):
        last = learner.train_on_batch(batch)
    assert last.loss_ownership < 0.8 * first.loss_ownership
    assert last.loss_score < first.loss_score
    version = learner.publish()
    fresh = build_network(GO5, AREA, seed=9)
    store.load_into(fresh, version)
    for k, v in net.state_dict().items():
        torch.testing.assert_close(fresh.state_dict()[k], v)
    # a net without the heads refuses those weights (a different architecture), naming a tensor
    with pytest.raises(SnapshotError):
        store.load_into(build_network(GO5, NetworkConfig.tiny()), version)
