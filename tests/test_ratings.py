"""Bradley–Terry Elo fits (selfplay.ratings) against the published formulas.

Sources: Elo's expected score E = 1 / (1 + 10^(-D/400)) (A. E. Elo, "The Rating of Chessplayers,
Past and Present", 1978); the Bradley–Terry model (Bradley & Terry, Biometrika 39, 1952) whose
two-player maximum-likelihood estimate is the logit of the observed score; Wald intervals of a
maximum-likelihood estimate cover the true value about 95% of the time (standard large-sample
theory of maximum likelihood).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from selfplay.errors import ConfigError
from selfplay.evaluation import elo_difference
from selfplay.ratings import PairRecord, expected_score, fit_ratings, tally


@pytest.mark.parametrize("diff, expected", [
    (0, 0.5),                    # equal ratings: an even score (Elo)
    (400, 10 / 11),              # 400 points: odds 10 to 1 (Elo's scale definition)
    (-400, 1 / 11),
    (800, 100 / 101),            # 800 points: odds 100 to 1
    (200, 1 / (1 + 10 ** -0.5)),  # 0.7597, the value in Elo-table lookups (from memory: 0.76)
])
def test_expected_score_worked_values(diff: float, expected: float) -> None:
    assert expected_score(diff) == pytest.approx(expected, rel=1e-12)


def test_expected_score_200_points_is_about_76_percent() -> None:
    # from memory: the usual table gives 0.76 for a 200-point difference
    assert round(float(expected_score(200)), 2) == 0.76


def test_two_players_fit_is_the_logit_of_the_score() -> None:
    # Bradley–Terry with two players: the MLE difference solves E(D) = observed score
    pairs = tally([("a", "b", 1.0)] * 30 + [("a", "b", 0.5)] * 10 + [("a", "b", 0.0)] * 10)
    r = fit_ratings(pairs, anchor="b", prior_draws=0.0)
    score = (30 + 5) / 50
    assert r["b"].elo == 0.0
    assert r["a"].elo == pytest.approx(elo_difference(score), abs=1e-6)
    assert expected_score(r["a"].elo) == pytest.approx(score, abs=1e-9)
    # the Wald interval of two players: sigma^2 = 1 / (n p (1-p) k^2), k = ln 10 / 400
    k = math.log(10) / 400
    sigma = 1 / math.sqrt(50 * score * (1 - score) * k * k)
    assert r["a"].elo_high - r["a"].elo == pytest.approx(1.959964 * sigma, rel=1e-5)
    assert (r["a"].wins, r["a"].draws, r["a"].losses, r["a"].games) == (30, 10, 10, 50)


def test_anchor_choice_only_shifts_ratings() -> None:
    rng = np.random.default_rng(5)
    true = {"p": 0.0, "q": 150.0, "r": -120.0, "s": 300.0}
    games = _round_robin(true, 30, rng)
    by_p = fit_ratings(tally(games), anchor="p", prior_draws=0.0)
    by_s = fit_ratings(tally(games), anchor="s", prior_draws=0.0)
    shift = by_p["s"].elo
    for name in true:
        assert by_s[name].elo == pytest.approx(by_p[name].elo - shift, abs=1e-4)


def _round_robin(true: dict[str, float], games_per_pair: int, rng: np.random.Generator,
                 draw_share: float = 0.0) -> list[tuple[str, str, float]]:
    """Games drawn from the Bradley–Terry model with the given ratings; with ``draw_share`` a
    game is a draw with that probability and otherwise won so that the expected score is E."""
    out = []
    names = sorted(true)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            e = float(expected_score(true[a] - true[b]))
            for _ in range(games_per_pair):
                u = rng.random()
                if u < draw_share:
                    out.append((a, b, 0.5))
                else:
                    p_win = (e - draw_share / 2) / (1 - draw_share)
                    out.append((a, b, 1.0 if rng.random() < p_win else 0.0))
    return out


@pytest.mark.parametrize("draw_share", [0.0, 0.2])
def test_intervals_cover_the_true_ratings_about_95_percent(draw_share: float) -> None:
    """Ratings drawn from known values are recovered within their intervals about 95% of the
    time over repeated seeded draws (large-sample coverage of Wald intervals)."""
    true = {"v1": 0.0, "v2": 80.0, "v3": 200.0, "v4": -100.0, "mcts": 350.0}
    hits = total = 0
    errors = []
    for rep in range(300):
        rng = np.random.default_rng([2024, rep])
        ratings = fit_ratings(tally(_round_robin(true, 40, rng, draw_share)), anchor="v1", prior_draws=0.0)
        for name, value in true.items():
            if name == "v1":
                continue
            r = ratings[name]
            total += 1
            hits += r.elo_low <= value <= r.elo_high
            errors.append(r.elo - value)
    coverage = hits / total
    assert 0.93 <= coverage <= 0.985, coverage  # draws make the interval a little wide, not narrow
    assert abs(float(np.mean(errors))) < 5.0  # close to unbiased (Elo points)


def test_perfect_score_needs_the_prior() -> None:
    games = [("a", "b", 1.0)] * 10
    with pytest.raises(ConfigError, match="no finite maximum"):
        fit_ratings(tally(games), anchor="b", prior_draws=0.0)
    r = fit_ratings(tally(games), anchor="b", prior_draws=1.0)
    # one virtual draw: score 10.5 / 11
    assert r["a"].elo == pytest.approx(elo_difference(10.5 / 11), abs=1e-6)
    assert r["a"].games == 10 and r["a"].wins == 10


def test_players_not_connected_to_the_anchor_get_no_rating() -> None:
    games = [("a", "b", 1.0), ("a", "b", 0.0), ("c", "d", 1.0), ("c", "d", 0.5)]
    r = fit_ratings(tally(games), anchor="a")
    assert r["b"].elo == pytest.approx(0.0, abs=1e-9)
    assert r["c"].elo is None and r["d"].elo_low is None
    assert r["c"].games == 2


def test_bad_input_is_refused_by_name() -> None:
    with pytest.raises(ConfigError, match="against itself"):
        tally([("a", "a", 1.0)])
    with pytest.raises(ConfigError, match="must be 0, 0.5 or 1"):
        tally([("a", "b", 0.7)])
    with pytest.raises(ConfigError, match="anchor 'z'"):
        fit_ratings([PairRecord("a", "b", 1, 0, 1)], anchor="z")
    with pytest.raises(ConfigError, match="prior_draws"):
        fit_ratings([PairRecord("a", "b", 1, 0, 1)], anchor="a", prior_draws=-1)
