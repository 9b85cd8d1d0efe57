"""Guided tree search: PUCT (AlphaGo Zero / AlphaZero) and Gumbel root search (Danihelka et al.
2022), over many games at once with one batched evaluation per simulation round.

- :mod:`selfplay.search.config` — :class:`SearchConfig`, every setting validated and described.
- :mod:`selfplay.search.tree` — :class:`BatchedSearch`, the array-backed trees and the round loop.
- :mod:`selfplay.search.kernels` — the compiled round: descent, virtual loss, backup, subtree reuse.
- :mod:`selfplay.search.root` — :class:`RootSearch`, the interface of a root search, and the registry.
- :mod:`selfplay.search.puct` — PUCT selection, root Dirichlet noise, temperature move choice; PuctRoot.
- :mod:`selfplay.search.gumbel` — Gumbel top-m, sequential halving, completed Q, improved policy; GumbelRoot.
"""

from typing import Any

from selfplay.search.config import SearchConfig

__all__ = ["BatchedSearch", "SearchConfig", "SearchResult", "search_states"]


def __getattr__(name: str) -> Any:
    # The tree pulls in the evaluators and so torch; load it on first use, so that reading a
    # configuration (SearchConfig) stays light.
    if name in ("BatchedSearch", "SearchResult", "search_states"):
        from selfplay.search import tree

        return getattr(tree, name)
    raise AttributeError(f"module 'selfplay.search' has no attribute {name!r}")
