"""Elo ratings of players from stored game results, by Bradley–Terry maximum likelihood.

Model (R. A. Bradley and M. E. Terry, "Rank analysis of incomplete block designs: I. The method
of paired comparisons", Biometrika 39, 1952), on the Elo scale (A. E. Elo, "The Rating of
Chessplayers, Past and Present", 1978): player ``i`` scores against player ``j`` with expected
score ``p_ij = 1 / (1 + 10^(-(r_i - r_j) / 400))``. A game scores 1 for a win, 1/2 for a draw and
0 for a loss, and the ratings maximise

    L(r) = sum over games of  s log p + (1 - s) log(1 - p)

(draws count half: a draw adds half a win and half a loss). Only differences are determined, so
one player, the *anchor*, is fixed at 0. The maximum is found by Newton's method on the
anchor-free ratings; the 95% interval of each rating is ``r ± 1.96 σ`` with ``σ²`` the diagonal of
the inverse observed Fisher information (the negative Hessian of ``L`` at the maximum), i.e. the
usual Wald interval of a maximum-likelihood estimate, relative to the anchor.

A player who won (or lost) every game has no finite maximum. ``prior_draws`` adds that many
virtual drawn games to every pair of players that met (a weak prior that pulls the pair towards
equal strength; common practice in rating programs), which keeps every rating finite; 0 gives the
plain maximum-likelihood fit. Players whose games do not connect them to the anchor get no rating.
"""

from __future__ import annotations

import math
from collections import defaultdict
from dataclasses import dataclass
from typing import Iterable, Mapping

import numpy as np

from selfplay.errors import ConfigError

#: natural-log slope of the Elo curve: d/dD of ln(odds) = ln(10) / 400
ELO_SLOPE = math.log(10.0) / 400.0
#: ratings beyond this (Elo points from the anchor) mean the fit has no finite maximum
MAX_ELO = 4000.0
#: two-sided 95% quantile of the standard normal distribution
Z95 = 1.959963984540054


def expected_score(rating_difference: float | np.ndarray) -> float | np.ndarray:
    """Elo's expected score of a player rated ``rating_difference`` points above its opponent:
    ``1 / (1 + 10^(-D / 400))``."""
    return 1.0 / (1.0 + np.power(10.0, -np.asarray(rating_difference, dtype=np.float64) / 400.0))


@dataclass
class PairRecord:
    """Games between two players, from ``a``'s view."""

    a: str
    b: str
    wins: float = 0.0
    draws: float = 0.0
    losses: float = 0.0

    @property
    def games(self) -> float:
        return self.wins + self.draws + self.losses


@dataclass
class Rating:
    """One player's row of a fit: Elo relative to the anchor with its 95% interval (None when
    the player is not connected to the anchor), and its own games (virtual draws excluded)."""

    player: str
    elo: float | None
    elo_low: float | None
    elo_high: float | None
    games: int
    wins: int
    draws: int
    losses: int

    @property
    def score(self) -> float | None:
        return (self.wins + 0.5 * self.draws) / self.games if self.games else None

    def to_dict(self) -> dict[str, object]:
        return {"player": self.player, "elo": _round(self.elo), "elo_low": _round(self.elo_low),
                "elo_high": _round(self.elo_high), "games": self.games, "wins": self.wins,
                "draws": self.draws, "losses": self.losses}


def _round(x: float | None) -> float | None:
    return None if x is None else round(float(x), 1)


def tally(results: Iterable[tuple[str, str, float]]) -> dict[tuple[str, str], PairRecord]:
    """Pair records from single games ``(player, opponent, score of player in {0, 0.5, 1})``.

    Keys are ordered name pairs ``(a, b)`` with ``a < b``; counts are from ``a``'s view."""
    pairs: dict[tuple[str, str], PairRecord] = {}
    for p, q, s in results:
        if p == q:
            raise ConfigError(f"a game of {p!r} against itself cannot be rated")
        if s not in (0, 0.5, 1):
            raise ConfigError(f"game score {s!r} of {p!r} against {q!r} must be 0, 0.5 or 1")
        a, b = (p, q) if p < q else (q, p)
        s_a = s if a == p else 1.0 - s
        rec = pairs.setdefault((a, b), PairRecord(a, b))
        if s_a == 1:
            rec.wins += 1
        elif s_a == 0:
            rec.losses += 1
        else:
            rec.draws += 1
    return pairs


def _component(start: str, neighbours: Mapping[str, set[str]]) -> set[str]:
    seen, todo = {start}, [start]
    while todo:
        for n in neighbours[todo.pop()]:
            if n not in seen:
                seen.add(n)
                todo.append(n)
    return seen


def fit_ratings(pairs: Mapping[tuple[str, str], PairRecord] | Iterable[PairRecord], anchor: str,
                prior_draws: float = 1.0, max_iterations: int = 200) -> dict[str, Rating]:
    """Bradley–Terry maximum-likelihood Elo of every player in ``pairs``, ``anchor`` at 0.

    ``prior_draws`` virtual draws are added to every pair that played (see the module
    docstring). Returns player -> :class:`Rating`; players not connected to the anchor by games
    have ``elo`` None. ConfigError if the anchor played no game."""
    records = list(pairs.values()) if isinstance(pairs, Mapping) else list(pairs)
    if prior_draws < 0 or not math.isfinite(prior_draws):
        raise ConfigError(f"prior_draws={prior_draws} must be a finite number >= 0")
    neighbours: dict[str, set[str]] = defaultdict(set)
    own: dict[str, list[float]] = defaultdict(lambda: [0.0, 0.0, 0.0])
    for r in records:
        if r.games <= 0:
            continue
        neighbours[r.a].add(r.b)
        neighbours[r.b].add(r.a)
        own[r.a][0] += r.wins
        own[r.a][1] += r.draws
        own[r.a][2] += r.losses
        own[r.b][0] += r.losses
        own[r.b][1] += r.draws
        own[r.b][2] += r.wins
    if anchor not in neighbours:
        raise ConfigError(f"the anchor {anchor!r} has played no rated game")
    connected = _component(anchor, neighbours)
    free = sorted(connected - {anchor})
    index = {name: i for i, name in enumerate(free)}
    # per pair: index of a and b among the free players (-1 = anchor), games n, score S of a
    ia, ib, n, s = [], [], [], []
    for r in records:
        if r.games <= 0 or r.a not in connected:
            continue
        ia.append(index.get(r.a, -1))
        ib.append(index.get(r.b, -1))
        n.append(r.games + prior_draws)
        s.append(r.wins + 0.5 * r.draws + 0.5 * prior_draws)
    ia_arr, ib_arr = np.array(ia, dtype=np.int64), np.array(ib, dtype=np.int64)
    n_arr, s_arr = np.array(n, dtype=np.float64), np.array(s, dtype=np.float64)
    k = len(free)
    theta = np.zeros(k)  # ratings in Elo points of the free players
    cov = np.zeros((k, k))
    if k:
        theta, cov = _newton(ia_arr, ib_arr, n_arr, s_arr, k, max_iterations)
    out: dict[str, Rating] = {}
    for name in sorted(neighbours):
        w, d, l_ = (int(round(x)) for x in own[name])
        if name == anchor:
            out[name] = Rating(name, 0.0, 0.0, 0.0, w + d + l_, w, d, l_)
        elif name in index:
            i = index[name]
            r_i = float(theta[i])
            half = Z95 * math.sqrt(max(float(cov[i, i]), 0.0))
            out[name] = Rating(name, r_i, r_i - half, r_i + half, w + d + l_, w, d, l_)
        else:
            out[name] = Rating(name, None, None, None, w + d + l_, w, d, l_)
    return out


def _newton(ia: np.ndarray, ib: np.ndarray, n: np.ndarray, s: np.ndarray, k: int,
            max_iterations: int) -> tuple[np.ndarray, np.ndarray]:
    """Maximise the log-likelihood over the free ratings (Elo points); return them and their
    covariance (inverse observed information). Raises ConfigError if there is no finite maximum."""
    theta = np.zeros(k)
    ext = np.zeros(k + 1)  # ratings with the anchor appended at index k (= -1)
    info = np.zeros((k, k))
    converged = False
    for _ in range(max_iterations):
        ext[:k] = theta
        d = ext[ia] - ext[ib]
        p = 1.0 / (1.0 + np.exp(-ELO_SLOPE * d))
        resid = s - n * p  # d logL / d(r_a), per pair, over ELO_SLOPE
        grad_ext = np.zeros(k + 1)
        np.add.at(grad_ext, ia, resid)
        np.add.at(grad_ext, ib, -resid)
        w = n * p * (1.0 - p)
        info_ext = np.zeros((k + 1, k + 1))
        np.add.at(info_ext, (ia, ia), w)
        np.add.at(info_ext, (ib, ib), w)
        np.add.at(info_ext, (ia, ib), -w)
        np.add.at(info_ext, (ib, ia), -w)
        grad = ELO_SLOPE * grad_ext[:k]
        info = ELO_SLOPE ** 2 * info_ext[:k, :k]
        try:
            step = np.linalg.solve(info, grad)
        except np.linalg.LinAlgError:
            step = np.linalg.lstsq(info, grad, rcond=None)[0]
        biggest = float(np.max(np.abs(step))) if k else 0.0
        if biggest > 400.0:  # damped: no rating moves more than 400 points per iteration
            step *= 400.0 / biggest
        theta = theta + step
        if biggest < 1e-6:
            converged = True
            break
    # a separated record drives a rating out until 10^(D/400) overflows the float's precision
    # (p rounds to 1 and the step to 0): no real result set puts a player this far away
    if not converged or (k and float(np.max(np.abs(theta))) > MAX_ELO):
        raise ConfigError("the ratings have no finite maximum (some players won or lost every game "
                          "against the rest); fit with prior_draws > 0")
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        cov = np.full((k, k), np.inf)
    return theta, cov


__all__ = ["ELO_SLOPE", "PairRecord", "Rating", "Z95", "expected_score", "fit_ratings", "tally"]
