"""Zobrist keys that are the same on every machine and every library version.

Keys come from the splitmix64 generator (G. Steele, D. Lea and C. Flood, "Fast splittable
pseudorandom number generators", OOPSLA 2014), written out here so that a game's hashes never
depend on a library's random stream.
"""

from __future__ import annotations

_MASK64 = (1 << 64) - 1


def splitmix64(seed: int, count: int) -> list[int]:
    """The first ``count`` outputs of splitmix64 started at ``seed``, as unsigned 64-bit ints."""
    out = []
    x = seed & _MASK64
    for _ in range(count):
        x = (x + 0x9E3779B97F4A7C15) & _MASK64
        z = x
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK64
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK64
        out.append(z ^ (z >> 31))
    return out


def zobrist_keys(seed: int, count: int) -> list[int]:
    """``count`` non-zero keys in [1, 2**63): XORs of them stay non-negative and below 2**63."""
    keys = [k >> 1 for k in splitmix64(seed, count)]
    return [k if k else 1 for k in keys]
