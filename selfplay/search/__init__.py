"""Guided tree search: PUCT (AlphaGo Zero / AlphaZero) and Gumbel root search (Danihelka et al.
2022), over many games at once with one batched evaluation per simulation round.

- :mod:`selfplay.search.config` — :class:`SearchConfig`, every setting validated and described.
- :mod:`selfplay.search.tree` — :class:`BatchedSearch`, the array-backed trees and the round loop.
- :mod:`selfplay.search.puct` — PUCT selection, root Dirichlet noise, temperature move choice.
- :mod:`selfplay.search.gumbel` — Gumbel top-m, sequential halving, completed Q, improved policy.
"""

from selfplay.search.config import SearchConfig
from selfplay.search.tree import BatchedSearch, SearchResult, search_states

__all__ = ["BatchedSearch", "SearchConfig", "SearchResult", "search_states"]
