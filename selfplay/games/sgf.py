"""SGF FF[4] (Smart Game Format, https://www.red-bean.com/sgf/) reading and writing for Go.

Reading parses the full grammar of the standard::

    Collection = GameTree { GameTree }
    GameTree   = "(" Sequence { GameTree } ")"
    Sequence   = Node { Node }
    Node       = ";" { Property }
    Property   = PropIdent PropValue { PropValue }
    PropIdent  = UcLetter { UcLetter }
    PropValue  = "[" CValueType "]"

with ``\\`` escapes inside values, and follows the main line (the first variation at every
branch) of the first game tree. Supported: SZ (square boards), KM, HA, AB/AW (setup stones,
compressed point lists included) in the root node, PL, B/W moves (``B[]`` and, on boards up to
19, ``B[tt]`` are passes), RE, PB, PW; every root property is kept as text. Unsupported: GM
other than 1, rectangular boards, AB/AW/AE after the root node, two moves of one colour in a row.
Every main-line move is replayed under the Go rules; an illegal one is an error.

Errors are :class:`selfplay.errors.FormatError` naming the problem and its place in the text.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any, Sequence

from selfplay.errors import FormatError, IllegalMoveError

_LETTERS = "abcdefghijklmnopqrstuvwxyz"
#: most nodes kept on the main line (a record holds at most 100,000 positions); a longer main
#: line is refused while parsing, so memory stays bounded whatever the file holds
MAX_MAIN_LINE_NODES = 100_000
#: most characters of a number (SZ, KM, HA, FF): Python's int() refuses 4,300 digits anyway
MAX_NUMBER_CHARS = 32
#: where a run of plain value text ends: the closing bracket or an escape
_VALUE_STOP = re.compile(r"[\]\\]")


# ---- coordinates --------------------------------------------------------------------------------

def point_to_sgf(point: int, size: int) -> str:
    """SGF coordinate of point ``row * size + col`` ("aa" is the top-left corner)."""
    if not 0 <= point < size * size:
        raise IllegalMoveError(f"point {point} is off the {size}x{size} board")
    r, c = divmod(int(point), size)
    return _LETTERS[c] + _LETTERS[r]


def sgf_to_point(text: str, size: int) -> int:
    """Point of SGF coordinate ``text`` ("dd") on a ``size`` board; pass ("" or "tt" on boards
    up to 19) returns ``size * size``. Raise IllegalMoveError for anything else."""
    if text == "" or (text == "tt" and size <= 19):
        return size * size
    if len(text) == 2 and text[0] in _LETTERS[:size] and text[1] in _LETTERS[:size]:
        return _LETTERS.index(text[1]) * size + _LETTERS.index(text[0])
    raise IllegalMoveError(
        f"SGF coordinate {text!r} is not a point of the {size}x{size} board "
        f"(letters a..{_LETTERS[size - 1]})")


# ---- the parsed record --------------------------------------------------------------------------

@dataclass
class SgfGame:
    """The main line of one SGF Go game.

    ``moves``: actions in order (points ``row * size + col``, pass ``size * size``), the first
    by ``first_player`` (0 Black, 1 White) and alternating. ``komi`` is None when the file has
    no KM. ``setup_black`` / ``setup_white``: AB / AW points of the root node.
    ``properties``: every root-node property, ident -> list of values (unescaped text)."""

    size: int
    komi: float | None
    moves: list[int]
    setup_black: list[int] = field(default_factory=list)
    setup_white: list[int] = field(default_factory=list)
    first_player: int = 0
    handicap: int = 0
    result: str | None = None
    black_name: str = ""
    white_name: str = ""
    properties: dict[str, list[str]] = field(default_factory=dict)


# ---- tokenizer / parser -------------------------------------------------------------------------

def _where(text: str, pos: int) -> str:
    line = text.count("\n", 0, pos) + 1
    col = pos - (text.rfind("\n", 0, pos) + 1) + 1
    return f"offset {pos} (line {line}, column {col})"


class _Node:
    __slots__ = ("pos", "props", "prop_pos")

    def __init__(self, pos: int) -> None:
        self.pos = pos
        self.props: dict[str, list[str]] = {}
        self.prop_pos: dict[str, int] = {}


class _Parser:
    """Recursive-descent parser of the SGF grammar; keeps only the main line's nodes."""

    def __init__(self, text: str) -> None:
        self.text = text
        self.i = 0

    def error(self, msg: str, pos: int | None = None) -> FormatError:
        return FormatError(f"SGF: {msg} at {_where(self.text, self.i if pos is None else pos)}")

    def skip_ws(self) -> None:
        t, n = self.text, len(self.text)
        while self.i < n and t[self.i].isspace():
            self.i += 1

    def collection(self) -> list[_Node]:
        self.skip_ws()
        if self.i >= len(self.text):
            raise self.error("empty input, expected '(' starting a game tree")
        first = None
        while True:
            self.skip_ws()
            if self.i >= len(self.text):
                break
            if self.text[self.i] != "(":
                raise self.error(f"expected '(' starting a game tree, found {self.text[self.i]!r}")
            nodes = self.game_tree(keep=first is None)
            if first is None:
                first = nodes
        assert first is not None
        return first

    def _open_tree(self, frames: list[list], keep: bool) -> None:
        """Enter a game tree at '(' : push its frame and check that a node follows."""
        frames.append([self.i, keep, False])  # start, on the main line, has a child tree
        self.i += 1
        self.skip_ws()
        if self.i >= len(self.text):
            raise self.error(f"unbalanced '(' opened at {_where(self.text, frames[-1][0])}: input ends")
        if self.text[self.i] != ";":
            raise self.error(f"expected ';' starting a node, found {self.text[self.i]!r}")

    def game_tree(self, keep: bool) -> list[_Node]:
        """One game tree (iteratively, so deep variation nesting cannot exhaust the stack);
        returns its main line's nodes when ``keep``."""
        nodes: list[_Node] = []
        frames: list[list] = []
        self._open_tree(frames, keep)
        while frames:
            self.skip_ws()
            if self.i >= len(self.text):
                raise self.error(f"unbalanced '(' opened at {_where(self.text, frames[-1][0])}: input ends")
            ch = self.text[self.i]
            top = frames[-1]
            if ch == ";" and not top[2]:
                node = self.node()
                if top[1]:
                    if len(nodes) >= MAX_MAIN_LINE_NODES:
                        raise self.error(f"the main line has more than {MAX_MAIN_LINE_NODES} nodes; "
                                         "not a game record this reader takes", node.pos)
                    nodes.append(node)
            elif ch == "(":
                child_keep = top[1] and not top[2]
                top[2] = True
                self._open_tree(frames, child_keep)
            elif ch == ")":
                frames.pop()
                self.i += 1
            elif ch == ";":
                raise self.error("expected '(' or ')' after a variation, found ';'")
            else:
                raise self.error(f"expected '(', ')' or ';', found {ch!r}")
        return nodes

    def node(self) -> _Node:
        node = _Node(self.i)
        self.i += 1  # ";"
        t, n = self.text, len(self.text)
        while True:
            self.skip_ws()
            if self.i >= n:
                return node
            ch = t[self.i]
            if not ch.isalpha():
                return node
            pos = self.i
            while self.i < n and t[self.i].isalpha():
                self.i += 1
            raw = t[pos:self.i]
            # FF[3] and older allowed lower-case letters in identifiers ("AddBlack" style);
            # FF[4] readers drop them.
            ident = "".join(c for c in raw if c.isupper())
            if not ident or not ident.isascii():
                raise self.error(f"property identifier {raw!r} has no upper-case letter", pos)
            self.skip_ws()
            if self.i >= n or t[self.i] != "[":
                raise self.error(f"property {ident} has no value (expected '[')")
            values = []
            while self.i < n and t[self.i] == "[":
                values.append(self.value())
                self.skip_ws()
            if ident in node.props:
                raise self.error(f"property {ident} appears twice in one node", pos)
            node.props[ident] = values
            node.prop_pos[ident] = pos

    def value(self) -> str:
        start = self.i
        self.i += 1  # "["
        t, n = self.text, len(self.text)
        out = []
        while True:
            if self.i >= n:
                raise self.error("unterminated property value (missing ']')", start)
            # copy the plain run up to the next ']' or '\\' in one piece
            m = _VALUE_STOP.search(t, self.i)
            stop = m.start() if m else n
            if stop > self.i:
                out.append(t[self.i:stop])
                self.i = stop
                continue
            ch = t[self.i]
            if ch == "\\":
                if self.i + 1 >= n:
                    raise self.error("unterminated property value (missing ']')", start)
                nxt = t[self.i + 1]
                if nxt == "\n":  # soft line break: removed
                    self.i += 2
                    continue
                if nxt == "\r":
                    self.i += 3 if t[self.i + 2:self.i + 3] == "\n" else 2
                    continue
                out.append(nxt)
                self.i += 2
            elif ch == "]":
                self.i += 1
                return "".join(out)
            else:
                out.append(ch)
                self.i += 1


def _number(ident: str, value: str, where: str, real: bool) -> float:
    if len(value.strip()) > MAX_NUMBER_CHARS:
        raise FormatError(f"SGF: property {ident} holds a number of {len(value.strip())} characters "
                          f"(at most {MAX_NUMBER_CHARS}) at {where}")
    pattern = r"[+-]?(\d+(\.\d*)?|\.\d+)" if real else r"[+-]?\d+"
    if not re.fullmatch(pattern, value.strip()):
        raise FormatError(f"SGF: property {ident}[{value}] is not a {'real ' if real else ''}number at {where}")
    return float(value) if real else int(value)


def _points(values: list[str], size: int, ident: str, where: str) -> list[int]:
    """Points of a (possibly compressed, "aa:cc") point list."""
    out: list[int] = []
    for v in values:
        try:
            if ":" in v:
                a, b = v.split(":", 1)
                pa, pb = sgf_to_point(a, size), sgf_to_point(b, size)
                if pa == size * size or pb == size * size:
                    raise IllegalMoveError(f"{v!r} is not a rectangle of points")
                r0, r1 = sorted((pa // size, pb // size))
                c0, c1 = sorted((pa % size, pb % size))
                out.extend(r * size + c for r in range(r0, r1 + 1) for c in range(c0, c1 + 1))
            else:
                p = sgf_to_point(v, size)
                if p == size * size:
                    raise IllegalMoveError(f"{v!r} is not a point")
                out.append(p)
        except IllegalMoveError as e:
            raise FormatError(f"SGF: bad point in {ident} at {where}: {e}") from None
    return out


def read_sgf(text: str, *, allow_suicide: bool = False, superko: bool = True) -> SgfGame:
    """Parse an SGF text and return the main line of its first game.

    Every move is replayed under Tromp–Taylor Go (suicide and superko as given); an illegal
    move, a malformed file or an unsupported feature raises FormatError naming the problem and
    its place in the text."""
    from selfplay.games.go import MAX_SIZE, GoGame

    if not isinstance(text, str):
        raise FormatError(f"SGF: expected text, got {type(text).__name__}")
    parser = _Parser(text)
    nodes = parser.collection()
    if not nodes:
        raise FormatError("SGF: the game tree has no node")
    root = nodes[0]
    props = root.props

    def where(node: _Node, ident: str | None = None) -> str:
        return _where(text, node.prop_pos.get(ident, node.pos) if ident else node.pos)

    def single(ident: str) -> str | None:
        if ident not in props:
            return None
        vals = props[ident]
        if len(vals) != 1:
            raise FormatError(f"SGF: property {ident} must have one value, has {len(vals)} at {where(root, ident)}")
        return vals[0]

    gm = single("GM")
    if gm is not None and gm.strip() != "1":
        raise FormatError(f"SGF: GM[{gm}] is not Go (GM[1]); unsupported game at {where(root, 'GM')}")
    ff = single("FF")
    if ff is not None:
        ffv = _number("FF", ff, where(root, "FF"), real=False)
        if not 1 <= ffv <= 4:
            raise FormatError(f"SGF: FF[{ff}] is not a known file format version (1..4) at {where(root, 'FF')}")
    sz = single("SZ")
    if sz is None:
        size = 19  # the SGF default for Go
    else:
        if ":" in sz:
            raise FormatError(f"SGF: rectangular board SZ[{sz}] is not supported at {where(root, 'SZ')}")
        size = int(_number("SZ", sz, where(root, "SZ"), real=False))
        if not 1 <= size <= MAX_SIZE:
            raise FormatError(f"SGF: board size SZ[{sz}] is out of range 1..{MAX_SIZE} at {where(root, 'SZ')}")
    km = single("KM")
    komi = None if km is None or km.strip() == "" else float(_number("KM", km, where(root, "KM"), real=True))
    ha = single("HA")
    handicap = 0 if ha is None else int(_number("HA", ha, where(root, "HA"), real=False))
    black_setup = _points(props.get("AB", []), size, "AB", where(root, "AB"))
    white_setup = _points(props.get("AW", []), size, "AW", where(root, "AW"))
    if props.get("AE"):
        raise FormatError(f"SGF: AE in the root node is not supported at {where(root, 'AE')}")
    pl = single("PL")
    if pl is not None and pl.strip().upper() not in ("B", "W"):
        raise FormatError(f"SGF: PL[{pl}] must be B or W at {where(root, 'PL')}")

    try:
        # komi plays no part in legality, so the replay game does without it
        game = GoGame(size=size, komi=0.0, allow_suicide=allow_suicide, superko=superko, history=1,
                      max_moves=100 * size * size, tiny=size < 5)
        first_default = 1 if black_setup and not white_setup else 0
        first = {"B": 0, "W": 1}.get((pl or "").strip().upper(), first_default)
        state = game.state_from_setup(black_setup, white_setup, first)
    except (IllegalMoveError, ValueError) as e:
        raise FormatError(f"SGF: bad root node at {where(root)}: {e}") from None

    moves: list[int] = []
    first_player = first
    for k, node in enumerate(nodes):
        if k > 0:
            for ident in ("AB", "AW", "AE"):
                if ident in node.props:
                    raise FormatError(
                        f"SGF: setup property {ident} after the root node is not supported at {where(node, ident)}")
        has_b, has_w = "B" in node.props, "W" in node.props
        if has_b and has_w:
            raise FormatError(f"SGF: a node has both B and W moves at {where(node)}")
        if not (has_b or has_w):
            continue
        ident = "B" if has_b else "W"
        vals = node.props[ident]
        if len(vals) != 1:
            raise FormatError(f"SGF: move {ident} must have one value, has {len(vals)} at {where(node, ident)}")
        colour = 0 if has_b else 1
        if not moves:
            first_player = colour
            if colour != state.player:
                state = game.state_from_setup(black_setup, white_setup, colour)
        elif colour != state.player:
            raise FormatError(
                f"SGF: two moves by {'Black' if colour == 0 else 'White'} in a row are not supported "
                f"at {where(node, ident)}")
        try:
            action = sgf_to_point(vals[0].strip(), size)
            state = game.play(state, action)
        except IllegalMoveError as e:
            raise FormatError(f"SGF: illegal move {ident}[{vals[0]}] (move {len(moves) + 1}) at "
                              f"{where(node, ident)}: {e}") from None
        moves.append(action)

    return SgfGame(
        size=size, komi=komi, moves=moves, setup_black=black_setup, setup_white=white_setup,
        first_player=first_player, handicap=handicap, result=single("RE"),
        black_name=single("PB") or "", white_name=single("PW") or "",
        properties={k: list(v) for k, v in props.items()})


# ---- writing ------------------------------------------------------------------------------------

def escape_value(value: str) -> str:
    """Escape ``]`` and ``\\`` for an SGF property value."""
    return value.replace("\\", "\\\\").replace("]", "\\]")


_IDENT = re.compile(r"[A-Z]+")
_ROOT_WRITTEN = ("FF", "GM", "SZ", "KM", "CA", "AP", "RU", "PB", "PW", "RE", "AB", "AW", "PL")


def write_sgf(game: Any, moves: list[int], *, result: str | None, black: str = "",
              white: str = "", extra: dict[str, Any] | None = None,
              setup_black: Sequence[int] = (), setup_white: Sequence[int] = (),
              first_player: int = 0) -> str:
    """SGF FF[4] text of a Go game played from the empty board, Black first — or from setup
    stones (``setup_black`` / ``setup_white`` points, written AB / AW, e.g. a handicap) with
    ``first_player`` (0 Black, 1 White; PL) to move.

    ``moves``: actions (points ``row * size + col``, pass ``size * size``, written ``B[]``);
    every move is checked under ``game``'s rules (IllegalMoveError otherwise). ``result``: the
    RE value ("B+3.5", "W+R", "0") or None to omit it. ``extra``: more root properties,
    ident (upper-case letters) -> a value or a list of values."""
    from selfplay.games.go import GoGame

    if not isinstance(game, GoGame):
        raise TypeError(f"write_sgf needs a GoGame, got {type(game).__name__}")
    size = game.size
    setup = bool(len(setup_black) or len(setup_white) or first_player)
    state = game.state_from_setup(setup_black, setup_white, first_player) if setup else game.initial_state()
    body = []
    for i, a in enumerate(moves):
        a = int(a)
        colour = "BW"[state.player]
        try:
            state = game.play(state, a)
        except IllegalMoveError as e:
            raise IllegalMoveError(f"cannot write move {i + 1}: {e}") from None
        coord = "" if a == game.pass_action else point_to_sgf(a, size)
        body.append(f";{colour}[{coord}]")
    root = [f"FF[4]GM[1]CA[UTF-8]AP[plyfoundry]SZ[{size}]KM[{game.komi:g}]RU[{escape_value(_rules_text(game))}]"]
    if black:
        root.append(f"PB[{escape_value(black)}]")
    if white:
        root.append(f"PW[{escape_value(white)}]")
    if result is not None:
        root.append(f"RE[{escape_value(result)}]")
    for ident, points in (("AB", setup_black), ("AW", setup_white)):
        if len(points):
            root.append(ident + "".join(f"[{point_to_sgf(int(p), size)}]" for p in sorted(points)))
    if setup:
        root.append(f"PL[{'BW'[first_player]}]")
    for ident, value in (extra or {}).items():
        if not isinstance(ident, str) or not _IDENT.fullmatch(ident):
            raise FormatError(f"SGF: extra property name {ident!r} must be upper-case letters A-Z")
        if ident in _ROOT_WRITTEN:
            raise FormatError(f"SGF: extra property {ident} is written by write_sgf itself")
        vals = value if isinstance(value, (list, tuple)) else [value]
        if not vals:
            raise FormatError(f"SGF: extra property {ident} has no value")
        root.append(ident + "".join(f"[{escape_value(str(v))}]" for v in vals))
    lines = ["(;" + "".join(root)]
    for i in range(0, len(body), 10):
        lines.append("".join(body[i:i + 10]))
    return "\n".join(lines) + ")\n"


def _rules_text(game: Any) -> str:
    parts = ["Tromp-Taylor", "positional superko" if game.superko else "simple ko",
             "suicide allowed" if game.allow_suicide else "no suicide"]
    return ", ".join(parts)
