"""Line detection on bitboards held in Python integers (shared by the m,n,k and gravity games).

A board of ``height`` rows of ``width`` cells is laid out with one always-empty guard cell after
each row (or column), so that shifting a bitboard by a direction's stride never carries a line
across the board's edge; ``k`` in a row is then found with a handful of shifts and ANDs,
whatever the board's size.
"""

from __future__ import annotations

from typing import Sequence


def has_run(bits: int, strides: Sequence[int], k: int) -> bool:
    """True if ``bits`` holds ``k`` set bits spaced by one of ``strides`` (``k`` in a row).

    ``run`` starts as the cells that begin a run of length 1; doubling with a shift and AND
    reaches the largest power of two ``L <= k``, and one more overlapped AND (shift ``k - L``,
    which is at most ``L``) leaves the cells that begin a run of ``k``."""
    for d in strides:
        run = bits
        length = 1
        while 2 * length <= k:
            run &= run >> (length * d)
            length *= 2
        if length < k:
            run &= run >> ((k - length) * d)
        if run:
            return True
    return False
