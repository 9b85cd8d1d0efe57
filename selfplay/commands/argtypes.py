"""Argument types shared by the ``selfplay`` subcommands (argparse ``type=`` callables)."""

from __future__ import annotations

import argparse


def positive_int(text: str) -> int:
    """An integer >= 1 (a count such as ``--last N``); argparse reports anything else."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"{v} must be >= 1")
    return v
