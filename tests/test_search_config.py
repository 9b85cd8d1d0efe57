"""Search settings: bad values are refused with the field named; the published defaults hold."""

from __future__ import annotations

import pytest
from pydantic import ValidationError

from selfplay.errors import ConfigError
from selfplay.games.mnk import MNKGame, tictactoe
from selfplay.search import SearchConfig


@pytest.mark.parametrize("field,value", [
    ("simulations", 0),
    ("simulations", -5),
    ("temperature", -0.1),
    ("final_temperature", -1.0),
    ("rollout_mix_lambda", -0.01),
    ("rollout_mix_lambda", 1.5),
    ("dirichlet_epsilon", 1.2),
    ("full_search_share", -0.5),
    ("resign_probe_fraction", 2.0),
    ("resign_threshold", -1.0),
    ("leaves_per_game", 0),
    ("c_puct", 0.0),
    ("gumbel_sampled_moves", 0),
    ("algorithm", "minimax"),
])
def test_bad_values_name_the_field(field, value):
    with pytest.raises(ValidationError) as exc:
        SearchConfig(**{field: value})
    assert field in str(exc.value)
    with pytest.raises(ConfigError) as exc2:
        SearchConfig.parse({field: value})
    assert f"search.{field}" in str(exc2.value)


def test_unknown_field_and_inconsistent_budgets_are_refused():
    with pytest.raises(ConfigError, match="simulatons"):
        SearchConfig.parse({"simulatons": 10})
    with pytest.raises(ConfigError, match="reduced_simulations"):
        SearchConfig.parse({"simulations": 16, "reduced_simulations": 32})
    # left unset, the reduced budget follows a small full budget down
    assert SearchConfig(simulations=8).reduced_simulations == 8
    assert SearchConfig(simulations=8).model_dump()["reduced_simulations"] == 8


def test_published_defaults():
    cfg = SearchConfig()
    # AlphaGo Zero / AlphaZero: epsilon 0.25; resignation disabled in 10% of games.
    assert cfg.dirichlet_epsilon == 0.25
    assert cfg.resign_probe_fraction == 0.1
    # Danihelka et al. 2022: m = 16 considered actions, c_visit = 50, c_scale = 1.
    assert (cfg.gumbel_sampled_moves, cfg.gumbel_c_visit, cfg.gumbel_c_scale) == (16, 50.0, 1.0)
    # every field carries a description
    assert all(f.description for f in SearchConfig.model_fields.values())


def test_default_alpha_is_inversely_proportional_to_legal_moves():
    cfg = SearchConfig()
    small, large = tictactoe(), MNKGame(15, 15, 5)
    assert cfg.alpha_for(small) == pytest.approx(10 / small.typical_legal_moves)
    assert cfg.alpha_for(large) == pytest.approx(10 / large.typical_legal_moves)
    # AlphaZero's 0.03 for Go (about 250 typical legal moves on 19x19, from the papers'
    # inverse-proportional rule) and 0.3 for chess (about 35): the rule 10 / moves gives both.
    assert 10 / 250 == pytest.approx(0.04, abs=0.011)
    assert 10 / 35 == pytest.approx(0.3, abs=0.02)
    assert SearchConfig(dirichlet_alpha=0.5).alpha_for(large) == 0.5


def test_temperature_schedule():
    cfg = SearchConfig(temperature=1.0, temperature_moves=3, final_temperature=0.0)
    assert [cfg.temperature_at(i) for i in range(5)] == [1.0, 1.0, 1.0, 0.0, 0.0]


def test_precomputed_q_selection_matches_the_formula():
    # AlphaGo Zero's PUCT written out (selfplay.search.puct.puct_select) against the tree's fast form
    import numpy as np

    from selfplay.search.puct import puct_select, puct_select_q
    rng = np.random.default_rng(0)
    for _ in range(50):
        k, A = 7, 10
        legal = rng.random((k, A)) < 0.7
        legal[:, 0] = True
        P = np.where(legal, rng.random((k, A)), 0).astype(np.float32)
        P /= P.sum(axis=1, keepdims=True)
        N = np.where(legal, rng.integers(0, 4, (k, A)), 0).astype(np.float32)
        W = (N * rng.uniform(-1, 1, (k, A))).astype(np.float32)
        v = rng.uniform(-1, 1, k).astype(np.float32)
        fpu = 0.2
        Q = np.where(N > 0, W / np.maximum(N, 1), (v - fpu)[:, None])
        Q = np.where(legal, Q, -np.inf).astype(np.float32)
        np.testing.assert_array_equal(puct_select(P, N, W, legal, v, 1.3, fpu),
                                      puct_select_q(P, N, Q, N.sum(axis=1), 1.3))
