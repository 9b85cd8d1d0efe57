"""The self-play role: one worker playing G games at once with the newest snapshot it is served.

It owns the worker's network, its evaluator (built in :meth:`SelfPlayRole._evaluator`, the one
place), its snapshot pickup, its seeds (from the run seed through :mod:`selfplay.seeding`) and its
``worker`` metric line. What it is connected to is passed in as two callables, so one process and
Ray use the same code:

- ``weights(known_version) -> (version, weights or None)``: a newer snapshot's weights (a dict of
  arrays) if there is one;
- ``deliver(records) -> {"added": [ids], "duplicates": n, "positions": n}``: hand finished games
  to the buffer.

Game ids are ``s{session}.{incarnation}w{slot:04d}-{index:08d}`` (``incarnation`` is empty for a
worker's first start in a session): the same on both paths for the same run seed, and never
repeated by a restarted worker or a resumed run.
"""

from __future__ import annotations

import gc
import time
from typing import Any, Callable, Mapping

from selfplay.config import RunConfig
from selfplay.games.registry import make_game
from selfplay.metrics import MetricsLog
from selfplay.records import GameRecord
from selfplay.seeding import network_seed, session_tag, worker_seed

WeightsSource = Callable[[int], tuple[int, Any]]
Deliver = Callable[[list[GameRecord]], Mapping[str, Any]]


def worker_id(slot: int) -> str:
    return f"w{slot:04d}"


class SelfPlayRole:
    """Self-play worker ``slot`` of session ``session``; see the module docstring."""

    #: seconds between two metric lines while playing (one more at every stop)
    metrics_seconds = 2.0

    def __init__(self, config: RunConfig, *, slot: int, session: int, weights: WeightsSource, deliver: Deliver,
                 metrics: Any, incarnation: str = "", game_limit: int | None = None,
                 fetch: Callable[[Any], Mapping[str, Any]] = lambda w: w, background_swaps: bool = True) -> None:
        import torch

        from selfplay.network import build_network
        from selfplay.worker import SelfPlayWorker

        self.config = config
        torch.set_num_threads(config.worker.threads)
        self.slot = slot
        self.worker_id = worker_id(slot)
        self.tag = session_tag(session) + (f"{incarnation}." if incarnation else "")
        self.weights = weights
        self.fetch = fetch
        self.deliver = deliver
        #: compile new snapshots in a background thread (a worker process); False: at pickup, so
        #: the step a version starts at does not depend on a thread (``selfplay run --in-process``)
        self.background_swaps = background_swaps
        self.game = make_game(config.game.name, **config.game.options)
        self.net = build_network(self.game, config.network, seed=network_seed(config.run.seed))
        self.version = 0
        self.notices: list[str] = []
        self._preparing = 0  # the version being compiled in the background (0: none)
        self.pickup()  # the first snapshot is loaded before the evaluator is built
        self.evaluator = self._evaluator()
        self.worker = SelfPlayWorker(
            self.game, self.evaluator, config.search, games_in_parallel=config.worker.games_in_parallel,
            worker_id=self.worker_id, seed=worker_seed(config.run.seed, session, slot, incarnation),
            snapshot_version=self.version, run_tag=self.tag, game_limit=game_limit)
        self.metrics = MetricsLog(metrics, "worker", self.worker_id)
        self._last_poll = time.monotonic()
        self._metrics_at = 0.0
        self.games_total = 0
        self.positions_total = 0
        self.duplicates_total = 0
        # the network, the compiled kernels and the runtime's objects live as long as the worker:
        # keep the cyclic collector from rescanning them (measured: 1-2 us per simulation)
        gc.freeze()

    def _evaluator(self) -> Any:
        """The worker's evaluator (the one place it is built): the network on the backend
        ``[worker] inference`` names ("auto" measures them at this worker's batch size)."""
        from selfplay.evaluators import make_evaluator

        batch = self.config.worker.games_in_parallel * self.config.search.leaves_per_game
        return make_evaluator(self.net, self.game, self.config.search.rollout_mix_lambda,
                              threads=self.config.worker.threads, inference=self.config.worker.inference,
                              batch_hint=batch, say=self._say)

    def _say(self, line: str) -> None:
        """A notice of the evaluator (the backend chosen, a backend that cannot run here): kept
        for the caller and printed once, by the run's first worker."""
        self.notices.append(line)
        if self.slot == 0:
            print(line, flush=True)

    # ---- snapshots ---------------------------------------------------------------------------
    def pickup(self) -> bool:
        """Fetch a newer snapshot if one is served. Before the evaluator exists its weights are
        loaded at once; afterwards the evaluator compiles them in the background and
        :meth:`swap` puts them into use between steps. True if a newer version was taken up.
        Weights that do not fit leave the network as it was."""
        import numpy as np
        import torch

        self._last_poll = time.monotonic()
        known = max(self.version, self._preparing)
        version, held = self.weights(known)
        if held is None or version <= known:
            return False
        try:
            arrays = self.fetch(held)
            state = {k: torch.from_numpy(np.array(v)) for k, v in arrays.items()}
            if not hasattr(self, "evaluator"):
                self.net.load_state_dict(state, strict=True)
                self.version = version
                return True
        except RuntimeError:
            return False  # the server checked the shapes; anything else: keep playing what we have
        if not self.evaluator.prepare(state, version, background=self.background_swaps):
            self._preparing = version  # refused (recorded in evaluator.swaps.refused): not retried
            return False
        self._preparing = version
        return True

    def swap(self, wait: bool = False) -> bool:
        """Put a snapshot compiled in the background into use; True if the version changed."""
        version = self.evaluator.swap_if_ready(wait=wait)
        if version is None:
            return False
        self.version = version
        self.net = self.evaluator.net
        self.worker.set_evaluator(self.evaluator, version)
        return True

    # ---- playing -----------------------------------------------------------------------------
    def play(self, seconds: float, game_limit: int | None = -1, until_finished: int | None = None) -> dict[str, Any]:
        """Play for about ``seconds`` (less once no game is left in flight, or once
        ``until_finished`` games have finished in this call), deliver the finished games and
        return a report. ``game_limit`` (when not -1) first sets how many games this worker may
        have started in all (None: no limit)."""
        if game_limit != -1:
            self.worker.allow_games(game_limit)
        deadline = time.monotonic() + seconds
        finished: list[GameRecord] = []
        between_games = self.config.worker.snapshot_pickup == "between_games"
        poll = self.config.worker.snapshot_poll_seconds
        while (time.monotonic() < deadline and self.worker.games_in_flight
               and (until_finished is None or len(finished) < until_finished)):
            done = self.worker.step()
            finished.extend(done)
            if time.monotonic() - self._last_poll >= poll and (done or not between_games):
                self.pickup()
            if self._preparing > self.version and (done or not between_games):
                self.swap()
        if not self.worker.games_in_flight and not finished:
            time.sleep(min(seconds, 0.1))  # nothing allowed to start: do not spin the caller
        added: list[str] = []
        positions = duplicates = 0
        if finished:
            result = self.deliver(finished)
            added, duplicates = list(result["added"]), int(result["duplicates"])
            accepted = set(added)
            positions = sum(r.num_positions for r in finished if r.game_id in accepted)
        self.games_total += len(added)
        self.positions_total += positions
        self.duplicates_total += duplicates
        if time.monotonic() - self._metrics_at >= self.metrics_seconds:
            self._write_line()
        return {"slot": self.slot, "worker_id": self.worker_id, "tag": self.tag, "added": added,
                "finished": len(finished), "positions": positions, "duplicates": duplicates,
                "games_started": self.worker.games_started, "games_in_flight": self.worker.games_in_flight,
                "games_total": self.games_total, "positions_total": self.positions_total,
                "snapshot_version": self.version}

    def stats(self) -> dict[str, Any]:
        """The ``worker`` metric line's fields."""
        s = dict(self.worker.stats())
        s.update(games_total=self.games_total, positions_total=self.positions_total,
                 duplicates_total=self.duplicates_total, games_started_total=self.worker.games_started,
                 snapshot_version=self.version)
        describe = getattr(self.evaluator, "describe", None)
        if describe is not None:
            s.update(describe())
        return s

    def _write_line(self, **extra: Any) -> None:
        self._metrics_at = time.monotonic()
        self.metrics.write(**self.stats(), **extra)

    def close(self) -> None:
        """Write the final line (games still in flight are dropped)."""
        self._write_line(final=True)
