"""Replay buffer: sampled arrays agree with the rules' own encoding, symmetries, window, weighting, RAM."""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.errors import ConfigError, FormatError
from selfplay.games.registry import make_game
from selfplay.records import GameRecordBuilder
from selfplay.replay import synthetic
from selfplay.replay.buffer import BufferEmptyError, ReplayBuffer

TTT = make_game("tictactoe")
GO7 = make_game("go", size=7, history=4)
GO9 = make_game("go", size=9)
C4 = make_game("fourinrow")


def numbered_game(game, rng, gid, first_snapshot, full_share=0.5, max_moves=None, dense=False):
    """A random legal game whose position t carries snapshot ``first_snapshot + t`` (so a sampled
    row can be traced back), with the visit targets kept for checking."""
    b = GameRecordBuilder(gid, game.name, game.options(), "w", 0, {}, 0.0)
    state = game.initial_state()
    states, targets = [], []
    t = 0
    while not game.is_terminal(state) and (max_moves is None or t < max_moves):
        mask = game.legal_mask(state)
        legal = np.flatnonzero(mask)
        a = int(rng.choice(legal))
        acts = legal if dense else np.unique(np.concatenate(([a], rng.choice(legal, size=min(3, len(legal))))))
        w = rng.integers(1, 20, size=acts.size).astype(np.float32)
        full = bool(rng.random() < full_share)
        b.add_position(game.compact(state), game.to_play(state), a, mask, acts, w, 0.0, full,
                       first_snapshot + t)
        dense_t = np.zeros(game.num_actions)
        dense_t[acts] = w
        states.append(state)
        targets.append((dense_t / dense_t.sum(), mask, full))
        state = game.play(state, a)
        t += 1
    return b.finish(int(game.outcome(state)) if game.is_terminal(state) else 0, 0.0), states, targets


def filled(game, n_games=6, capacity=10_000, seed=0, **kw):
    rng = np.random.default_rng(seed)
    buf = ReplayBuffer(game, capacity, seed=seed, **kw)
    table = {}
    for g in range(n_games):
        rec, states, targets = numbered_game(game, rng, f"g{g}", 1000 * g, max_moves=30)
        buf.add(rec)
        for t, (s, tg) in enumerate(zip(states, targets)):
            table[1000 * g + t] = (s, tg, float(rec.outcomes[t]))
    return buf, table


@pytest.mark.parametrize("game", [TTT, GO7, C4], ids=["tictactoe", "go7", "fourinrow"])
def test_samples_agree_with_the_rules_encoding(game):
    buf, table = filled(game, augment=False)
    batch = buf.sample(128)
    assert batch["planes"].shape == (128, *game.input_shape) and batch["planes"].dtype == np.float32
    assert batch["policy"].shape == (128, game.num_actions) and batch["mask"].dtype == bool
    for i, snap in enumerate(batch["snapshot"]):
        state, (policy, mask, full), z = table[int(snap)]
        # the game's own encode() builds history from its states: the buffer must match it
        np.testing.assert_array_equal(batch["planes"][i], game.encode(state))
        np.testing.assert_allclose(batch["policy"][i], policy, rtol=2e-3, atol=1e-4)
        np.testing.assert_array_equal(batch["mask"][i], mask)
        assert batch["value"][i] == z and batch["full_search"][i] == full
    np.testing.assert_allclose(batch["policy"].sum(axis=1), 1.0, rtol=1e-5)


@pytest.mark.parametrize("game", [TTT, GO7, C4], ids=["tictactoe", "go7", "fourinrow"])
def test_symmetry_is_applied_to_boards_policy_and_mask_alike(game):
    buf, table = filled(game, augment=True, seed=3)
    batch = buf.sample(256)
    assert len(set(batch["symmetry"].tolist())) == game.num_symmetries  # every symmetry shows up
    for i, snap in enumerate(batch["snapshot"]):
        state, (policy, mask, _), _ = table[int(snap)]
        k = int(batch["symmetry"][i])
        hist = game.compact_history(state)[None]
        expect = game.planes_from_compact(game.transform_boards(hist, k), np.array([game.to_play(state)]))[0]
        np.testing.assert_array_equal(batch["planes"][i], expect)
        perm = game.action_permutation(k)
        moved_policy = np.zeros_like(policy)
        moved_policy[perm] = policy
        moved_mask = np.zeros_like(mask)
        moved_mask[perm] = mask
        np.testing.assert_allclose(batch["policy"][i], moved_policy, rtol=2e-3, atol=1e-4)
        np.testing.assert_array_equal(batch["mask"][i], moved_mask)
        assert not np.any(batch["policy"][i][~batch["mask"][i]])  # targets only on legal moves


def test_window_keeps_the_newest_positions_and_whole_histories():
    rng = np.random.default_rng(5)
    buf = ReplayBuffer(GO7, 100, augment=False, seed=1)
    table = {}
    for g in range(8):
        rec, states, targets = numbered_game(GO7, rng, f"g{g}", 1000 * g, max_moves=40)
        buf.add(rec)
        for t, s in enumerate(states):
            table[1000 * g + t] = s
    assert len(buf) == 100 and buf.positions_added == 8 * 40
    batch = buf.sample(512)
    newest = sorted(table)[-100:]
    assert set(batch["snapshot"].tolist()) <= set(newest)
    for i, snap in enumerate(batch["snapshot"]):
        # history planes never come from an evicted or foreign position
        np.testing.assert_array_equal(batch["planes"][i], GO7.encode(table[int(snap)]))


def test_policy_targets_only_draws_full_searches():
    buf, table = filled(TTT, n_games=20, augment=False, seed=2)
    batch = buf.sample(300, policy_targets_only=True)
    assert batch["full_search"].all()
    assert all(table[int(s)][1][2] for s in batch["snapshot"])
    assert 0 < buf.policy_target_positions < len(buf)


def test_recency_weighting_tilts_toward_new_positions():
    rec = synthetic.random_record(GO9, np.random.default_rng(0), "x", max_moves=50)
    rec.snapshot = np.arange(50, dtype=np.int32)
    n = 50
    uni = ReplayBuffer(GO9, n, seed=0, augment=False)
    rec_w = ReplayBuffer(GO9, n, recency_weight=3.0, seed=0, augment=False)
    uni.add(rec)
    rec_w.add(rec)
    draws_u = np.concatenate([uni.sample(256)["snapshot"] for _ in range(40)])
    draws_w = np.concatenate([rec_w.sample(256)["snapshot"] for _ in range(40)])
    # density (1 + w x) / (1 + w/2) on [0, 1): mean (1/2 + w/3) / (1 + w/2) = 0.6 for w = 3
    x_w = (draws_w + 0.5) / n
    assert abs(x_w.mean() - 0.6) < 0.01
    assert abs(((draws_u + 0.5) / n).mean() - 0.5) < 0.01
    newest_vs_oldest = np.mean(draws_w >= 45) / np.mean(draws_w < 5)
    assert 2.8 < newest_vs_oldest < 4.5  # linear ramp from 1 to 4 (means 3.85 / 1.15 over the bins)


def test_dense_policies_grow_the_entry_ring():
    rng = np.random.default_rng(9)
    buf = ReplayBuffer(GO7, 300, augment=False, seed=0, initial_entries_per_position=1)
    table = {}
    for g in range(12):
        rec, states, targets = numbered_game(GO7, rng, f"g{g}", 1000 * g, max_moves=30, dense=True)
        buf.add(rec)
        for t, (s, tg) in enumerate(zip(states, targets)):
            table[1000 * g + t] = tg[0]
    assert buf._e_action.shape[0] > 300
    batch = buf.sample(200)
    for i, snap in enumerate(batch["snapshot"]):
        np.testing.assert_allclose(batch["policy"][i], table[int(snap)], rtol=2e-3, atol=1e-4)


def test_a_million_9x9_go_positions_fit_in_a_gibibyte():
    buf = ReplayBuffer(GO9, 1_000_000, seed=0)
    # worst case: the policy-entry ring grown to one entry per action for every position
    assert buf.max_nbytes() <= 2**30
    rec = synthetic.random_record(GO9, np.random.default_rng(1), "x", max_entries=82)
    for i in range(20):
        buf.add(synthetic.with_id(rec, f"x{i}"))
    assert buf.nbytes <= buf.max_nbytes()


def test_bad_input():
    with pytest.raises(ConfigError):
        ReplayBuffer(TTT, 0)
    with pytest.raises(ConfigError):
        ReplayBuffer(TTT, 10, recency_weight=-1)
    buf = ReplayBuffer(TTT, 10)
    with pytest.raises(BufferEmptyError):
        buf.sample(4)
    with pytest.raises(FormatError, match="buffer holds"):
        buf.add(synthetic.random_record(GO7, np.random.default_rng(0), "go"))
    buf.add(synthetic.random_record(TTT, np.random.default_rng(0), "t", game_name="tictactoe",
                                    game_options={}, full_search_share=0.0))
    with pytest.raises(BufferEmptyError, match="full-search"):
        buf.sample(4, policy_targets_only=True)


def test_replay_benchmark_reports_its_figures(capsys):
    import json

    from selfplay.cli import main

    assert main(["bench", "replay", "--json", "--distinct-games", "3", "--positions", "1500", "--batches", "2",
                 "--repeats", "1", "--fill", "2000", "--game", "tictactoe"]) == 0
    figs = json.loads(capsys.readouterr().out)
    for key in ("ingest_ram_positions_per_second", "ingest_disk_positions_per_second",
                "sample_positions_per_second", "disk_bytes_per_position", "ram_bytes_per_position",
                "ram_bytes_for_fill"):
        assert figs[key] > 0, key
    assert figs["fill_positions"] == 2000
    assert main(["bench", "replay", "--repeats", "0"]) == 2


def test_adds_and_samples_from_several_threads():
    import threading

    rng = np.random.default_rng(3)
    base = [synthetic.random_record(GO7, rng, f"b{i}", max_moves=30) for i in range(4)]
    buf = ReplayBuffer(GO7, 500, seed=0)
    buf.add(base[0])
    errors: list[BaseException] = []

    def adder():
        try:
            for i in range(200):
                buf.add(synthetic.with_id(base[i % 4], f"t{i}"))
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    th = threading.Thread(target=adder)
    th.start()
    while th.is_alive():
        b = buf.sample(64)
        np.testing.assert_allclose(b["policy"].sum(axis=1), 1.0, rtol=1e-5)
        assert not np.any(b["policy"][~b["mask"]])
    th.join()
    assert not errors and len(buf) == 500
