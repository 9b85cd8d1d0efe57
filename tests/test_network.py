"""The policy-value network: shapes, value range and perspective conventions, fit checks."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from pydantic import ValidationError

from selfplay.errors import ConfigError
from selfplay.evaluators import MixedEvaluator, NetworkEvaluator
from selfplay.games.mnk import MNKGame, tictactoe
from selfplay.network import NetworkConfig, PolicyValueNet, build_network
from selfplay.worker import SelfPlayWorker
from selfplay.search import SearchConfig


def test_output_shapes_and_value_range():
    game = MNKGame(5, 4, 3)
    net = build_network(game, NetworkConfig.tiny())
    x = torch.randn(7, *game.input_shape) * 10
    with torch.inference_mode():
        logits, value = net(x)
    assert logits.shape == (7, game.num_actions)
    assert value.shape == (7,)
    assert torch.all(value.abs() <= 1.0)


def test_metadata_carried_for_the_snapshot_store():
    game = tictactoe()
    net = build_network(game, NetworkConfig.tiny())
    assert net.game_name == "mnk" and net.game_options == {"m": 3, "n": 3, "k": 3}
    assert net.input_shape == game.input_shape and net.num_actions == 9
    assert net.config == NetworkConfig.tiny()
    meta = net.metadata()
    assert meta["network"]["blocks"] == 1 and meta["input_shape"] == [3, 3, 3]


def test_presets_and_build_is_deterministic():
    ref = NetworkConfig.reference()
    assert (ref.blocks, ref.channels) == (6, 64)
    game = tictactoe()
    a = build_network(game, NetworkConfig.tiny(), seed=3)
    b = build_network(game, NetworkConfig.tiny(), seed=3)
    c = build_network(game, NetworkConfig.tiny(), seed=4)
    for (ka, va), (_, vb), (_, vc) in zip(a.state_dict().items(), b.state_dict().items(), c.state_dict().items()):
        assert torch.equal(va, vb), ka
    assert any(not torch.equal(va, vc) for va, vc in zip(a.state_dict().values(), c.state_dict().values())
               if va.dtype.is_floating_point and va.numel() > 1)
    # the global random state is left alone
    torch.manual_seed(0)
    before = torch.rand(1)
    torch.manual_seed(0)
    build_network(game, NetworkConfig.tiny(), seed=9)
    assert torch.equal(torch.rand(1), before)
    assert all(f.description for f in NetworkConfig.model_fields.values())


def test_bad_network_config():
    with pytest.raises(ValidationError, match="channels"):
        NetworkConfig(channels=0)
    with pytest.raises(ValidationError, match="blocks"):
        NetworkConfig(blocks=-1)


def test_a_net_for_another_game_is_refused_before_anything_runs():
    net = build_network(MNKGame(4, 4, 3), NetworkConfig.tiny())
    game = tictactoe()
    with pytest.raises(ConfigError, match="policy outputs|input shape"):
        NetworkEvaluator(net, game=game)
    ev = NetworkEvaluator(net)
    with pytest.raises(ConfigError, match="does not fit"):
        SelfPlayWorker(game, ev, SearchConfig(simulations=4, reduced_simulations=4), games_in_parallel=2,
                       worker_id="w", seed=0)
    with pytest.raises(ConfigError):
        MixedEvaluator(net, 0.5, game=game)
    # same input planes but a different action count is caught too
    wrong_actions = PolicyValueNet("mnk", {}, game.input_shape, 10, NetworkConfig.tiny())
    with pytest.raises(ConfigError, match="10 policy outputs"):
        NetworkEvaluator(wrong_actions, game=game)


def test_evaluator_threads_set_and_priors_masked():
    game = tictactoe()
    net = build_network(game, NetworkConfig.tiny())
    ev = NetworkEvaluator(net, threads=1, game=game)
    assert torch.get_num_threads() == 1
    s = game.play_sequence([0, 4])
    planes = game.encode(s)[None]
    legal = game.legal_mask(s)[None]
    priors, values = ev.forward_planes(planes, legal)
    assert priors.shape == (1, 9) and values.shape == (1,)
    assert priors[0, 0] == 0 and priors[0, 4] == 0
    assert priors.sum() == pytest.approx(1.0, abs=1e-5)
    with pytest.raises(ConfigError, match="threads"):
        NetworkEvaluator(net, threads=0)


def _randomise_batch_norms(net):
    gen = torch.Generator().manual_seed(0)
    for m in net.modules():
        if isinstance(m, torch.nn.BatchNorm2d):
            m.running_mean.copy_(torch.rand(m.num_features, generator=gen) - 0.5)
            m.running_var.copy_(torch.rand(m.num_features, generator=gen) + 0.5)
            m.weight.data.copy_(torch.rand(m.num_features, generator=gen) + 0.5)
            m.bias.data.copy_(torch.rand(m.num_features, generator=gen) - 0.5)


def test_inference_form_computes_the_same_function():
    from selfplay.network import fold_for_inference
    game = MNKGame(5, 5, 4)
    net = build_network(game, NetworkConfig(blocks=2, channels=8, value_hidden=8))
    with torch.no_grad():
        _randomise_batch_norms(net)
    x = torch.from_numpy(np.random.default_rng(0).random((6, *game.input_shape), dtype=np.float32))
    with torch.inference_mode():
        p0, v0 = net(x)
        for cl in (True, False):
            p1, v1 = fold_for_inference(net, channels_last=cl)(x.contiguous(
                memory_format=torch.channels_last) if cl else x)
            torch.testing.assert_close(p1, p0, rtol=1e-5, atol=1e-5)
            torch.testing.assert_close(v1, v0, rtol=1e-5, atol=1e-5)


def test_evaluator_follows_weights_loaded_in_place():
    game = tictactoe()
    net = build_network(game, NetworkConfig.tiny(), seed=1)
    ev = NetworkEvaluator(net, game=game)
    s = game.initial_state()
    planes, legal = game.encode(s)[None], game.legal_mask(s)[None]
    before = ev.forward_planes(planes, legal)
    other = build_network(game, NetworkConfig.tiny(), seed=2)
    net.load_state_dict(other.state_dict())
    after = ev.forward_planes(planes, legal)
    expected = NetworkEvaluator(other, game=game).forward_planes(planes, legal)
    assert not np.allclose(before[0], after[0])
    np.testing.assert_allclose(after[0], expected[0], rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(after[1], expected[1], rtol=1e-5, atol=1e-6)


def test_bfloat16_forward_is_close_to_float32_and_bad_precision_is_refused():
    game = MNKGame(5, 5, 4)
    net = build_network(game, NetworkConfig(blocks=2, channels=16, value_hidden=16), seed=3)
    with torch.no_grad():
        _randomise_batch_norms(net)
    rng = np.random.default_rng(1)
    planes = rng.random((8, *game.input_shape), dtype=np.float32).round()
    legal = rng.random((8, game.num_actions)) < 0.7
    p32, v32 = NetworkEvaluator(net, precision="float32").forward_planes(planes, legal)
    p16, v16 = NetworkEvaluator(net, precision="bfloat16").forward_planes(planes, legal)
    assert p16.dtype == np.float32 and v16.dtype == np.float32
    np.testing.assert_allclose(p16, p32, atol=2e-2)   # bfloat16 keeps 8 bits of mantissa
    np.testing.assert_allclose(v16, v32, atol=3e-2)
    assert np.all(p16[~legal] == 0)
    with pytest.raises(ConfigError, match="precision"):
        NetworkEvaluator(net, precision="float8")


def test_auto_precision_rule():
    from selfplay.network import cpu_has_bf16_matrix_units
    game = tictactoe()
    assert NetworkEvaluator(build_network(game, NetworkConfig.tiny())).precision == "float32"
    wide = NetworkEvaluator(build_network(game, NetworkConfig(blocks=1, channels=32)))
    assert wide.precision == ("bfloat16" if cpu_has_bf16_matrix_units() else "float32")
