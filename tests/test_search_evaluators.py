"""Evaluators: rollout values from the mover's view, AlphaGo's lambda mixing, bad lambda."""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.errors import ConfigError
from selfplay.evaluators import (LeafBatch, MixedEvaluator, NetworkEvaluator, RandomRolloutEvaluator,
                                 UniformEvaluator, make_evaluator)
from selfplay.games.mnk import tictactoe
from selfplay.network import NetworkConfig, build_network
from selfplay.search import SearchConfig, search_states

GAME = tictactoe()
# X to move with one empty cell (c1, index 8); playing it completes the 0-4-8 diagonal: X wins.
X_LAST_CELL_WINS = GAME.play_sequence([0, 1, 4, 2, 5, 3, 6, 7])
# O to move with two empty cells (2 and 6), each completing an O line: O wins either way.
O_WINS_EITHER_WAY = GAME.play_sequence([4, 0, 5, 1, 7, 3, 8])


def _batch(states):
    legal = np.stack([GAME.legal_mask(s) for s in states])
    tp = np.array([GAME.to_play(s) for s in states], dtype=np.int8)
    return LeafBatch(GAME, states, tp, legal, [np.random.default_rng(i) for i in range(len(states))])


def test_fixture_positions():
    assert GAME.to_play(X_LAST_CELL_WINS) == 0 and GAME.legal_actions(X_LAST_CELL_WINS).tolist() == [8]
    assert GAME.to_play(O_WINS_EITHER_WAY) == 1 and GAME.legal_actions(O_WINS_EITHER_WAY).tolist() == [2, 6]


def test_rollout_value_is_from_the_movers_view():
    ev = RandomRolloutEvaluator()
    priors, values = ev.evaluate(_batch([X_LAST_CELL_WINS, O_WINS_EITHER_WAY]))
    # both movers win whatever they play: +1 from their own view (player 1's win is -1 for player 0)
    assert values.tolist() == [1.0, 1.0]
    np.testing.assert_allclose(priors[1], np.where(GAME.legal_mask(O_WINS_EITHER_WAY), 0.5, 0.0))


def test_mixed_value_is_the_lambda_weighted_sum():
    net = build_network(GAME, NetworkConfig.tiny(), seed=1)
    states = [X_LAST_CELL_WINS, O_WINS_EITHER_WAY]
    p_net, v_net = NetworkEvaluator(net, game=GAME).evaluate(_batch(states))
    for lam in (0.0, 0.3, 1.0):
        p, v = MixedEvaluator(net, lam, game=GAME).evaluate(_batch(states))
        np.testing.assert_allclose(p, p_net)
        # AlphaGo (Silver et al. 2016): V = (1 - lambda) v_theta + lambda z, z = +1 here
        np.testing.assert_allclose(v, (1 - lam) * v_net + lam * 1.0, rtol=1e-6)


@pytest.mark.parametrize("lam", [-0.1, 1.01, float("nan"), "half"])
def test_lambda_outside_unit_interval_is_refused(lam):
    net = build_network(GAME, NetworkConfig.tiny())
    with pytest.raises(ConfigError, match="lambda"):
        MixedEvaluator(net, lam)


def test_make_evaluator_picks_by_settings():
    net = build_network(GAME, NetworkConfig.tiny())
    assert isinstance(make_evaluator(None, GAME), RandomRolloutEvaluator)
    assert isinstance(make_evaluator(net, GAME), NetworkEvaluator)
    assert isinstance(make_evaluator(net, GAME, rollout_mix_lambda=0.5), MixedEvaluator)


@pytest.mark.parametrize("leaves", [1, 4])
def test_pure_mcts_finds_the_win_and_the_block(leaves):
    # several leaves per game use virtual loss; the search must still see the threats
    cfg = SearchConfig(simulations=300, dirichlet_epsilon=0.0, leaves_per_game=leaves)
    win = GAME.play_sequence([0, 3, 1, 4])        # X to move: c3 (2) wins
    block = GAME.play_sequence([0, 4, 1])          # O to move: must block at 2
    for ev in (RandomRolloutEvaluator(), UniformEvaluator()):
        r_win, r_block = search_states(GAME, [win, block], ev, cfg, seed=1)
        assert int(np.argmax(r_win.visits)) == 2 and r_win.root_value > 0.5
        assert int(np.argmax(r_block.visits)) == 2


class _BrokenEvaluator:
    def __init__(self, kind):
        self.kind = kind

    def check_game(self, game):
        return None

    def evaluate(self, batch):
        n = len(batch)
        if self.kind == "shape":
            return np.ones((n, 3), dtype=np.float32), np.zeros(n, dtype=np.float32)
        return np.full((n, 9), 1 / 9, dtype=np.float32), np.full(n, np.nan, dtype=np.float32)


def test_a_broken_evaluation_is_refused_before_it_enters_the_tree():
    from selfplay.errors import SnapshotError
    cfg = SearchConfig(simulations=4)
    with pytest.raises(ConfigError, match="expected \\(1, 9\\)"):
        search_states(GAME, [GAME.initial_state()], _BrokenEvaluator("shape"), cfg)
    with pytest.raises(SnapshotError, match="non-finite"):
        search_states(GAME, [GAME.initial_state()], _BrokenEvaluator("nan"), cfg)


def test_a_network_with_non_finite_weights_is_refused_through_its_logits():
    """The search takes a network's raw logits (evaluate_logits) and computes the priors itself;
    non-finite logits are refused there as non-finite priors are elsewhere."""
    import torch

    from selfplay.errors import SnapshotError

    net = build_network(GAME, NetworkConfig.tiny(), seed=0)
    with torch.no_grad():
        net.policy_fc.weight.fill_(float("inf"))
    ev = NetworkEvaluator(net, game=GAME, backend="torch", precision="float32")
    with pytest.raises(SnapshotError, match="non-finite"):
        search_states(GAME, [GAME.initial_state()], ev, SearchConfig(simulations=4))
