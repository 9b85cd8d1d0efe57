"""Root searches: the one small interface each search variant implements, and their registry.

A search variant decides what happens at the root of a search; the tree
(:class:`selfplay.search.tree.BatchedSearch`) does everything else — storage, descent below the
root, expansion, evaluation, backup and reuse — the same way for every variant. A variant:

- ``below_root``: the selection rule the compiled descent uses at every node under the root
  (:data:`RULE_PUCT` or :data:`RULE_GUMBEL`, see :mod:`selfplay.search.kernels`);
- :meth:`RootSearch.start`: once the root is evaluated, set up the search (e.g. add Dirichlet
  noise to the root priors, or draw the Gumbel sample and plan sequential halving);
- :meth:`RootSearch.ready` / :meth:`RootSearch.forced_actions`: which games may start a
  simulation now and, optionally, which root action each must take;
- :meth:`RootSearch.finished`: after each round's backup, which games' searches are complete;
- :meth:`RootSearch.target`: the policy target, root value and (optionally) the chosen move.

Register a new variant in :data:`VARIANTS` (name -> ``"module:Class"``); the name becomes a
valid ``algorithm`` in :class:`selfplay.search.config.SearchConfig`. This module stays light (no
numba, no torch) because the configuration imports it.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from selfplay.games.base import Game
    from selfplay.search.config import SearchConfig
    from selfplay.search.tree import BatchedSearch

#: selection rules of the compiled descent below the root
RULE_PUCT = 0
RULE_GUMBEL = 1

#: algorithm name -> "module:Class" of its RootSearch subclass
VARIANTS: dict[str, str] = {
    "puct": "selfplay.search.puct:PuctRoot",
    "gumbel": "selfplay.search.gumbel:GumbelRoot",
}


@dataclass
class RootTarget:
    """What a finished search hands to the worker: the sparse policy target (actions, weights),
    the root value from the mover's view, and the move the search chose (-1: the caller picks
    one from the visit counts by temperature)."""

    policy_actions: np.ndarray
    policy_weights: np.ndarray
    root_value: float
    chosen: int = -1


class RootSearch:
    """Base class of a root search over the ``slots`` games of one tree; see the module docstring.
    Slot arguments are int64 arrays of slot numbers."""

    below_root: int = RULE_PUCT

    def __init__(self, config: SearchConfig, game: Game, slots: int) -> None:
        self.config = config
        self.game = game
        self.num_slots = slots

    def start(self, tree: BatchedSearch, slot: int) -> None:
        """The root of ``slot`` is evaluated and a search of ``tree.budget[slot]`` simulations
        begins (``tree.full[slot]``, the game's generator ``tree.rngs[slot]``)."""

    def ready(self, tree: BatchedSearch, slots: np.ndarray) -> np.ndarray | None:
        """bool mask over ``slots`` (all with budget left): may this game start a simulation now?
        None: all may (the default)."""
        return None

    def forced_actions(self, tree: BatchedSearch, slots: np.ndarray) -> np.ndarray | None:
        """int64 root action per slot for the simulation about to start (-1: the selection rule
        chooses), or None when the rule chooses for all. Called once per simulation."""
        return None

    def finished(self, tree: BatchedSearch, slots: np.ndarray) -> list[int]:
        """After a round's backup: the slots among ``slots`` (those that walked) whose search is
        complete. Default: when the budget is spent."""
        return slots[tree.budget_left[slots] <= 0].tolist()

    def target(self, tree: BatchedSearch, slot: int) -> RootTarget:
        """Policy target, root value and chosen move of the slot's finished search."""
        raise NotImplementedError


def make_root_search(config: SearchConfig, game: Game, slots: int) -> RootSearch:
    """The RootSearch registered under ``config.algorithm``."""
    module_name, class_name = VARIANTS[config.algorithm].split(":")
    cls: Any = getattr(importlib.import_module(module_name), class_name)
    return cls(config, game, slots)
