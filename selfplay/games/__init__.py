"""Games behind one interface (:class:`selfplay.games.base.Game`) and their registry."""

from selfplay.games.base import Game
from selfplay.games.registry import game_names, make_game, register_game

__all__ = ["Game", "game_names", "make_game", "register_game"]
