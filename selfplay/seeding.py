"""The one seed derivation of a run: every network, worker, game and buffer seed comes from the
run seed through :func:`derive_seed`, on the Ray path and in-process alike, so the same config and
seed give the same networks and the same games on both."""

from __future__ import annotations

import hashlib
from typing import Union

SeedPart = Union[int, str]


def derive_seed(*parts: SeedPart) -> int:
    """A 63-bit seed from ``parts`` (the run seed first, then names and numbers that tell the
    user of the seed apart, e.g. ``(seed, "worker", session, slot)``).

    The parts are written out as text and hashed with BLAKE2b (8-byte digest), so the value does
    not depend on the Python version, the platform or the process."""
    for p in parts:
        if isinstance(p, bool) or not isinstance(p, (int, str)):
            raise TypeError(f"seed parts are integers or strings, not {type(p).__name__}")
    text = "\x1f".join(f"{type(p).__name__[0]}{p}" for p in parts)
    digest = hashlib.blake2b(text.encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") >> 1


def network_seed(run_seed: int) -> int:
    """Seed of the initial network weights (version 1) of a run."""
    return derive_seed(run_seed, "network")


def worker_seed(run_seed: int, session: int, slot: int, incarnation: str = "") -> int:
    """Seed of self-play worker ``slot`` in session ``session`` of a run; ``incarnation`` is empty
    for a worker's first start and tells a restarted worker (a new process) apart."""
    return derive_seed(run_seed, "worker", session, slot, incarnation)


def game_seed(worker_seed_value: int, game_index: int) -> int:
    """Seed of game ``game_index`` of a worker seeded with ``worker_seed_value``."""
    return derive_seed(worker_seed_value, "game", game_index)


def buffer_seed(run_seed: int, session: int, index: int) -> int:
    """Seed of buffer shard ``index``'s sampling in session ``session``."""
    return derive_seed(run_seed, "buffer", session, index)


def session_tag(session: int) -> str:
    """Prefix of the game ids of session ``session`` (each opening of a run directory is one)."""
    return f"s{session}."
