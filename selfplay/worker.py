"""The vectorised self-play worker: G games at once, one batched evaluation per simulation round.

Each of the worker's G slots always holds a game in flight. A simulation round gathers one leaf
(or ``leaves_per_game`` with virtual loss) from every slot that is searching and evaluates them
all in one evaluator call (:class:`selfplay.search.tree.BatchedSearch`). A slot whose search has
spent its budget makes its move at once and starts the next search, so searches of different
budgets (playout cap randomisation) never leave the batch half empty. A finished game becomes a
:class:`selfplay.records.GameRecord` and a new game starts in its slot.

Determinism: game ``i`` of a worker draws all its randomness (playout cap draws, resignation
probe, root noise, Gumbel samples, temperature sampling, rollouts) from a generator seeded by
``(seed, i)``; its id is ``f"{run_tag}{worker_id}-{i:08d}"``, so a retried worker with the same
seed replays the same games under the same ids. With torch on one CPU thread the whole run is
reproducible for a fixed seed and G.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from selfplay.errors import ConfigError
from selfplay.evaluators import Evaluator
from selfplay.games.base import Game
from selfplay.records import GameRecord, GameRecordBuilder
from selfplay.search.config import SearchConfig
from selfplay.search.puct import choose_by_visits
from selfplay.search.resign import ResignCalibration
from selfplay.search.tree import BatchedSearch


@dataclass
class _GameInFlight:
    index: int
    game_id: str
    seed: int
    rng: np.random.Generator
    state: Any
    builder: GameRecordBuilder
    resign_disabled: bool
    resign_would_have: int = -1
    #: lowest root value each player saw (its own view), kept in probe games
    lowest_value: list[float] = field(default_factory=lambda: [1.0, 1.0])
    search_snapshot: int = 0
    moves_made: int = 0


def game_seed(seed: int, game_index: int) -> int:
    """The 63-bit seed of game ``game_index`` of a worker seeded with ``seed`` (the run's one
    seed derivation, :mod:`selfplay.seeding`)."""
    from selfplay.seeding import game_seed as derived

    return derived(int(seed), int(game_index))


class SelfPlayWorker:
    """Plays ``games_in_parallel`` games at once with ``evaluator`` and ``search`` settings.

    ``step()`` advances every game in flight by at least one move and returns the games that
    finished; ``play_games(n)`` returns the next ``n`` finished games. ``set_evaluator`` swaps in
    a new snapshot between calls; each position records the snapshot version in use when its
    search started. ``start_state`` (default: the game's initial state) is where every game
    starts; ``clock`` gives the records' Unix times (inject a fixed one for byte-equal replays)."""

    def __init__(self, game: Game, evaluator: Evaluator, search: SearchConfig | dict[str, Any], *,
                 games_in_parallel: int, worker_id: str, seed: int, snapshot_version: int = 0,
                 run_tag: str = "", clock: Callable[[], float] = time.time,
                 start_state: Any | None = None, game_limit: int | None = None) -> None:
        if isinstance(search, dict):
            search = SearchConfig.parse(search)
        if not isinstance(search, SearchConfig):
            raise ConfigError(f"search settings must be a SearchConfig, got {type(search).__name__}")
        if not isinstance(games_in_parallel, int) or isinstance(games_in_parallel, bool) or games_in_parallel < 1:
            raise ConfigError(f"games_in_parallel={games_in_parallel!r} must be a positive integer")
        if not isinstance(seed, int) or isinstance(seed, bool) or seed < 0:
            raise ConfigError(f"seed={seed!r} must be a non-negative integer")
        if not isinstance(worker_id, str) or not worker_id:
            raise ConfigError(f"worker_id={worker_id!r} must be a non-empty string")
        evaluator.check_game(game)
        if start_state is not None and game.is_terminal(start_state):
            raise ConfigError("start_state is a finished position; self-play needs a position with a move to make")
        self.start_state = start_state
        self.game = game
        self.evaluator = evaluator
        self.config = search
        self.games_in_parallel = games_in_parallel
        self.worker_id = worker_id
        self.seed = seed
        self.snapshot_version = int(snapshot_version)
        self.run_tag = run_tag
        self.clock = clock
        self._search_settings = search.to_dict()
        self._tree = BatchedSearch(game, search, games_in_parallel)
        self._games: list[_GameInFlight | None] = []
        self._ready: list[GameRecord] = []
        self._next_index = 0
        #: games this worker may start in all (None: no limit); a slot whose game ends once the
        #: limit is reached stays empty until :meth:`allow_games` raises it
        self.game_limit = game_limit
        # counters
        self.games_total = 0
        self.positions_total = 0
        self.resign_disabled_games_total = 0
        self.resign_probe_triggered_total = 0
        self.resign_false_positives_total = 0
        self.resignations_total = 0
        cfg = self.config
        self.resign_calibration = (ResignCalibration(cfg.resign_threshold, cfg.resign_false_positive_target)
                                   if cfg.resign_false_positive_target is not None and cfg.resign_threshold is not None
                                   else None)
        self.busy_seconds = 0.0
        self.move_seconds = 0.0
        for s in range(games_in_parallel):
            self._games.append(None)
            self._start_if_allowed(s)

    # ---- evaluator swap ---------------------------------------------------------------------
    def set_evaluator(self, evaluator: Evaluator, snapshot_version: int) -> None:
        """Use ``evaluator`` (a new snapshot, version ``snapshot_version``) from the next round;
        refuses one that does not fit the game and keeps the current one."""
        evaluator.check_game(self.game)
        self.evaluator = evaluator
        self.snapshot_version = int(snapshot_version)

    # ---- game lifecycle -----------------------------------------------------------------------
    def allow_games(self, limit: int | None) -> None:
        """Let this worker start games until ``limit`` games have been started in all (None: no
        limit); empty slots start their games at once."""
        self.game_limit = limit
        for s, g in enumerate(self._games):
            if g is None:
                self._start_if_allowed(s)

    def _start_if_allowed(self, slot: int) -> None:
        if self.game_limit is not None and self._next_index >= self.game_limit:
            self._games[slot] = None
            return
        self._games[slot] = self._new_game(slot)
        self._begin_move(slot)

    def _new_game(self, slot: int) -> _GameInFlight:
        index = self._next_index
        self._next_index += 1
        gseed = game_seed(self.seed, index)
        rng = np.random.default_rng(gseed)
        probe_draw = rng.random()
        resign_disabled = self.config.resign_threshold is not None and probe_draw < self.config.resign_probe_fraction
        game_id = f"{self.run_tag}{self.worker_id}-{index:08d}"
        builder = GameRecordBuilder(game_id, self.game.name, self.game.options(), self.worker_id, gseed,
                                    self._search_settings, self.clock())
        state = self.game.initial_state() if self.start_state is None else self.start_state
        self._tree.set_root(slot, state)
        return _GameInFlight(index, game_id, gseed, rng, state, builder, resign_disabled)

    def _begin_move(self, slot: int) -> None:
        g = self._games[slot]
        cfg = self.config
        full = g.rng.random() < cfg.full_search_share
        budget = cfg.simulations if full else cfg.reduced_simulations
        g.search_snapshot = self.snapshot_version
        self._tree.begin(slot, budget, full, g.rng)

    def _make_move(self, slot: int) -> None:
        game = self.game
        cfg = self.config
        g = self._games[slot]
        res = self._tree.result(slot)
        state = g.state
        mover = game.to_play(state)
        if res.chosen >= 0:
            action = res.chosen
        else:
            action = choose_by_visits(res.visits, cfg.temperature_at(game.move_count(state)), g.rng)
        g.builder.add_position(game.compact(state), mover, action, self._tree.root_legal(slot),
                               res.policy_actions, res.policy_weights, res.root_value, res.full,
                               g.search_snapshot)
        threshold = (self.resign_calibration.threshold if self.resign_calibration is not None
                     else cfg.resign_threshold)
        if g.resign_disabled and res.root_value < g.lowest_value[mover]:
            g.lowest_value[mover] = float(res.root_value)
        if threshold is not None and res.root_value < threshold:
            if g.resign_disabled:
                if g.resign_would_have < 0:
                    g.resign_would_have = mover
            else:
                # The resigning position stays in the record (a lost position with its search
                # target); its action is the move the search chose, never played.
                self._finish(slot, -1 if mover == 0 else 1, resigned=True)
                return
        new_state = self._tree.advance(slot, action)
        g.state = new_state
        g.moves_made += 1
        if game.is_terminal(new_state):
            self._finish(slot, int(round(game.outcome(new_state))))
        elif game.move_count(new_state) >= game.max_moves:
            self._finish(slot, 0, capped=True)
        else:
            self._begin_move(slot)

    def _finish(self, slot: int, result: int, *, resigned: bool = False, capped: bool = False) -> None:
        g = self._games[slot]
        # the area of the last position (Go): the scored result when the rules ended the game,
        # the position at resignation (flagged as not scored) otherwise
        record = g.builder.finish(result, self.clock(), resigned=resigned, resign_disabled=g.resign_disabled,
                                  resign_would_have=g.resign_would_have,
                                  final_area=self.game.final_area(g.state),
                                  final_area_scored=not (resigned or capped))
        if capped:
            record.extra["move_cap"] = True
        self.games_total += 1
        self.positions_total += record.num_positions
        if resigned:
            self.resignations_total += 1
        if g.resign_disabled:
            self.resign_disabled_games_total += 1
            if g.resign_would_have >= 0:
                self.resign_probe_triggered_total += 1
                would_be_view = result if g.resign_would_have == 0 else -result
                if would_be_view >= 0:  # that player won or drew: resigning would have been wrong
                    self.resign_false_positives_total += 1
            if self.resign_calibration is not None:
                for player in (0, 1):
                    if g.lowest_value[player] < 1.0:
                        view = result if player == 0 else -result
                        self.resign_calibration.observe(g.lowest_value[player], view >= 0)
        self._ready.append(record)
        self._start_if_allowed(slot)

    # ---- driving ------------------------------------------------------------------------------
    def play_round(self) -> list[int]:
        """One search round: every game in flight runs its next simulation(s), one batched
        evaluation; returns the slots whose move was made in it (finished games wait in
        :meth:`step`'s next answer)."""
        done = self._tree.run_round(self.evaluator)
        t0 = time.perf_counter()
        for s in done:
            self._make_move(s)
        self.move_seconds += time.perf_counter() - t0
        return done

    def step(self) -> list[GameRecord]:
        """Advance every game in flight by at least one move (all simulations of that move);
        return the games that finished (new games take their slots)."""
        t0 = time.perf_counter()
        waiting = {s for s, g in enumerate(self._games) if g is not None}
        while waiting:
            for s in self.play_round():
                waiting.discard(s)
        self.busy_seconds += time.perf_counter() - t0
        out, self._ready = self._ready, []
        return out

    def play_games(self, n: int) -> list[GameRecord]:
        """The next ``n`` finished games (games finished beyond ``n`` are kept for the next call)."""
        t0 = time.perf_counter()
        while len(self._ready) < n and self.games_in_flight:
            self.play_round()
        self.busy_seconds += time.perf_counter() - t0
        out, self._ready = self._ready[:n], self._ready[n:]
        return out

    # ---- counters -----------------------------------------------------------------------------
    @property
    def evals_total(self) -> int:
        return self._tree.times.evals

    @property
    def games_in_flight(self) -> int:
        return sum(g is not None for g in self._games)

    @property
    def games_started(self) -> int:
        """Games this worker has started (finished, in flight, or ended by a restart)."""
        return self._next_index

    def stats(self) -> dict[str, Any]:
        """Counters with the field names of the "worker" metric lines (cumulative ``_total``),
        rates over the worker's busy time, and the split of that time (seconds and shares)."""
        t = self._tree.times
        busy = max(self.busy_seconds, 1e-9)
        ev_times = getattr(self.evaluator, "times", None)
        encode = float(getattr(ev_times, "encode", 0.0)) if ev_times is not None else 0.0
        rollout = float(getattr(ev_times, "rollout", 0.0)) if ev_times is not None else 0.0
        tree = t.tree + self.move_seconds
        total = max(t.rules + tree + t.network, 1e-9)
        return {
            "games_total": self.games_total,
            "positions_total": self.positions_total,
            "evals_total": t.evals,
            "evals_per_second": t.evals / busy,
            "positions_per_second": self.positions_total_moves() / busy,
            "snapshot_version": self.snapshot_version,
            "games_in_flight": self.games_in_flight,
            "resign_disabled_games_total": self.resign_disabled_games_total,
            "resign_false_positives_total": self.resign_false_positives_total,
            "resign_probe_triggered_total": self.resign_probe_triggered_total,
            "resignations_total": self.resignations_total,
            **({"resign_threshold_now": self.resign_calibration.threshold}
               if self.resign_calibration is not None else {}),
            "collisions_total": t.collisions,
            "batches_total": t.batches,
            "mean_batch_size": t.evals / max(t.batches, 1),
            "seconds_busy": self.busy_seconds,
            "seconds_rules": t.rules,
            "seconds_tree": tree,
            "seconds_network": t.network,
            "seconds_encode": encode,
            "seconds_rollout": rollout,
            "time_share_rules": t.rules / total,
            "time_share_tree": tree / total,
            "time_share_network": t.network / total,
        }

    def positions_total_moves(self) -> int:
        """Moves made so far, in finished games and in games still in flight."""
        return self.positions_total + sum(g.moves_made for g in self._games if g is not None)
