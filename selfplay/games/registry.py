"""Game registry: build a game from its name and options, with clear errors for bad ones."""

from __future__ import annotations

import inspect
from typing import Any, Callable

from selfplay.errors import ConfigError, UnknownGameError
from selfplay.games.base import Game

_FACTORIES: dict[str, Callable[..., Game]] = {}


def register_game(name: str, factory: Callable[..., Game]) -> None:
    """Make ``make_game(name, **options)`` call ``factory(**options)``."""
    _FACTORIES[name] = factory


def _load_builtin() -> None:
    # Imported lazily so that importing the registry stays cheap and cycle-free.
    import selfplay.games.fourinrow  # noqa: F401
    import selfplay.games.go  # noqa: F401
    import selfplay.games.mnk  # noqa: F401


def game_names() -> list[str]:
    """Names of every registered game."""
    _load_builtin()
    return sorted(_FACTORIES)


def make_game(name: str, **options: Any) -> Game:
    """Build the game ``name`` with ``options``; unknown names or options raise ConfigError."""
    _load_builtin()
    if name not in _FACTORIES:
        raise UnknownGameError(f"unknown game {name!r}; known games: {', '.join(sorted(_FACTORIES))}")
    factory = _FACTORIES[name]
    params = inspect.signature(factory).parameters
    if not any(p.kind is p.VAR_KEYWORD for p in params.values()):
        unknown = sorted(set(options) - set(params))
        if unknown:
            raise ConfigError(
                f"unknown option(s) {', '.join(unknown)} for game {name!r}; "
                f"its options are: {', '.join(params) or '(none)'}"
            )
    return factory(**options)
