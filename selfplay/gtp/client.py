"""Talking to a GTP v2 engine in a subprocess (the controller side of the Go Text Protocol,
https://www.lysator.liu.se/~gunnar/gtp/gtp2-spec-draft2/gtp2-spec.html).

:class:`GtpClient` starts the engine from a command line, sends one command at a time and reads
the reply, which ends with an empty line (spec section 2.6: ``=`` or ``?``, an optional id, then
the text, then two newlines). Every read is bounded: a reply must arrive within ``timeout``
seconds and fit in ``max_reply_bytes``, otherwise the engine is stopped and :class:`GtpError`
names what went wrong. The engine's standard error goes to a temporary file whose last lines are
quoted when it fails.

:class:`GtpPlayer` plays a match (:func:`selfplay.evaluation.play_match`) through a client: it
tells the engine each game's moves (replaying from ``clear_board`` when the match switches to
another game) and asks ``genmove``.
"""

from __future__ import annotations

import os
import selectors
import shlex
import subprocess
import tempfile
import time
from typing import Any, Sequence

import numpy as np

from selfplay.errors import SelfplayError
from selfplay.gtp.vertex import colour_text, parse_vertex, vertex_text

#: default seconds to wait for one reply (genmove of a strong engine can take a while)
DEFAULT_TIMEOUT = 60.0
#: default cap on one reply's size (a showboard of 19x19 is about 1 kB)
DEFAULT_MAX_REPLY_BYTES = 1 << 20


class GtpError(SelfplayError):
    """A GTP engine could not be started, stopped answering, or answered outside the protocol."""


class GtpCommandError(GtpError):
    """The engine answered a command with a failure (``? message``)."""

    def __init__(self, command: str, message: str, engine: str) -> None:
        super().__init__(f"GTP engine {engine!r} refused {command!r}: {message or '(no message)'}")
        self.command = command
        self.message = message


class GtpClient:
    """One GTP engine process. Use as a context manager, or call :meth:`close`."""

    def __init__(self, command: str | Sequence[str], *, timeout: float = DEFAULT_TIMEOUT,
                 max_reply_bytes: int = DEFAULT_MAX_REPLY_BYTES, env: dict[str, str] | None = None) -> None:
        argv = shlex.split(command) if isinstance(command, str) else list(command)
        if not argv:
            raise GtpError("the GTP engine command line is empty")
        if not timeout > 0:
            raise GtpError(f"GTP timeout {timeout} must be a positive number of seconds")
        self.argv = argv
        self.label = " ".join(argv)
        self.timeout = float(timeout)
        self.max_reply_bytes = int(max_reply_bytes)
        self._stderr = tempfile.TemporaryFile()
        try:
            self.proc = subprocess.Popen(argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                         stderr=self._stderr, bufsize=0, env=env)
        except (OSError, ValueError) as exc:
            self._stderr.close()
            raise GtpError(f"GTP engine command {self.label!r} cannot be started: {exc}") from None
        assert self.proc.stdout is not None
        os.set_blocking(self.proc.stdout.fileno(), False)
        self._selector = selectors.DefaultSelector()
        self._selector.register(self.proc.stdout, selectors.EVENT_READ)
        self._buffer = bytearray()  # bytes read but not yet part of a returned reply
        self.closed = False

    # ---- lifecycle ---------------------------------------------------------------------------
    def __enter__(self) -> "GtpClient":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def stderr_tail(self, limit: int = 400) -> str:
        """The last ``limit`` bytes the engine wrote to standard error, as text."""
        try:
            self._stderr.seek(0, os.SEEK_END)
            size = self._stderr.tell()
            self._stderr.seek(max(0, size - limit))
            return self._stderr.read().decode("utf-8", "replace").strip()
        except (OSError, ValueError):
            return ""

    def _fail(self, why: str) -> GtpError:
        tail = self.stderr_tail()
        self.kill()
        return GtpError(f"GTP engine {self.label!r} {why}" + (f" (its last error output: {tail!r})" if tail else ""))

    def kill(self) -> None:
        """Stop the engine at once (no ``quit``)."""
        if self.closed:
            return
        self.closed = True
        try:
            self._selector.close()
        except (OSError, ValueError):
            pass
        if self.proc.poll() is None:
            self.proc.kill()
        try:
            self.proc.wait(timeout=5)
        except subprocess.TimeoutExpired:  # pragma: no cover - a process that survives SIGKILL
            pass
        for stream in (self.proc.stdin, self.proc.stdout):
            try:
                if stream is not None:
                    stream.close()
            except OSError:
                pass
        self._stderr.close()

    def close(self) -> None:
        """Send ``quit``, wait briefly for the engine to exit, then stop it."""
        if self.closed:
            return
        if self.proc.poll() is None:
            try:
                self.send("quit", timeout=min(self.timeout, 5.0))
            except GtpError:
                pass
            try:
                self.proc.wait(timeout=2)
            except subprocess.TimeoutExpired:
                pass
        self.kill()

    # ---- commands ----------------------------------------------------------------------------
    def send(self, command: str, timeout: float | None = None) -> str:
        """Send one command; return the reply text of a success (without the ``=``).

        Raises GtpCommandError when the engine answers ``?``, GtpError when it does not answer in
        time, answers too much, closes its output or answers something that is not GTP."""
        if self.closed:
            raise GtpError(f"GTP engine {self.label!r} is closed")
        if "\n" in command or "\r" in command:
            raise GtpError(f"GTP command {command!r} must be one line")
        assert self.proc.stdin is not None
        try:
            self.proc.stdin.write(command.encode() + b"\n")
            self.proc.stdin.flush()
        except (BrokenPipeError, OSError):
            raise self._fail(f"stopped before the command {command!r} (exit status {self.proc.poll()})") from None
        raw = self._read_reply(command, self.timeout if timeout is None else timeout)
        return self._parse_reply(command, raw)

    def _read_reply(self, command: str, timeout: float) -> str:
        deadline = time.monotonic() + timeout
        assert self.proc.stdout is not None
        fd = self.proc.stdout.fileno()
        scanned = 0  # bytes of the buffer already searched for the end of the reply
        while True:
            # empty lines before a reply are allowed; a reply ends at the first "\n\n" after text
            if self._buffer.startswith(b"\n"):
                self._buffer = bytearray(self._buffer.lstrip(b"\n"))
                scanned = 0
            end = self._buffer.find(b"\n\n", max(0, scanned - 1))
            if end >= 0:
                reply = bytes(self._buffer[:end])
                del self._buffer[:end + 2]
                return reply.decode("utf-8", "replace")
            scanned = len(self._buffer)
            if len(self._buffer) > self.max_reply_bytes:
                raise self._fail(f"sent more than {self.max_reply_bytes} bytes without ending its reply to {command!r}")
            left = deadline - time.monotonic()
            if left <= 0:
                raise self._fail(f"did not answer {command!r} within {timeout:g} s")
            if not self._selector.select(timeout=left):
                continue
            try:
                chunk = os.read(fd, 65536)
            except BlockingIOError:
                continue
            if not chunk:
                code = self.proc.wait(timeout=5) if self.proc.poll() is None else self.proc.poll()
                raise self._fail(f"closed its output while answering {command!r} (exit status {code})")
            self._buffer += chunk.replace(b"\r", b"")  # CR is dropped (GTP v2, section 2.2)

    def _parse_reply(self, command: str, raw: str) -> str:
        if not raw or raw[0] not in "=?":
            raise self._fail(f"answered {command!r} with {raw[:80]!r}, which is not a GTP reply "
                             "(replies start with '=' or '?')")
        i = 1
        while i < len(raw) and raw[i].isdigit():
            i += 1
        if i < len(raw) and raw[i] not in " \n":
            raise self._fail(f"answered {command!r} with {raw[:80]!r}, which is not a GTP reply")
        text = raw[i:].strip()
        if raw[0] == "?":
            raise GtpCommandError(command, text, self.label)
        return text


class GtpPlayer:
    """A GTP engine as a match player (see :func:`selfplay.evaluation.play_match`).

    ``name`` defaults to ``gtp:<engine name> <version> [<arguments>]``, from the engine's own
    ``name`` and ``version`` answers and the command line's arguments (so an engine at another
    level is another player)."""

    needs_moves = True

    def __init__(self, client: GtpClient, game: Any, name: str | None = None) -> None:
        from selfplay.games.go import GoGame

        if not isinstance(game, GoGame):
            raise GtpError(f"a GTP engine plays Go; this run plays {getattr(game, 'name', game)!r}")
        self.client = client
        self.game = game
        self.size = game.size
        self.engine_name = client.send("name")
        try:
            self.engine_version = client.send("version")
        except GtpCommandError:
            self.engine_version = ""
        label = f"{self.engine_name} {self.engine_version}".strip()
        args = " ".join(client.argv[1:])
        self.name = name or f"gtp:{label}" + (f" [{args}]" if args else "")
        try:
            client.send(f"boardsize {self.size}")
        except GtpCommandError as exc:
            raise GtpError(f"GTP engine {client.label!r} cannot play on a {self.size}x{self.size} board: "
                           f"{exc.message}") from None
        client.send(f"komi {game.komi:g}")
        client.send("clear_board")
        self._sent: list[int] = []

    def settings(self) -> dict[str, Any]:
        """What identifies this opponent: the command line and the engine's own name and version."""
        return {"command": self.client.label, "engine_name": self.engine_name,
                "engine_version": self.engine_version, "komi": self.game.komi}

    def _sync(self, moves: list[int]) -> None:
        """Bring the engine's board to ``moves`` (played alternately from Black on the empty board)."""
        if self._sent != moves[:len(self._sent)]:
            self.client.send("clear_board")
            self._sent = []
        for k in range(len(self._sent), len(moves)):
            text = vertex_text(moves[k], self.size)
            try:
                self.client.send(f"play {colour_text(k % 2)} {text}")
            except GtpCommandError as exc:
                raise GtpError(f"GTP engine {self.client.label!r} refused the move {colour_text(k % 2)} {text} "
                               f"(move {k + 1}): {exc.message}") from None
            self._sent.append(moves[k])

    def choose(self, game: Any, states: Sequence[Any], rngs: Sequence[np.random.Generator],
               moves: Sequence[list[int]] | None = None) -> list[int]:
        from selfplay.evaluation import RESIGN

        if moves is None:
            raise GtpError("a GTP player needs each game's moves")
        out = []
        for state, history in zip(states, moves):
            self._sync(list(history))
            colour = colour_text(game.to_play(state))
            reply = self.client.send(f"genmove {colour}")
            word = reply.split()[0] if reply.split() else ""
            if word.lower() == "resign":
                out.append(RESIGN)
                continue
            action = parse_vertex(word, self.size)
            if action is None:
                raise self.client._fail(f"answered 'genmove {colour}' with {reply[:40]!r}, which is not a vertex "
                                        f"of the {self.size}x{self.size} board")
            self._sent.append(action)
            out.append(action)
        return out


def engine_final_score(command: str | Sequence[str], game: Any, moves: Sequence[int],
                       timeout: float = DEFAULT_TIMEOUT) -> str:
    """A GTP engine's own ``final_score`` of the Go game ``moves`` (played alternately from
    Black on the empty board of ``game``, with its komi), e.g. ``B+3`` or ``W+12``.

    A fresh engine process counts each game: GNU Go 3.8 answers ``final_score`` from a cache
    that survives ``clear_board`` (an empty board after another game was scored got that game's
    score). GNU Go removes the stones it judges dead before counting; Tromp-Taylor does not."""
    with GtpClient(command, timeout=timeout) as client:
        client.send(f"boardsize {game.size}")
        client.send(f"komi {game.komi:g}")
        for k, a in enumerate(moves):
            client.send(f"play {colour_text(k % 2)} {vertex_text(int(a), game.size)}")
        return client.send("final_score").strip()


__all__ = ["DEFAULT_MAX_REPLY_BYTES", "DEFAULT_TIMEOUT", "GtpClient", "GtpCommandError", "GtpError", "GtpPlayer", "engine_final_score"]
