"""GTP vertices and colours (GTP v2 specification, section 2.11 "Entities").

A vertex is a column letter ``A``..``Z`` without ``I`` followed by a row number counted from the
bottom (``A1`` is the lower-left corner), in any case, or ``pass``. Colours are ``b``/``black``
and ``w``/``white``, in any case. Our Go actions number points row-major from the top-left, with
pass ``size * size`` (see docs/go-rules.md).
"""

from __future__ import annotations

import re

from selfplay.errors import IllegalMoveError
from selfplay.games.go import COLUMN_LETTERS

_VERTEX = re.compile(r"^([A-HJ-Za-hj-z])([0-9]{1,2})$")


def parse_colour(text: str) -> int | None:
    """Player (0 Black, 1 White) of a GTP colour, None if ``text`` is not one."""
    t = text.lower()
    if t in ("b", "black"):
        return 0
    if t in ("w", "white"):
        return 1
    return None


def colour_text(player: int) -> str:
    """GTP colour of player 0 (``b``) or 1 (``w``)."""
    return "b" if player == 0 else "w"


def parse_vertex(text: str, size: int) -> int | None:
    """Action of a GTP vertex on a ``size`` board (pass = ``size * size``); None if ``text`` is
    not a vertex of this board."""
    if text.lower() == "pass":
        return size * size
    m = _VERTEX.match(text)
    if not m:
        return None
    col = COLUMN_LETTERS.find(m.group(1).upper())
    row = int(m.group(2))
    if not (0 <= col < size and 1 <= row <= size):
        return None
    return (size - row) * size + col


def vertex_text(action: int, size: int) -> str:
    """GTP vertex of an action (``pass`` for ``size * size``)."""
    if action == size * size:
        return "pass"
    if not 0 <= action < size * size:
        raise IllegalMoveError(f"action {action} is off the {size}x{size} board")
    row, col = divmod(action, size)
    return f"{COLUMN_LETTERS[col]}{size - row}"
