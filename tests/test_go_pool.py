"""The search's Go position rows (selfplay.games.go_pool) against GoGame.play_with_mask, whose
rules the OEIS counts and the GNU Go checks in tests/test_go_rules.py pin down: random trees grown
and re-rooted as self-play does, every child compared with the position the one-state rules give,
and whole self-play games with and without the pool compared record for record."""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.errors import IllegalMoveError
from selfplay.evaluators import UniformEvaluator
from selfplay.games.go import GoGame
from selfplay.search.config import SearchConfig
from selfplay.worker import SelfPlayWorker


def _same(got, ref) -> None:
    assert np.array_equal(got.history, ref.history) and np.array_equal(got.groups, ref.groups)
    assert np.array_equal(got.seen, ref.seen)
    assert (got.key, got.prev_key, got.player, got.passes, got.moves, got.peak) == \
        (ref.key, ref.prev_key, ref.player, ref.passes, ref.moves, ref.peak)


@pytest.mark.parametrize("options", [{"size": 9}, {"size": 5, "max_moves": 30},
                                     {"size": 7, "superko": False, "allow_suicide": True},
                                     {"size": 4, "tiny": True, "max_moves": 80},
                                     {"size": 4, "tiny": True, "allow_suicide": True, "max_moves": 80}])
@pytest.mark.parametrize("build", [True, False], ids=["built", "deferred"])
def test_pool_rows_grow_and_reroot_like_play_with_mask(options: dict, build: bool) -> None:
    """Trees of 6 games grown one random edge per game per call, re-rooted at a root child every
    few calls (as a move is played); each child row, loaded, equals play_with_mask's state and
    legal mask, through captures, passes, superko refusals and the move cap.

    Deferred: children made without group tables or masks (``build=False``); a random half is
    built with its mask at once and compared, the rest stay unbuilt until a later child, a
    re-rooting or a load needs them (parents without tables, unbuilt rows moved by a re-rooting)."""
    game = GoGame(komi=7.5, **options)
    slots, cap = 6, 24
    pool = game.state_pool(slots, cap)
    legal = np.zeros((slots * cap, game.num_actions), dtype=bool)
    to_play = np.full(slots * cap, -1, dtype=np.int8)
    rng = np.random.default_rng(11)
    trees: list[dict[int, tuple]] = []  # per slot: row -> (reference state, parent row, children rows)

    def new_root(slot: int) -> None:
        base = slot * cap
        s = game.initial_state()
        pool.store_root(slot, base, s)
        legal[base] = game.legal_mask(s)
        if len(trees) <= slot:
            trees.append({})
        trees[slot].clear()
        trees[slot][base] = (s, -1, [])

    for slot in range(slots):
        new_root(slot)
    checked = rerooted = unbuilt_parents = 0
    for step in range(700):
        parents, actions, rows = [], [], []
        for slot in range(slots):
            tree = trees[slot]
            base = slot * cap
            open_rows = [r for r, (s, _, _) in tree.items() if not game.is_terminal(s)]
            if not open_rows:
                new_root(slot)
                continue
            if len(tree) >= cap:
                continue
            p = int(rng.choice(open_rows))
            unbuilt_parents += not pool.built[p]
            choices = np.flatnonzero(game.legal_mask(tree[p][0]))
            parents.append(p)
            actions.append(int(rng.choice(choices)))
            rows.append(base + len(tree))
        ended = pool.expand(np.array(parents), np.array(actions), np.array(rows), legal, to_play, build=build)
        movers = to_play[rows]
        for p, a, r, mover, end in zip(parents, actions, rows, movers, ended):
            slot = r // cap
            ref, mask = game.play_with_mask(trees[slot][p][0], a)
            trees[slot][r] = (ref, p, [])
            trees[slot][p][2].append(r)
            checked += 1
            assert mover == game.to_play(ref) and end == game.is_terminal(ref)
            assert np.array_equal(pool.histories(np.array([r]))[0].reshape(ref.history.shape), ref.history)
            if not build and rng.random() < 0.5:
                continue  # left unbuilt for now
            if not build and not end:
                assert not pool.built[r]
                pool.build(np.array([r]), legal)
            if not end or build:
                # the mask made from the whole key list (the rows look keys up where they lie)
                assert np.array_equal(legal[r], mask) and np.array_equal(mask, game.legal_mask(ref))
            _same(pool.load(r), ref)
        if step % 4 == 3:  # a move is played: the root's busiest child becomes the root
            for slot in range(slots):
                tree = trees[slot]
                base = slot * cap
                kids = tree[base][2]
                if not kids:
                    continue

                def subtree(r: int) -> list[int]:
                    out = [r]
                    for k in tree[r][2]:
                        out += subtree(k)
                    return out

                top = max(kids, key=lambda k: len(subtree(k)))
                keep = np.array(sorted(subtree(top)), dtype=np.int64)
                pool.reroot(slot, keep, base)
                legal[base:base + keep.size] = legal[keep]
                new_row = {int(old): base + i for i, old in enumerate(keep)}
                trees[slot] = {new_row[old]: (tree[old][0], -1 if old == top else new_row[tree[old][1]],
                                              [new_row[k] for k in tree[old][2]]) for old in keep.tolist()}
                for old in keep.tolist():
                    _same(pool.load(new_row[old]), tree[old][0])
                rerooted += 1
    assert checked > 1500 and rerooted > 100
    if not build:
        assert unbuilt_parents > 20


def test_pool_refuses_illegal_moves_with_the_rules_message() -> None:
    game = GoGame(size=5)
    pool = game.state_pool(1, 8)
    legal = np.zeros((8, game.num_actions), dtype=bool)
    to_play = np.zeros(8, dtype=np.int8)
    s = game.play(game.initial_state(), 0)
    pool.store_root(0, 0, s)
    with pytest.raises(IllegalMoveError, match="occupied"):
        pool.expand(np.array([0]), np.array([0]), np.array([1]), legal, to_play)
    over = game.play(game.play(s, game.pass_action), game.pass_action)
    pool.store_root(0, 0, over)
    with pytest.raises(IllegalMoveError, match="game is over"):
        pool.expand(np.array([0]), np.array([game.pass_action]), np.array([1]), legal, to_play)
    with pytest.raises(IllegalMoveError, match="off the 5x5 board"):
        pool.store_root(0, 0, s)
        pool.expand(np.array([0]), np.array([99]), np.array([1]), legal, to_play)


class _NoPoolGo(GoGame):
    """Go whose search keeps a state object per node (the path other games take)."""

    def state_pool(self, slots: int, capacity: int):
        return None


@pytest.mark.parametrize("evaluator,leaves", [("uniform", 1), ("network", 1), ("network", 3)])
@pytest.mark.parametrize("algorithm", ["puct", "gumbel"])
def test_self_play_with_and_without_the_pool_plays_the_same_games(algorithm: str, evaluator: str,
                                                                  leaves: int) -> None:
    """Same seeds, tree reuse on: the pool changes where positions live, never a game. With a
    network (raw logits) the pool also leaves each leaf's groups and legal moves until a descent
    first chooses at it, where the search without a pool works them out at once; with several
    leaves per game, paths that wait for that get their virtual loss as the others do."""
    cfg = SearchConfig(algorithm=algorithm, simulations=24, gumbel_sampled_moves=8, leaves_per_game=leaves)
    records = []
    for game in (GoGame(size=7, max_moves=60), _NoPoolGo(size=7, max_moves=60)):
        if evaluator == "network":
            from selfplay.evaluators import NetworkEvaluator
            from selfplay.network import NetworkConfig, build_network

            ev = NetworkEvaluator(build_network(game, NetworkConfig.tiny(), seed=5), game=game, backend="torch",
                                  precision="float32")
        else:
            ev = UniformEvaluator()
        worker = SelfPlayWorker(game, ev, cfg, games_in_parallel=5, worker_id="t", seed=3)
        assert (worker._tree.pool is not None) == (type(game) is GoGame)
        worker.allow_games(8)
        done = []
        while worker.games_in_flight:
            done.extend(worker.step())
        records.append(sorted(done, key=lambda r: r.game_id))
        if evaluator == "network" and worker._tree.pool is not None:
            assert not worker._tree.ready.all() and not worker._tree.pool.built.all()
    with_pool, without = records
    assert len(with_pool) == 8
    for a, b in zip(with_pool, without):
        assert a.game_id == b.game_id and a.result == b.result
        assert np.array_equal(a.actions, b.actions) and np.array_equal(a.boards, b.boards)
        assert np.array_equal(a.legal, b.legal) and np.array_equal(a.policy_actions, b.policy_actions)
        assert np.array_equal(a.policy_weights, b.policy_weights)
        assert np.array_equal(a.root_values, b.root_values)


def test_a_search_too_big_for_the_memory_limit_keeps_state_objects() -> None:
    game = GoGame(size=19)
    assert game.state_pool(64, 3 * 800 + 2) is None
    assert game.state_pool(2, 66) is not None
