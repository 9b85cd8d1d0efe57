"""Resignation threshold kept honest by the games played with resignation switched off.

AlphaGo Zero (Silver et al. 2017, *Mastering the game of Go without human knowledge*, Methods:
"Self-play") disables resignation in 10% of self-play games and chooses the resignation
threshold automatically so that fewer than 5% of the games it would end are games the resigning
player could still have won. :class:`ResignCalibration` does that for one worker: each probe game
(resignation off) contributes, for each player, the lowest root value that player saw (mover's
view) and whether that player went on to lose. At threshold ``t`` the players whose lowest value
fell below ``t`` would have resigned; the false-positive rate at ``t`` is the share of them that
did not lose (won or drew). The threshold is the highest ``t`` not above the configured
``resign_threshold`` whose rate is at most the target, over the last ``window`` observations;
with fewer than ``min_evidence`` would-resign players at the configured threshold the configured
value stands. No threshold meets the target: resignation is off (threshold -1) until one does.
"""

from __future__ import annotations

from collections import deque

import numpy as np

#: threshold meaning "never resign" (root values are never below -1)
NEVER = -1.0


class ResignCalibration:
    """The resignation threshold of one worker; see the module docstring."""

    def __init__(self, ceiling: float, target: float, window: int = 1000, min_evidence: int = 20) -> None:
        if not -1.0 < ceiling < 1.0:
            raise ValueError(f"resign threshold {ceiling} must lie in (-1, 1)")
        if not 0.0 < target < 1.0:
            raise ValueError(f"false-positive target {target} must lie in (0, 1)")
        self.ceiling = float(ceiling)
        self.target = float(target)
        self.min_evidence = int(min_evidence)
        self._seen: deque[tuple[float, bool]] = deque(maxlen=int(window))
        self.threshold = self.ceiling

    def observe(self, lowest_value: float, not_lost: bool) -> float:
        """One player of a finished probe game: the lowest root value it saw (its view) and
        whether it won or drew. Returns the threshold from now on."""
        self._seen.append((float(lowest_value), bool(not_lost)))
        self.threshold = self._choose()
        return self.threshold

    def false_positive_rate(self, threshold: float) -> float | None:
        """Share of the would-resign players at ``threshold`` that did not lose (None: none would)."""
        flagged = [ok for low, ok in self._seen if low < threshold]
        return sum(flagged) / len(flagged) if flagged else None

    def _choose(self) -> float:
        lows = np.array([low for low, _ in self._seen], dtype=np.float64)
        oks = np.array([ok for _, ok in self._seen], dtype=np.float64)
        at_ceiling = lows < self.ceiling
        if at_ceiling.sum() < self.min_evidence:
            return self.ceiling
        if oks[at_ceiling].mean() <= self.target:
            return self.ceiling
        # candidates: resign below each observed lowest value (under the ceiling), highest first;
        # at t = lows[k] the flagged players are those strictly below it
        order = np.argsort(lows, kind="stable")
        lows, oks = lows[order], oks[order]
        cum_ok = np.cumsum(oks)
        for k in range(int(at_ceiling.sum()) - 1, 0, -1):
            t = lows[k]
            flagged = int(np.searchsorted(lows, t, side="left"))  # strictly below t
            if flagged == 0:
                break
            if cum_ok[flagged - 1] / flagged <= self.target:
                return float(t)
        return NEVER
