"""A Go player as a GTP v2 engine (the engine side of the Go Text Protocol, version 2 draft 2,
https://www.lysator.liu.se/~gunnar/gtp/gtp2-spec-draft2/gtp2-spec.html).

Commands: protocol_version, name, version, known_command, list_commands, quit, boardsize,
clear_board, komi, play, genmove, undo, showboard, final_score.

Input is handled as section 2.2 of the spec asks: control characters other than tab and newline
are dropped, tabs become spaces, everything after ``#`` is a comment, empty lines are skipped,
and a command may start with a numeric id that the reply repeats. A reply is ``=`` (success) or
``?`` (failure), the id, a space, the text and an empty line. Failures use the spec's standard
messages: ``unknown command``, ``illegal move``, ``syntax error``, ``unacceptable size``,
``cannot undo``. A line longer than :data:`MAX_LINE_BYTES` is answered with ``? command too
long`` and its rest is discarded without being held in memory.

Rules are the game's (Tromp–Taylor area scoring, positional superko, suicide as configured, komi
as set by the ``komi`` command). Moves must alternate, Black first: ``play``/``genmove`` for the
colour that is not to move is refused (``illegal move`` / ``it is black's turn ...``), since the rules have
no setup stones mid-game. After two passes the game is over: ``play`` answers ``illegal move``
and ``genmove`` answers ``pass``.
"""

from __future__ import annotations

from typing import Any, BinaryIO, Callable

import numpy as np

from selfplay import __version__
from selfplay.errors import IllegalMoveError
from selfplay.games.go import GoGame
from selfplay.gtp.vertex import colour_text, parse_colour, parse_vertex, vertex_text

#: the longest command line read (bytes); GTP commands are short
MAX_LINE_BYTES = 4096

COMMANDS = ("protocol_version", "name", "version", "known_command", "list_commands", "quit",
            "boardsize", "clear_board", "komi", "play", "genmove", "undo", "showboard", "final_score")


class GtpFailure(Exception):
    """A command failed; the message is the text after ``?``."""


#: chooses a move: (game, state) -> action (pass = size * size)
MoveChooser = Callable[[GoGame, Any], int]


class GtpEngine:
    """GTP state machine over a :class:`GoGame`: the position history and a move chooser.

    ``make_game(komi)`` builds the game with the run's rules and the given komi; ``choose``
    picks a move for the side to move. ``name``/``version`` are what the engine reports."""

    def __init__(self, make_game: Callable[[float], GoGame], choose: MoveChooser, komi: float,
                 name: str = "plyfoundry", version: str = __version__) -> None:
        self.make_game = make_game
        self.choose = choose
        self.engine_name = name
        self.engine_version = version
        self.game = make_game(komi)
        self.states = [self.game.initial_state()]
        self.moves: list[int] = []
        self.quit = False

    @property
    def state(self) -> Any:
        return self.states[-1]

    # ---- protocol framing --------------------------------------------------------------------
    @staticmethod
    def clean(line: str) -> str:
        """Section 2.2 preprocessing of one line: control characters dropped (tab -> space),
        comment removed, surrounding space stripped."""
        line = line.split("#", 1)[0]
        out = []
        for ch in line:
            if ch == "\t":
                out.append(" ")
            elif ord(ch) < 32 or ord(ch) == 127:
                continue
            else:
                out.append(ch)
        return "".join(out).strip()

    def handle(self, line: str) -> str | None:
        """The full reply (ending in an empty line) to one input line; None for a line that
        holds no command."""
        text = self.clean(line)
        if not text:
            return None
        words = text.split()
        ident = ""
        if words[0].isdigit():
            ident = words.pop(0)
            if not words:
                return f"?{ident} syntax error\n\n"
        command, args = words[0], words[1:]
        try:
            result = self.execute(command, args)
        except GtpFailure as exc:
            return f"?{ident} {exc}\n\n"
        return f"={ident} {result}\n\n" if result else f"={ident}\n\n"

    def serve(self, inp: BinaryIO, out: BinaryIO) -> None:
        """Answer commands from ``inp`` on ``out`` until ``quit`` or the end of the input."""
        while not self.quit:
            raw = inp.readline(MAX_LINE_BYTES + 1)
            if not raw:
                return
            if len(raw) > MAX_LINE_BYTES and not raw.endswith(b"\n"):
                while raw and not raw.endswith(b"\n"):  # discard the rest, a bounded piece at a time
                    raw = inp.readline(MAX_LINE_BYTES)
                reply: str | None = "? command too long\n\n"
            else:
                reply = self.handle(raw.decode("utf-8", "replace"))
            if reply is not None:
                out.write(reply.encode())
                out.flush()

    # ---- commands ----------------------------------------------------------------------------
    def execute(self, command: str, args: list[str]) -> str:
        handler = getattr(self, f"cmd_{command}", None) if command in COMMANDS else None
        if handler is None:
            raise GtpFailure("unknown command")
        return handler(args)

    def cmd_protocol_version(self, args: list[str]) -> str:
        return "2"

    def cmd_name(self, args: list[str]) -> str:
        return self.engine_name

    def cmd_version(self, args: list[str]) -> str:
        return self.engine_version

    def cmd_known_command(self, args: list[str]) -> str:
        if len(args) != 1:
            raise GtpFailure("syntax error")
        return "true" if args[0] in COMMANDS else "false"

    def cmd_list_commands(self, args: list[str]) -> str:
        return "\n".join(COMMANDS)

    def cmd_quit(self, args: list[str]) -> str:
        self.quit = True
        return ""

    def cmd_boardsize(self, args: list[str]) -> str:
        if len(args) != 1 or not args[0].isdigit():
            raise GtpFailure("syntax error")
        if int(args[0]) != self.game.size:
            raise GtpFailure("unacceptable size")
        self._reset()
        return ""

    def cmd_clear_board(self, args: list[str]) -> str:
        self._reset()
        return ""

    def cmd_komi(self, args: list[str]) -> str:
        if len(args) != 1:
            raise GtpFailure("syntax error")
        try:
            komi = float(args[0])
        except ValueError:
            raise GtpFailure("syntax error") from None
        if not np.isfinite(komi) or abs(komi) > 1000:
            raise GtpFailure("syntax error")
        self.game = self.make_game(komi)
        moves = list(self.moves)
        self._reset()
        for a in moves:  # the same moves under the new komi (komi changes only the score)
            self.states.append(self.game.play(self.state, a))
            self.moves.append(a)
        return ""

    def cmd_play(self, args: list[str]) -> str:
        if len(args) != 2:
            raise GtpFailure("syntax error")
        player = parse_colour(args[0])
        action = parse_vertex(args[1], self.game.size)
        if player is None or action is None:
            raise GtpFailure("syntax error")
        if self.game.is_terminal(self.state) or player != self.game.to_play(self.state):
            raise GtpFailure("illegal move")
        try:
            nxt = self.game.play(self.state, action)
        except IllegalMoveError:
            raise GtpFailure("illegal move") from None
        self.states.append(nxt)
        self.moves.append(action)
        return ""

    def cmd_genmove(self, args: list[str]) -> str:
        if len(args) != 1:
            raise GtpFailure("syntax error")
        player = parse_colour(args[0])
        if player is None:
            raise GtpFailure("syntax error")
        if self.game.is_terminal(self.state):
            return "pass"
        if player != self.game.to_play(self.state):
            raise GtpFailure(f"it is {'black' if player else 'white'}'s turn; this engine plays alternating moves")
        action = self._winning_pass() if self.moves and self.moves[-1] == self.game.pass_action else None
        if action is None:
            action = int(self.choose(self.game, self.state))
        self.states.append(self.game.play(self.state, action))
        self.moves.append(action)
        return vertex_text(action, self.game.size)

    def _winning_pass(self) -> int | None:
        """After the opponent's pass: pass too when that ends the game in our favour under
        Tromp–Taylor scoring (common practice for engines under area rules)."""
        mover = self.game.to_play(self.state)
        end = self.game.play(self.state, self.game.pass_action)
        return self.game.pass_action if self.game.value_for_mover(end, mover) > 0 else None

    def cmd_undo(self, args: list[str]) -> str:
        if len(self.states) <= 1:
            raise GtpFailure("cannot undo")
        self.states.pop()
        self.moves.pop()
        return ""

    def cmd_showboard(self, args: list[str]) -> str:
        return "\n" + self.game.render(self.state) + \
            f"\n{colour_text(self.game.to_play(self.state))} to play, move {len(self.moves) + 1}, komi {self.game.komi:g}"

    def cmd_final_score(self, args: list[str]) -> str:
        return self.game.result_text(self.state)

    def _reset(self) -> None:
        self.states = [self.game.initial_state()]
        self.moves = []


def search_chooser(evaluator: Any, simulations: int, c_puct: float = 1.5, seed: int = 0) -> MoveChooser:
    """A move chooser that searches ``simulations`` PUCT simulations with ``evaluator`` (no root
    noise) and plays the most visited move (ties at random, from a generator seeded by ``seed``)."""
    from selfplay.evaluation import SearchPlayer

    player = SearchPlayer(evaluator, simulations, c_puct=c_puct)
    rng = np.random.default_rng(seed)

    def choose(game: GoGame, state: Any) -> int:
        return player.choose(game, [state], [rng])[0]

    return choose


__all__ = ["COMMANDS", "GtpEngine", "GtpFailure", "MAX_LINE_BYTES", "search_chooser"]
