"""Small runs for the strength tests: a run directory with run.toml and published snapshots of a
tiny untrained network (enough for legality and protocol checks, not for strength)."""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Any

import torch

from selfplay.config import config_from_dict, dump_config
from selfplay.games.registry import make_game
from selfplay.network import build_network
from selfplay.rundir import RunDir, atomic_write_bytes
from selfplay.snapshots import SnapshotStore

ROOT = Path(__file__).resolve().parents[1]


def make_run(path: Path, game: str, options: dict[str, Any], snapshots: int = 1,
             simulations: int = 8) -> RunDir:
    """A run directory for ``game`` with ``snapshots`` published versions of a 1x16 network
    (each from another seed, so they play differently)."""
    cfg = config_from_dict({"game": {"name": game, "options": options},
                            "network": {"blocks": 1, "channels": 16, "value_hidden": 16},
                            "search": {"simulations": simulations}})
    run = RunDir.create(path)
    atomic_write_bytes(run.config, dump_config(cfg).encode())
    g = make_game(cfg.game.name, **cfg.game.options)
    store = SnapshotStore(run, source="test")
    for seed in range(snapshots):
        net = build_network(g, cfg.network, seed=seed)
        with torch.no_grad():  # a stronger pull away from uniform priors than the fresh init
            for p in net.parameters():
                p.mul_(1.5)
        store.publish(net)
    return run


def cli_env() -> dict[str, str]:
    """Environment for ``python -m selfplay.cli`` subprocesses that import this checkout."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def cli_argv(*args: str) -> list[str]:
    return [sys.executable, "-m", "selfplay.cli", *args]
