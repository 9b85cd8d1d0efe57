"""A role's own clock: a daemon thread that calls one of the role's methods every few seconds.

Roles own their timers (a buffer's shard age, a snapshot server's poll, a run's heartbeat), so
nothing outside a role has to call it for its time-driven work to happen. An error raised by the
timed call is kept and raised again by :meth:`Every.check` (the role calls it from its methods),
so it is reported by whoever talks to the role, never lost in a thread."""

from __future__ import annotations

import threading
from typing import Callable


class Every:
    """Calls ``fn`` every ``seconds`` on a daemon thread until :meth:`stop`."""

    def __init__(self, seconds: float, fn: Callable[[], object], name: str) -> None:
        self.seconds = float(seconds)
        self.fn = fn
        self.error: BaseException | None = None
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(self.seconds):
            try:
                self.fn()
            except BaseException as exc:  # noqa: BLE001 - handed to the role's next caller
                self.error = exc
                return

    def check(self) -> None:
        """Raise the error the timed call raised, if any."""
        if self.error is not None:
            raise self.error

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not threading.current_thread():
            self._thread.join(timeout=max(5.0, 2 * self.seconds))
