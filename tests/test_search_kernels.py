"""The compiled round (selfplay.search.kernels) against the formulas it replaces, the batched game
hooks against the one-state methods, and same-seed games against the numpy search they replaced.

References: PUCT as written in AlphaGo Zero (Silver et al. 2017, Methods, "Select") through
``selfplay.search.puct.puct_select``; the Gumbel non-root rule from Danihelka et al. (2022,
Sec. 5 and Appendix D) through ``selfplay.search.gumbel.gumbel_nonroot_select``; backup by hand.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

from selfplay.evaluators import RandomRolloutEvaluator, UniformEvaluator
from selfplay.games.registry import game_names, make_game
from selfplay.search import BatchedSearch, SearchConfig
from selfplay.search import kernels
from selfplay.search import gumbel as gb
from selfplay.search.puct import puct_select, puct_select_q
from selfplay.worker import SelfPlayWorker


def _random_rows(rng: np.random.Generator, k: int, A: int, fractional: bool = False):
    """k nodes over A actions: priors over a random legal set, visit counts (some zero), values
    in [-1, 1] per visit, node values."""
    legal = rng.random((k, A)) < 0.7
    legal[np.arange(k), rng.integers(0, A, k)] = True
    P = np.where(legal, rng.random((k, A)), 0).astype(np.float32)
    P /= P.sum(axis=1, keepdims=True)
    N = np.where(legal & (rng.random((k, A)) < 0.5), rng.integers(0, 30, (k, A)), 0).astype(np.float32)
    if fractional:   # pending virtual losses of 0.7
        N = np.where(N > 0, N + 0.7 * rng.integers(0, 3, (k, A)), N).astype(np.float32)
    W = (N * rng.uniform(-1, 1, (k, A))).astype(np.float32)
    v = rng.uniform(-1, 1, k).astype(np.float32)
    return P, N, W, legal, v


@pytest.mark.parametrize("fpu", [0.0, 0.3])
def test_compiled_puct_choice_equals_the_formula(fpu):
    rng = np.random.default_rng(1)
    for A in (10, 82):
        P, N, W, legal, v = _random_rows(rng, 400, A)
        Q = np.where(legal, (v - fpu)[:, None], -np.inf).astype(np.float32)
        np.divide(W, N, out=Q, where=N > 0)
        expected = puct_select(P, N, W, legal, v, 1.3, fpu)
        np.testing.assert_array_equal(kernels.puct_pick_rows(P, N, Q, N.sum(axis=1), 1.3), expected)
        np.testing.assert_array_equal(puct_select_q(P, N, Q, N.sum(axis=1), 1.3), expected)


@pytest.mark.parametrize("fractional", [False, True])
def test_compiled_gumbel_rule_equals_the_formula(fractional):
    # The kernel sums in plain order where numpy sums pairwise; on these inputs the choices agree.
    rng = np.random.default_rng(2)
    for A in (10, 82):
        P, N, W, legal, v = _random_rows(rng, 400, A, fractional)
        logP = np.log(np.maximum(P, np.float32(1e-30)))
        expected = gb.gumbel_nonroot_select(P, N, W, legal, v, 50.0, 1.0)
        np.testing.assert_array_equal(kernels.gumbel_pick_rows(P, N, W, logP, legal, v, 50.0, 1.0), expected)


def test_backup_adds_signed_values_and_removes_virtual_loss():
    # Two nodes (0: player 0 to move, 1: player 1 to move), two leaves (2: player 0, 3: player 1).
    # Path a: 0 -a1-> 1 -a0-> leaf 2; path b: 0 -a1-> 1 -a2-> leaf 3; virtual loss 0.5 on both.
    A = 3
    N = np.zeros((4, A), np.float32)
    W = np.zeros((4, A), np.float32)
    Q = np.zeros((4, A), np.float32)
    visits = np.zeros(4, np.float32)
    vl = 0.5
    for node, a in [(0, 1), (1, 0), (0, 1), (1, 2)]:   # the virtual losses the descents left
        N[node, a] += vl
        W[node, a] -= vl
        visits[node] += vl
    edge_node = np.array([0, 1, 0, 1], np.int64)
    edge_act = np.array([1, 0, 1, 2], np.int64)
    value = np.array([0, 0, 0.6, -0.2], np.float32)      # leaf values, each from its own mover's view
    to_play = np.array([0, 1, 0, 1], np.int8)
    kernels.backup(edge_node, edge_act, np.array([0, 2]), np.array([2, 2]), np.array([2, 3]),
                   np.array([0, 1, 2]), value, to_play, N, W, Q, visits, vl)
    # edge (0, 1): leaf 2 same mover -> +0.6; leaf 3 other mover -> +0.2
    assert N[0, 1] == 2 and W[0, 1] == pytest.approx(0.8) and Q[0, 1] == pytest.approx(0.4)
    # edge (1, 0): player 1 to move, leaf 2 is player 0's -> -0.6; edge (1, 2): same mover -> -0.2
    assert N[1, 0] == 1 and W[1, 0] == pytest.approx(-0.6)
    assert N[1, 2] == 1 and W[1, 2] == pytest.approx(-0.2)
    np.testing.assert_array_equal(visits, [2, 2, 0, 0])


def _subtree(tree: BatchedSearch, node: int) -> dict:
    """The statistics of the subtree under ``node`` as nested plain values (ids left out)."""
    kids = {int(a): _subtree(tree, int(c)) for a, c in enumerate(tree.child[node]) if c >= 0}
    return {"N": tree.N[node].tolist(), "W": tree.W[node].tolist(), "P": tree.P[node].tolist(),
            "legal": tree.legal[node].tolist(), "value": float(tree.value[node]),
            "terminal": bool(tree.terminal[node]), "kids": kids}


def _size(subtree: dict) -> int:
    return 1 + sum(_size(k) for k in subtree["kids"].values())


def _searched(algorithm: str, capacity: int | None) -> BatchedSearch:
    game = make_game("fourinrow")
    cfg = SearchConfig(algorithm=algorithm, simulations=60, node_capacity_factor=8.0)
    tree = BatchedSearch(game, cfg, 2, capacity=capacity)
    for s in range(2):
        tree.set_root(s, game.initial_state())
        tree.begin(s, 60, False, np.random.default_rng(s))
    while tree.searching_slots():
        tree.run_round(RandomRolloutEvaluator())
    return tree


@pytest.mark.parametrize("algorithm", ["puct", "gumbel"])
def test_reuse_keeps_the_chosen_subtree_exactly(algorithm):
    """With room for another full search the chosen child becomes the root where it lies; with
    too little, its subtree is compacted to the region's front (every kept node, no other);
    either way the statistics under the new root are those the child had."""
    used = int(_searched(algorithm, None).count[1])
    for capacity, in_place in ((None, True), (used + 60, False)):  # used + 60 + 1 rows do not fit
        tree = _searched(algorithm, capacity)
        assert tree.count[1] == used  # the same search
        root = int(tree.root[1])
        action = int(np.argmax(tree.N[root]))
        child = int(tree.child[root, action])
        expected = _subtree(tree, child)
        tree.advance(1, action)
        assert _subtree(tree, int(tree.root[1])) == expected
        if in_place:
            assert tree.root[1] == child and tree.count[1] == used
        else:
            assert tree.root[1] == tree.base[1]
            assert tree.count[1] == _size(expected)   # every kept node, no other


@pytest.mark.parametrize("name,options", [("go", {"size": 5, "tiny": True, "history": 3}),
                                          ("go", {"size": 9, "max_moves": 30}),
                                          ("go", {"size": 7, "superko": False, "allow_suicide": True}),
                                          # superko must refuse a lone stone's suicide (the board again)
                                          ("go", {"size": 4, "tiny": True, "allow_suicide": True, "max_moves": 120}),
                                          ("fourinrow", {}), ("tictactoe", {})])
def test_play_with_mask_and_compact_histories_equal_the_one_state_methods(name, options):
    game = make_game(name, **options)
    rng = np.random.default_rng(3)
    for _ in range(4):
        state = game.initial_state()
        states = [state]
        while not game.is_terminal(state):
            legal = np.flatnonzero(game.legal_mask(state))
            a = int(legal[rng.integers(legal.size)]) if rng.random() > 0.1 else int(legal[-1])
            new, mask = game.play_with_mask(state, a)
            plain = game.play(state, a)
            np.testing.assert_array_equal(mask, game.legal_mask(plain))
            out = np.ones(game.num_actions, dtype=bool)     # stale contents must be overwritten
            again, written = game.play_with_mask(state, a, out)
            assert written is out
            np.testing.assert_array_equal(out, mask)
            assert game.zobrist(again) == game.zobrist(plain)
            np.testing.assert_array_equal(game.compact_history(new), game.compact_history(plain))
            assert game.zobrist(new) == game.zobrist(plain) and game.to_play(new) == game.to_play(plain)
            assert game.is_terminal(new) == game.is_terminal(plain)
            state = new
            states.append(state)
        np.testing.assert_array_equal(game.compact_histories(states),
                                      np.stack([game.compact_history(s) for s in states]))


def test_every_registered_game_has_the_batched_hooks():
    for name in game_names():
        game = make_game(name) if name != "mnk" else make_game(name, m=3, n=3, k=3)
        s0 = game.initial_state()
        a = int(np.flatnonzero(game.legal_mask(s0))[0])
        new, mask = game.play_with_mask(s0, a)
        np.testing.assert_array_equal(mask, game.legal_mask(game.play(s0, a)))
        assert game.compact_histories([s0, new]).shape == (2, game.history_length, *game.compact_shape)


# Games recorded with the numpy search this compiled one replaced (the project at commit
# 4da9413, with the run's one seed derivation, same seeds): the first game's moves and a digest of all four games. PUCT digests cover
# moves, policy targets and root values (float32 arithmetic and exact square roots: the same on
# any x86-64 CPU); Gumbel digests cover the moves only, because numpy's vectorised float64
# log/exp may round differently on CPUs with other vector units, moving probabilities in the
# last bits but not the moves. The compiled round must reproduce them.
RECORDED = {
    "go_puct_virtual_loss": ([27, 3, 2, 9, 34, 5, 8, 11, 30, 1, 12, 49, 63, 75, 59, 26, 17, 0, 44, 42, 57, 2, 4, 79,
                              16, 19, 80, 73, 7, 62, 37, 78, 23, 10, 69, 29, 13, 24, 32, 6],
                             "b28034706d47b7ea8d5132b818b947d6"),
    "go_gumbel": ([51, 74, 38, 3, 55, 59, 12, 42, 8, 32, 28, 63, 15, 80, 0, 44, 69, 24, 39, 11, 30, 10, 22, 48,
                   34, 27, 64, 57, 6, 46, 9, 52, 45, 60, 49, 81, 70, 19, 41, 66],
                  "97d1955bb734d153f2905f698cb97e26"),
    "tictactoe_puct_rollouts": ([6, 8, 2, 0, 4], "2f6778f0b5c8416d1e2846a5af79de4f"),
    "tictactoe_gumbel_rollouts": ([4, 0, 6, 1, 2], "42244e11f433480f098bad6c1ca8bad9"),
}
CASES = {
    "go_puct_virtual_loss": (("go", {"size": 9, "max_moves": 40}), "uniform",
                             dict(simulations=24, leaves_per_game=3, virtual_loss=0.7, full_search_share=0.6,
                                  reduced_simulations=8)),
    "go_gumbel": (("go", {"size": 9, "max_moves": 40}), "uniform",
                  dict(algorithm="gumbel", simulations=24, leaves_per_game=2)),
    "tictactoe_puct_rollouts": (("tictactoe", {}), "rollout", dict(simulations=40)),
    "tictactoe_gumbel_rollouts": (("tictactoe", {}), "rollout",
                                  dict(algorithm="gumbel", simulations=40, gumbel_sampled_moves=4)),
}
ALL_FIELDS = ("actions", "policy_offsets", "policy_actions", "policy_weights", "root_values")


@pytest.mark.parametrize("case", sorted(CASES))
def test_same_seed_plays_the_games_the_numpy_search_played(case):
    (name, options), evaluator, settings = CASES[case]
    game = make_game(name, **options)
    ev = UniformEvaluator() if evaluator == "uniform" else RandomRolloutEvaluator()
    worker = SelfPlayWorker(game, ev, SearchConfig(**settings), games_in_parallel=3, worker_id="w", seed=11,
                            clock=lambda: 0.0)
    records = worker.play_games(4)
    digest = hashlib.sha256()
    fields = ("actions",) if settings.get("algorithm") == "gumbel" else ALL_FIELDS
    for r in records:
        for field in fields:
            digest.update(np.ascontiguousarray(getattr(r, field)).tobytes())
    first, expected = RECORDED[case]
    assert records[0].actions.tolist() == first
    assert digest.hexdigest()[:32] == expected


def test_go_planes_equal_the_plane_definition():
    # The compiled plane builder against the definition in GoGame.planes_from_compact's docstring.
    go = make_game("go", size=9, history=3)
    rng = np.random.default_rng(4)
    boards = rng.integers(0, 3, (20, 3, 9, 9)).astype(np.int8)
    to_play = rng.integers(0, 2, 20).astype(np.int8)
    own = (to_play + 1)[:, None, None, None]
    expected = np.concatenate([
        np.stack([boards == own, (boards != 0) & (boards != own)], axis=2).reshape(20, 6, 9, 9),
        np.broadcast_to((to_play == 0)[:, None, None, None], (20, 1, 9, 9)),
        np.ones((20, 1, 9, 9), bool)], axis=1).astype(np.float32)
    np.testing.assert_array_equal(go.planes_from_compact(boards, to_play), expected)
    np.testing.assert_array_equal(go.planes_from_compact(boards.astype(np.int64), to_play.astype(np.int64)), expected)


def test_move_choice_by_temperature_draws_what_numpy_choice_draws() -> None:
    """choose_by_visits samples N^(1/T) as numpy's Generator.choice(p=...) (the reference
    sampler) does, draw for draw, leaving the generator in the same state."""
    from selfplay.search.puct import choose_by_visits

    for seed in range(500):
        r = np.random.default_rng(seed)
        visits = r.integers(0, 40 if seed % 2 else 5000, 82).astype(np.float32)
        visits[r.random(82) < 0.6] = 0
        visits[int(r.integers(82))] += 1
        t = (1.0, 0.5, 2.0, 0.25, 0.01)[seed % 5]  # 5000 ** 100 would overflow: scaled by the largest count
        w = np.where(visits > 0, (visits.astype(np.float64) / visits.max()) ** (1.0 / t), 0.0)
        mine, ref = np.random.default_rng([seed, 1]), np.random.default_rng([seed, 1])
        assert choose_by_visits(visits, t, mine) == int(ref.choice(82, p=w / w.sum()))
        assert mine.random() == ref.random()


def test_priors_stored_from_logits_are_the_softmax_over_legal_moves():
    """kernels.store_evaluations from logits (the network path) against the numpy softmax
    softmax_over_legal followed by store_evaluations of those priors: the same priors to float32 rounding and exactly the same
    values, Q rows and pending flags; 0 on illegal moves, 1 on a lone legal move; logits that
    would overflow exp unshifted, and a huge logit on an illegal move, change nothing. Deferred
    (nodes not ready when stored, opened afterwards by kernels.open_nodes): bit for bit the
    priors and Q rows of storing from logits at once."""
    from selfplay.evaluators import softmax_over_legal

    rng = np.random.default_rng(21)
    k, A, rows = 40, 82, 100
    logits = rng.normal(scale=3.0, size=(k, A)).astype(np.float32)
    logits[0] += 80.0
    legal = np.zeros((rows, A), dtype=bool)
    nodes = rng.choice(rows, size=k, replace=False).astype(np.int64)
    legal[nodes] = rng.random((k, A)) < 0.7
    legal[nodes[1]] = False
    legal[nodes[1], 5] = True
    logits[2, ~legal[nodes[2]]] = 1e4
    values = rng.uniform(-1, 1, size=k).astype(np.float32)
    out = []
    for from_logits, policy, deferred in ((True, logits, False), (False, softmax_over_legal(logits, legal[nodes]), False),
                                          (True, logits, True)):
        P, Q = np.full((rows, A), 9.0, np.float32), np.full((rows, A), 9.0, np.float32)
        value, pending = np.zeros(rows, np.float32), np.ones(rows, bool)
        ready = np.ones(rows, bool)
        ready[nodes] = not deferred
        masks = np.zeros_like(legal) if deferred else legal  # unknown until the nodes are opened
        assert kernels.store_evaluations(nodes, np.ascontiguousarray(policy), values, 0.25, P, value, Q, masks,
                                         pending, ready, from_logits)
        if deferred:
            assert np.all(Q[nodes] == 9.0) and not pending[nodes].any()
            kernels.open_nodes(nodes, 0.25, P, value, Q, legal, ready)
            assert ready.all()
        out.append((P, Q, value, pending))
    (P, Q, value, pending), (P_ref, Q_ref, value_ref, pending_ref), later = out
    assert all(np.array_equal(x, y) for x, y in zip(later, out[0]))
    np.testing.assert_allclose(P[nodes], P_ref[nodes], rtol=3e-6, atol=1e-9)
    assert np.all(P[nodes][~legal[nodes]] == 0.0) and P[nodes[1], 5] == 1.0
    assert np.array_equal(Q, Q_ref) and np.array_equal(value, value_ref) and np.array_equal(pending, pending_ref)
    # a non-finite logit or value: refused before anything is written
    for bad_logits, bad_values in ((np.where(np.arange(A) == 3, np.nan, logits[:1]), values[:1]),
                                   (logits[:1], np.array([np.inf], np.float32))):
        P = np.full((rows, A), 9.0, np.float32)
        assert not kernels.store_evaluations(nodes[:1], np.ascontiguousarray(bad_logits, dtype=np.float32),
                                             bad_values, 0.25, P, value, Q, legal, pending, np.ones(rows, bool), True)
        assert np.all(P == 9.0)


def test_root_noise_is_the_alphago_zero_mixture_over_legal_moves():
    """add_dirichlet_noise against its formula (Silver et al. 2017, "Mastering the game of Go
    without human knowledge", Methods, "Self-play": P(s, a) = (1 - eps) p_a + eps eta_a with
    eta ~ Dir(alpha)), eta drawn by numpy's Generator.dirichlet (the reference sampler) from the
    same seed over the legal moves only: illegal moves keep their prior, the priors' sum is kept,
    the input is not changed, and eps = 0 leaves the priors as they are. Bit for bit the float32
    numbers numpy's own expression gives with that eta, and the generator left where dirichlet
    leaves it, for alphas on both sides of numpy's switch between its two samplers (0.1)."""
    from selfplay.search.puct import add_dirichlet_noise

    rng = np.random.default_rng(5)
    for trial in range(120):
        legal = rng.random(82) < 0.6
        legal[81] = True
        priors = np.where(legal, rng.random(82), 0.0).astype(np.float32)
        priors /= priors.sum()
        before = priors.copy()
        eps, alpha = [(0.25, 0.03), (0.4, 0.5), (0.25, 0.1733), (0.25, 0.1), (0.3, 0.0999), (0.25, 2.0)][trial % 6]
        mine, ref = np.random.default_rng([trial, 9]), np.random.default_rng([trial, 9])
        got = add_dirichlet_noise(priors, legal, eps, alpha, mine)
        eta = ref.dirichlet(np.full(int(legal.sum()), alpha))
        assert mine.random() == ref.random()
        want = priors.astype(np.float64)
        want[legal] = (1 - eps) * want[legal] + eps * eta
        assert got.dtype == np.float32 and np.array_equal(priors, before)
        np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-8)
        numpy_form = priors.copy()
        numpy_form[legal] = (1.0 - eps) * numpy_form[legal] + eps * eta
        assert np.array_equal(got, numpy_form)
        assert np.all(got[~legal] == priors[~legal]) and abs(float(got.sum()) - 1.0) < 1e-5
    np.testing.assert_array_equal(add_dirichlet_noise(priors, legal, 0.0, 0.3, rng), priors)
