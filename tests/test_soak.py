"""A short soak with faults (scripts/soak.py): self-play on a simulated multi-node Ray cluster
(every node on 127.0.0.1) while a worker actor, the buffer actor, the learner actor and a worker
node are killed at seeded random times, then `selfplay run --resume` killed with SIGKILL. Nothing
the run counted as stored may be lost (the rules of docs/reliability.md)."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

pytestmark = [pytest.mark.ray, pytest.mark.slow]

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "scripts"))


def test_a_short_soak_with_every_kind_of_fault_loses_no_counted_game(tmp_path):
    import soak

    fig = soak.run_soak(tmp_path / "soak", minutes=1.0, seed=7, rounds=1, faults_per_round=4,
                        cluster_seconds=28.0, driver_seconds=3.0, say=lambda line: None)
    # every kind of fault was injected: one of each in the cluster part, then the driver
    injected = {k for k, n in fig["faults_by_kind"].items() if n}
    assert injected == {"worker", "buffer", "learner", "node", "driver"}, fig["faults"]
    assert fig["problems"] == [], fig["problems"]
    assert all(fig["checks"].values()), fig["checks"]
    assert fig["games_lost"] == 0
    # games were stored before the last fault and after it the count only grew
    assert fig["max_count_seen"] > 0 and fig["games_final"] >= fig["max_count_seen"]
    assert fig["ids_counted"] <= fig["games_final"]
    assert fig["verify_first_pass"]["games"] == fig["games_final"]
