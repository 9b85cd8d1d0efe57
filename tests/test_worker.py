"""The vectorised self-play worker: records, sign conventions, determinism, playout cap
randomisation, resignation and its false-positive probe, snapshot swaps."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from selfplay.errors import ConfigError
from selfplay.evaluators import NetworkEvaluator, UniformEvaluator
from selfplay.games.mnk import MNKGame, tictactoe
from selfplay.network import NetworkConfig, build_network
from selfplay.search import SearchConfig, kernels
from selfplay.worker import SelfPlayWorker, game_seed

GAME = tictactoe()
GREEDY = dict(dirichlet_epsilon=0.0, temperature=0.0, temperature_moves=0, final_temperature=0.0)


def _worker(search: SearchConfig, evaluator=None, **kw) -> SelfPlayWorker:
    kw.setdefault("games_in_parallel", 4)
    kw.setdefault("worker_id", "w0")
    kw.setdefault("seed", 11)
    return SelfPlayWorker(kw.pop("game", GAME), evaluator or UniformEvaluator(), search, clock=lambda: 0.0, **kw)


@pytest.mark.parametrize("algorithm", ["puct", "gumbel"])
def test_sign_convention_one_move_from_a_win(algorithm):
    cfg = SearchConfig(algorithm=algorithm, simulations=64, reduced_simulations=8, **GREEDY)
    # X (player 0) to move; c3 (action 2) completes the top row.
    x_wins = GAME.play_sequence([0, 3, 1, 4])
    rec = _worker(cfg, start_state=x_wins, games_in_parallel=1).play_games(1)[0]
    assert rec.actions.tolist() == [2]
    assert rec.result == 1                      # player 0's view
    assert rec.outcomes.tolist() == [1]         # mover (player 0) won
    assert rec.root_values[0] > 0.5             # the search saw the win from the mover's view
    # O (player 1) to move; action 5 completes the middle row 3-4-5 for O.
    o_wins = GAME.play_sequence([0, 3, 1, 4, 8])
    rec = _worker(cfg, start_state=o_wins, games_in_parallel=1).play_games(1)[0]
    assert rec.actions.tolist() == [5]
    assert rec.to_play.tolist() == [1]
    assert rec.result == -1                     # player 1 won: -1 from player 0's view
    assert rec.outcomes.tolist() == [1]         # +1 from the mover's (player 1's) view
    assert rec.root_values[0] > 0.5


def test_records_hold_what_the_replay_store_needs():
    net = build_network(GAME, NetworkConfig.tiny(), seed=2)
    cfg = SearchConfig(simulations=24, reduced_simulations=8, full_search_share=0.5)
    w = _worker(cfg, NetworkEvaluator(net, game=GAME), run_tag="r1-", snapshot_version=7)
    records = w.play_games(8)
    assert len(records) == 8
    ids = [r.game_id for r in records]
    assert len(set(ids)) == 8 and all(i.startswith("r1-w0-") for i in ids)
    for r in records:
        index = int(r.game_id.rsplit("-", 1)[1])
        assert r.seed == game_seed(11, index)
        T = r.num_positions
        assert r.boards.shape == (T, 3, 3) and r.boards.dtype == np.int8
        state = GAME.initial_state()
        for t in range(T):
            np.testing.assert_array_equal(r.boards[t], GAME.compact(state))   # board BEFORE the move
            assert r.to_play[t] == GAME.to_play(state)
            np.testing.assert_array_equal(r.legal_mask(t, 9), GAME.legal_mask(state))
            target = r.policy_target(t, 9)
            assert target.sum() == pytest.approx(1.0) and np.all(target[~GAME.legal_mask(state)] == 0)
            state = GAME.play(state, int(r.actions[t]))
        assert GAME.is_terminal(state)
        assert r.result == int(GAME.outcome(state))
        # outcomes from the mover's view alternate in sign with the mover
        np.testing.assert_array_equal(r.outcomes, np.where(r.to_play == 0, r.result, -r.result))
        if r.result != 0:
            assert np.all(r.outcomes[1:] == -r.outcomes[:-1])
        assert np.all(r.snapshot == 7)
        assert r.search["simulations"] == 24 and r.game == "mnk" and r.worker_id == "w0"
    s = w.stats()
    assert s["games_total"] >= 8 and s["positions_total"] >= sum(r.num_positions for r in records)
    assert s["evals_total"] > 0 and s["games_in_flight"] == 4
    assert abs(s["time_share_rules"] + s["time_share_tree"] + s["time_share_network"] - 1) < 1e-9


def _fields(record):
    out = {}
    for f in dataclasses.fields(record):
        v = getattr(record, f.name)
        out[f.name] = (v.dtype.str, v.shape, v.tobytes()) if isinstance(v, np.ndarray) else v
    return out


@pytest.mark.parametrize("algorithm", ["puct", "gumbel"])
def test_same_seed_same_games(algorithm):
    net = build_network(GAME, NetworkConfig.tiny(), seed=5)
    cfg = SearchConfig(algorithm=algorithm, simulations=16, reduced_simulations=4, full_search_share=0.5,
                       leaves_per_game=2)
    a = _worker(cfg, NetworkEvaluator(net, game=GAME), seed=42).play_games(6)
    b = _worker(cfg, NetworkEvaluator(net, game=GAME), seed=42).play_games(6)
    assert [_fields(x) for x in a] == [_fields(y) for y in b]
    c = _worker(cfg, NetworkEvaluator(net, game=GAME), seed=43).play_games(6)
    assert [x.actions.tobytes() for x in a] != [z.actions.tobytes() for z in c]


def test_playout_cap_randomisation_budgets_and_flags():
    cfg = SearchConfig(simulations=40, reduced_simulations=6, full_search_share=0.3, reuse_tree=False)
    records = _worker(cfg).play_games(8)
    full = np.concatenate([r.full_search for r in records])
    assert full.any() and (~full).any()
    for r in records:
        for t in range(r.num_positions):
            lo, hi = r.policy_offsets[t], r.policy_offsets[t + 1]
            spent = r.policy_weights[lo:hi].sum()
            assert spent == (40 if r.full_search[t] else 6)


def test_virtual_loss_gathers_several_leaves_per_game():
    cfg = SearchConfig(simulations=32, reduced_simulations=8, leaves_per_game=4, reuse_tree=False, **GREEDY)
    w = _worker(cfg, games_in_parallel=3)
    records = w.play_games(3)
    s = w.stats()
    assert s["mean_batch_size"] > 3.0   # more than one leaf per game per evaluator call
    for r in records:
        lo, hi = r.policy_offsets[0], r.policy_offsets[1]
        assert r.policy_weights[lo:hi].sum() == 32   # virtual loss removed: real visits only


# X to move; O threatens 2 (row 0) and 6 (column 0): X cannot stop both and has no win of its own.
X_LOST = GAME.play_sequence([4, 0, 5, 1, 7, 3])
# X to move, one empty cell: the game is a draw whatever happens.
DRAWN = GAME.play_sequence([0, 1, 2, 4, 3, 5, 7, 6])


def test_fixture_positions():
    assert GAME.to_play(X_LOST) == 0 and sorted(GAME.legal_actions(X_LOST).tolist()) == [2, 6, 8]
    assert GAME.legal_actions(DRAWN).tolist() == [8]
    assert GAME.outcome(GAME.play(DRAWN, 8)) == 0


def test_resignation_and_its_false_positive_probe():
    base = dict(simulations=200, reduced_simulations=8, **GREEDY)
    # resignation on: X resigns the lost position at once
    w = _worker(SearchConfig(resign_threshold=-0.5, resign_probe_fraction=0.0, **base), start_state=X_LOST,
                games_in_parallel=1)
    rec = w.play_games(1)[0]
    assert rec.resigned and rec.result == -1 and rec.num_positions == 1 and rec.root_values[0] < -0.5
    assert not rec.resign_disabled
    # resignation disabled: the game is played out; X would have resigned and indeed lost
    w = _worker(SearchConfig(resign_threshold=-0.5, resign_probe_fraction=1.0, **base), start_state=X_LOST,
                games_in_parallel=1)
    rec = w.play_games(1)[0]
    assert not rec.resigned and rec.resign_disabled and rec.resign_would_have == 0 and rec.result == -1
    assert w.stats()["resign_false_positives_total"] == 0
    assert w.stats()["resign_disabled_games_total"] == 1
    # a threshold above a drawn root value: X "would have resigned" a draw -> a false positive
    w = _worker(SearchConfig(resign_threshold=0.5, resign_probe_fraction=1.0, **base), start_state=DRAWN,
                games_in_parallel=1)
    rec = w.play_games(1)[0]
    assert rec.resign_would_have == 0 and rec.result == 0
    assert w.stats()["resign_false_positives_total"] == 1


def test_snapshot_swap_between_moves_and_refusal_of_a_foreign_net():
    net = build_network(GAME, NetworkConfig.tiny(), seed=1)
    w = _worker(SearchConfig(simulations=8, reduced_simulations=4), NetworkEvaluator(net, game=GAME),
                games_in_parallel=2)
    w.step()
    foreign = build_network(MNKGame(4, 4, 4), NetworkConfig.tiny())
    with pytest.raises(ConfigError, match="does not fit"):
        w.set_evaluator(NetworkEvaluator(foreign), 9)
    assert w.snapshot_version == 0
    w.set_evaluator(NetworkEvaluator(build_network(GAME, NetworkConfig.tiny(), seed=2), game=GAME), 3)
    records = w.play_games(4)
    versions = np.concatenate([r.snapshot for r in records])
    assert set(versions.tolist()) <= {0, 3} and 3 in versions
    for r in records:   # versions never go down within a game
        assert np.all(np.diff(r.snapshot) >= 0)


def test_step_advances_every_game():
    w = _worker(SearchConfig(simulations=8, reduced_simulations=4), games_in_parallel=5)
    before = w.positions_total_moves()
    w.step()
    assert w.positions_total_moves() - before >= 5


@pytest.mark.parametrize("kw,match", [
    (dict(games_in_parallel=0), "games_in_parallel"),
    (dict(seed=-1), "seed"),
    (dict(worker_id=""), "worker_id"),
    (dict(start_state=GAME.play_sequence([0, 3, 1, 4, 2])), "finished"),
])
def test_bad_worker_arguments(kw, match):
    with pytest.raises(ConfigError, match=match):
        _worker(SearchConfig(simulations=4, reduced_simulations=4), **kw)


def test_bad_search_dict_is_a_config_error():
    with pytest.raises(ConfigError, match="search.simulations"):
        SelfPlayWorker(GAME, UniformEvaluator(), {"simulations": 0}, games_in_parallel=1, worker_id="w", seed=0)
    with pytest.raises(ConfigError, match="search.temperature"):
        SelfPlayWorker(GAME, UniformEvaluator(), {"temperature": -1}, games_in_parallel=1, worker_id="w", seed=0)


def test_go_positions_carry_history_for_the_network():
    from selfplay.games.registry import make_game
    go = make_game("go", size=9)
    net = build_network(go, NetworkConfig.tiny())
    w = SelfPlayWorker(go, NetworkEvaluator(net, game=go), SearchConfig(simulations=8, reduced_simulations=4),
                       games_in_parallel=3, worker_id="g", seed=0)
    for _ in range(3):
        w.step()
    assert w.positions_total_moves() >= 9
    assert w.stats()["evals_total"] >= 3 * 3 * 8


def test_gumbel_records_play_the_halving_winner_and_store_the_improved_policy():
    cfg = SearchConfig(algorithm="gumbel", simulations=16, reduced_simulations=4, full_search_share=0.5)
    records = _worker(cfg, games_in_parallel=3).play_games(3)
    for r in records:
        for t in range(r.num_positions):
            lo, hi = r.policy_offsets[t], r.policy_offsets[t + 1]
            assert r.policy_weights[lo:hi].sum() == pytest.approx(1.0, abs=1e-5)   # probabilities
            assert int(r.actions[t]) in r.policy_actions[lo:hi].tolist()


def test_fourinrow_games_run_to_a_finished_position():
    from selfplay.games.registry import make_game
    game = make_game("fourinrow")
    net = build_network(game, NetworkConfig.tiny())
    records = SelfPlayWorker(game, NetworkEvaluator(net, game=game), SearchConfig(simulations=8),
                             games_in_parallel=2, worker_id="f", seed=1).play_games(2)
    for r in records:
        state = game.initial_state()
        for a in r.actions:
            state = game.play(state, int(a))
        assert game.is_terminal(state) and r.result == int(game.outcome(state))


@pytest.mark.parametrize("algorithm", ["puct", "gumbel"])
def test_tree_bookkeeping_stays_consistent_across_rounds_and_reuse(algorithm):
    # Virtual loss 0.7 would leave non-integer visit counts behind if it were not fully removed.
    from selfplay.games.registry import make_game
    game = make_game("fourinrow")
    cfg = SearchConfig(algorithm=algorithm, simulations=24, reduced_simulations=6, full_search_share=0.5,
                       leaves_per_game=3, virtual_loss=0.7)
    w = SelfPlayWorker(game, UniformEvaluator(), cfg, games_in_parallel=3, worker_id="inv", seed=4)
    for _ in range(6):
        w.step()
        tree = w._tree
        for base, count, root in zip(tree.base.tolist(), tree.count.tolist(), tree.root.tolist()):
            # the live tree: the root's subtree (rows of earlier trees may lie dead in the region)
            nodes = np.empty(count, dtype=np.int64)
            nodes = nodes[:kernels.subtree_order(tree.child, root, nodes)]
            assert base <= root and np.all(nodes < base + count)
            N, W, Q = tree.N[nodes], tree.W[nodes], tree.Q[nodes]
            assert np.all(N == np.round(N)) and np.all(N >= 0)
            np.testing.assert_allclose(tree.visits[nodes], N.sum(axis=1))
            visited = N > 0
            np.testing.assert_allclose(Q[visited], W[visited] / N[visited], rtol=1e-5, atol=1e-6)
            assert np.all(np.abs(W) <= N + 1e-4)          # values in [-1, 1]
            assert not tree.pending[nodes].any()
            ch = tree.child[nodes]
            for i, a in zip(*np.nonzero(ch >= 0)):
                c = ch[i, a]
                assert base <= c < base + count
                if tree.terminal[c]:
                    assert tree.visits[c] == 0
                else:   # every simulation through the edge either stopped at c or went on below it
                    assert N[i, a] >= tree.visits[c] + 1


def test_resignation_threshold_calibrated_by_probe_games():
    """Silver et al. 2017 (AlphaGo Zero, Methods) keep resignation false positives below 5% by
    choosing the threshold from games played without resignation. From DRAWN, X's root value is
    0 (a draw) and X never loses: with a ceiling of 0.5 every probe game is a false positive, so
    the calibrated threshold drops below every value X saw and X stops resigning drawn games."""
    from selfplay.search.resign import NEVER

    base = dict(simulations=64, reduced_simulations=8, **GREEDY)
    cfg = SearchConfig(resign_threshold=0.5, resign_probe_fraction=1.0, resign_false_positive_target=0.05, **base)
    w = _worker(cfg, start_state=DRAWN, games_in_parallel=4)
    assert w.stats()["resign_threshold_now"] == 0.5
    w.play_games(24)  # 24 probe games: X's lowest value ~0 each time, never lost
    assert w.resign_calibration.false_positive_rate(0.5) == 1.0
    assert w.stats()["resign_threshold_now"] == NEVER
    # ... and from then on a game with resignation on plays to its end instead of resigning
    w2 = _worker(cfg.model_copy(update={"resign_probe_fraction": 0.0}), start_state=DRAWN, games_in_parallel=1)
    w2.resign_calibration = w.resign_calibration
    rec = w2.play_games(1)[0]
    assert not rec.resigned and rec.result == 0


def test_resign_calibration_picks_the_highest_threshold_within_the_target():
    """The rule by hand: lowest values and outcomes of 40 probe players; 5% target."""
    from selfplay.search.resign import NEVER, ResignCalibration

    cal = ResignCalibration(ceiling=-0.8, target=0.05, min_evidence=20)
    # 30 players fell to -0.95 and lost; 10 players fell only to -0.85 and won (false positives at -0.8)
    for _ in range(30):
        cal.observe(-0.95, False)
    assert cal.threshold == -0.8  # all 30 would-resign players lost: 0% at the ceiling
    for _ in range(10):
        cal.observe(-0.85, True)
    # at -0.8: 10 of 40 not lost (25%); below -0.85: the 30 losers only (0%) -> threshold -0.85
    assert cal.false_positive_rate(-0.8) == 0.25
    assert cal.threshold == -0.85 and cal.false_positive_rate(cal.threshold) == 0.0
    # a winner at -0.99 too: below -0.95 only that winner remains (100%), below -0.85 1 of 31 (3.2%)
    cal.observe(-0.99, True)
    assert cal.threshold == -0.85
    for _ in range(3):
        cal.observe(-0.99, True)  # 4 of 34 below -0.85 were not lost (11.8%): even -0.95 fails (100%)
    assert cal.threshold == NEVER
    # too little evidence: the configured ceiling stands
    fresh = ResignCalibration(ceiling=-0.8, target=0.05, min_evidence=20)
    for _ in range(5):
        fresh.observe(-0.9, True)
    assert fresh.threshold == -0.8


def test_resign_false_positive_target_needs_a_threshold_and_probes():
    with pytest.raises(ConfigError, match="resign_false_positive_target needs"):
        SearchConfig.parse({"resign_false_positive_target": 0.05})
    with pytest.raises(ConfigError, match="resign_false_positive_target needs"):
        SearchConfig.parse({"resign_false_positive_target": 0.05, "resign_threshold": -0.9,
                            "resign_probe_fraction": 0.0})
