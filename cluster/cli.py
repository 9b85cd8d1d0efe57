"""Commands contributed by the Ray layer's package (registered through the plyfoundry.commands
entry point): ``selfplay run``, whose command line lives in :mod:`selfplay.commands.run` and
imports Ray only to run on it."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> None:
    from selfplay.commands.run import register as register_run

    register_run(sub)
