"""Commands contributed by the Ray layer (registered through the plyfoundry.commands entry point)."""

from __future__ import annotations

import argparse
import importlib


def register(sub: argparse._SubParsersAction) -> None:
    try:
        launcher = importlib.import_module("cluster.launcher")
    except ModuleNotFoundError as exc:
        if exc.name == "cluster.launcher":
            return
        raise
    launcher.register(sub)
