"""The replay buffer: a window over the newest N positions, held in RAM in compact form.

Positions live in ring arrays indexed by a global sequence number (``seq % capacity``):
the compact board (int8), side to move, packed legal mask, outcome, full-search flag, snapshot,
how many predecessor boards of the same game are available for history planes (the
predecessor of position ``seq`` is ``seq - 1`` when it belongs to the same game), and where the
position's policy entries start in a second ring of (int16 action, float16 probability) pairs.
For 9x9 Go that is 111 bytes per position plus 4 bytes per policy entry. For a game scored by
area (Go) each position also keeps the global number of its game (8 bytes), and a third ring
keeps each game's final ownership, score margin and weight once (81 + 8 bytes per game on 9x9).

Sampling is uniform over the window, or linearly tilted toward recent positions
(``recency_weight``: the newest position is ``1 + recency_weight`` times as likely as the oldest).
A random board symmetry is applied per sampled position (``augment``), to the boards, the policy
and the legal mask alike. Calls from several threads are serialised by a lock.
"""

from __future__ import annotations

import json
import threading
from typing import Any, Iterable

import numpy as np

from selfplay.errors import ConfigError, FormatError, SelfplayError
from selfplay.games.base import Game
from selfplay.records import GameRecord
from selfplay.replay.batch import BatchBuilder
from selfplay.replay.codec import packed_width


class BufferEmptyError(SelfplayError):
    """Sampling asked of a buffer holding no (suitable) positions."""


class ReplayBuffer:
    """Window over the newest ``capacity_positions`` positions of one game.

    ``recency_weight`` >= 0: 0 samples uniformly; w makes the newest position 1 + w times as
    likely as the oldest, linearly in between. ``augment``: apply a random symmetry of the game
    to each sampled position. ``seed``: seed of the sampling generator.
    ``initial_entries_per_position``: starting room of the policy-entry ring (it grows as needed,
    up to one entry per action per position).
    """

    def __init__(self, game: Game, capacity_positions: int, *, recency_weight: float = 0.0,
                 augment: bool = True, seed: int | None = None,
                 initial_entries_per_position: int = 16) -> None:
        if not isinstance(capacity_positions, int) or capacity_positions < 1:
            raise ConfigError(f"replay capacity_positions={capacity_positions!r} must be a positive integer")
        if not (recency_weight >= 0 and np.isfinite(recency_weight)):
            raise ConfigError(f"replay recency_weight={recency_weight!r} must be a finite number >= 0")
        self.game = game
        self.builder = BatchBuilder(game)
        self.capacity = capacity_positions
        self.recency_weight = float(recency_weight)
        self.augment = bool(augment)
        self.rng = np.random.default_rng(seed)
        self.num_actions = game.num_actions
        self.compact_shape = tuple(game.compact_shape)
        self.history = self.builder.history
        cap = capacity_positions
        self._boards = np.zeros((cap, *self.compact_shape), dtype=np.int8)
        self._to_play = np.zeros(cap, dtype=np.int8)
        self._legal = np.zeros((cap, packed_width(self.num_actions)), dtype=np.uint8)
        self._outcome = np.zeros(cap, dtype=np.int8)
        self._full = np.zeros(cap, dtype=bool)
        self._snapshot = np.zeros(cap, dtype=np.int32)
        self._action = np.zeros(cap, dtype=np.int16)  # the move played (policy-gradient objective)
        self._hist_avail = np.zeros(cap, dtype=np.uint8)  # predecessors of the same game, <= history-1
        self._pol_start = np.zeros(cap, dtype=np.int64)   # global entry sequence number
        self._pol_count = np.zeros(cap, dtype=np.uint16)
        self._max_entries = cap * self.num_actions
        ecap = min(self._max_entries, cap * max(1, min(initial_entries_per_position, self.num_actions)))
        self._e_action = np.zeros(ecap, dtype=np.int16)
        self._e_prob = np.zeros(ecap, dtype=np.float16)
        self.has_area = self.builder.has_area
        gcap = min(cap, 64) if self.has_area else 0
        self._game_of = np.zeros(cap if self.has_area else 0, dtype=np.int64)  # global game number
        self._g_own = np.zeros((gcap, *self.compact_shape), dtype=np.int8)  # player 0's view
        self._g_margin = np.zeros(gcap, dtype=np.float32)
        self._g_weight = np.zeros(gcap, dtype=np.float32)
        self._next_game = 0
        self._next_seq = 0
        self._oldest_seq = 0
        self._next_entry = 0
        self._eligible = 0  # full-search positions with a policy target in the window
        self.games_added = 0
        self.positions_added = 0
        self.newest_snapshot: int | None = None
        self._game_key = (game.name, json.dumps(game.options(), sort_keys=True))
        self._checked: dict[tuple[str, str], bool] = {}
        self._mutex = threading.RLock()
        #: what the last :meth:`refill_from` skipped (a ReadReport), None before one ran
        self.refill_report: Any = None

    @classmethod
    def from_config(cls, game: Game, config: Any, seed: int | None = None) -> "ReplayBuffer":
        """A buffer sized and set by a :class:`selfplay.replay.config.ReplayConfig`."""
        return cls(game, int(config.window_positions), recency_weight=float(config.recency_weight),
                   augment=bool(config.augment), seed=seed)

    def refill_from(self, source: Any) -> int:
        """Fill the window from the newest committed shards of a run (a RecordStore, a RunDir or
        a path), oldest first. Damaged frames and records of another game are skipped and
        described in :attr:`refill_report`. Returns the positions added."""
        from selfplay.replay.reader import ReadReport, newest_records
        from selfplay.rundir import RunDir
        run = getattr(source, "run", source)
        run = run if isinstance(run, RunDir) else RunDir.open(run)
        self.refill_report = report = ReadReport()
        if not run.catalog.exists():
            return 0
        added = 0
        for rec in newest_records(run, self.capacity, report=report):
            try:
                added += self.add(rec)
            except FormatError as exc:
                report.games_skipped += 1
                report.problems.append(f"left out of the window: {exc}")
        return added

    # ---- size --------------------------------------------------------------------------------
    def __len__(self) -> int:
        """Positions in the window."""
        return self._next_seq - self._oldest_seq

    @property
    def policy_target_positions(self) -> int:
        """Full-search positions with a policy target in the window."""
        return self._eligible

    @property
    def nbytes(self) -> int:
        """Bytes of RAM held by the ring arrays (as allocated)."""
        arrays = (self._boards, self._to_play, self._legal, self._outcome, self._full,
                  self._snapshot, self._action, self._hist_avail, self._pol_start, self._pol_count,
                  self._e_action, self._e_prob, self._game_of, self._g_own, self._g_margin,
                  self._g_weight)
        return int(sum(a.nbytes for a in arrays))

    def max_nbytes(self) -> int:
        """Upper bound of :attr:`nbytes`: the entry ring grown to one entry per action."""
        per_entry = self._e_action.itemsize + self._e_prob.itemsize
        return self.nbytes - self._e_action.nbytes - self._e_prob.nbytes + self._max_entries * per_entry

    # ---- ingest ------------------------------------------------------------------------------
    def add_many(self, records: Iterable[GameRecord]) -> int:
        """Add several games; returns the positions added."""
        return sum(self.add(r) for r in records)

    def add(self, rec: GameRecord) -> int:
        """Add one finished game's positions (the oldest positions leave the window); returns
        the number added. Raises FormatError for a record of another game or shape."""
        with self._mutex:
            return self._add(rec)

    def _add(self, rec: GameRecord) -> int:
        self._check_record(rec)
        t = rec.num_positions
        self.games_added += 1
        if t == 0:
            return 0
        cap = self.capacity
        first = max(0, t - cap)  # a game longer than the window keeps its last positions
        n_new = t - first
        off = np.asarray(rec.policy_offsets, dtype=np.int64)
        w = np.asarray(rec.policy_weights, dtype=np.float64)
        acts = np.asarray(rec.policy_actions)
        lo, hi = int(off[first]), int(off[t])
        counts = np.diff(off[first:])
        w, acts = w[lo:hi], acts[lo:hi]
        csum = np.concatenate(([0.0], np.cumsum(w)))
        rel = off[first:] - lo
        sums = csum[rel[1:]] - csum[rel[:-1]]
        owner = np.repeat(np.arange(n_new), counts)
        with np.errstate(invalid="ignore", divide="ignore"):
            probs = w / sums[owner] if len(w) else w
        keep = probs > 0
        if not keep.all():
            acts, probs, owner = acts[keep], probs[keep], owner[keep]
            counts = np.bincount(owner, minlength=n_new)
        nnz = int(acts.shape[0])

        # evict the oldest positions to make room
        over = len(self) + n_new - cap
        if over > 0:
            self._evict(over)
        # room in the entry ring
        e_oldest = int(self._pol_start[self._oldest_seq % cap]) if len(self) else self._next_entry
        if self._next_entry - e_oldest + nnz > self._e_action.shape[0]:
            self._grow_entries(self._next_entry - e_oldest + nnz, e_oldest)

        seq0 = self._next_seq
        s = slice(first, t)
        self._put(self._boards, seq0, rec.boards[s])
        self._put(self._to_play, seq0, rec.to_play[s])
        self._put(self._legal, seq0, rec.legal[s])
        self._put(self._outcome, seq0, rec.outcomes[s])
        full = np.asarray(rec.full_search[s], dtype=bool)
        self._put(self._full, seq0, full)
        snap = np.asarray(rec.snapshot[s])
        self._put(self._snapshot, seq0, snap)
        self._put(self._action, seq0, np.asarray(rec.actions[s], dtype=np.int16))
        self._put(self._hist_avail, seq0,
                  np.minimum(np.arange(first, t), self.history - 1).astype(np.uint8))
        starts = self._next_entry + np.cumsum(counts) - counts
        self._put(self._pol_start, seq0, starts)
        self._put(self._pol_count, seq0, counts.astype(np.uint16))
        if self.has_area:
            self._put_area(rec, seq0, n_new)
        ecap = self._e_action.shape[0]
        self._put(self._e_action, self._next_entry, acts, ecap)
        self._put(self._e_prob, self._next_entry, probs.astype(np.float16), ecap)
        self._next_seq += n_new
        self._next_entry += nnz
        self._eligible += int(np.count_nonzero(full & (counts > 0)))
        self.positions_added += n_new
        top = int(snap.max())
        self.newest_snapshot = top if self.newest_snapshot is None else max(self.newest_snapshot, top)
        return n_new

    def _put_area(self, rec: GameRecord, seq0: int, n_new: int) -> None:
        """Store the game's final area once in the game ring; its positions point to it."""
        gseq = self._next_game
        oldest = int(self._game_of[self._oldest_seq % self.capacity]) if self._oldest_seq < seq0 else gseq
        gcap = self._g_own.shape[0]
        if gseq - oldest + 1 > gcap:
            new = gcap
            while new < gseq - oldest + 1:
                new *= 2
            seqs = np.arange(oldest, gseq)
            own = np.zeros((new, *self.compact_shape), dtype=np.int8)
            margin = np.zeros(new, dtype=np.float32)
            weight = np.zeros(new, dtype=np.float32)
            own[seqs % new] = self._g_own[seqs % gcap]
            margin[seqs % new] = self._g_margin[seqs % gcap]
            weight[seqs % new] = self._g_weight[seqs % gcap]
            self._g_own, self._g_margin, self._g_weight = own, margin, weight
            gcap = new
        g = gseq % gcap
        if rec.final_ownership is None or rec.final_margin is None:
            self._g_own[g], self._g_margin[g], self._g_weight[g] = 0, 0.0, 0.0
        else:
            self._g_own[g] = rec.final_ownership
            self._g_margin[g] = rec.final_margin
            self._g_weight[g] = 1.0 if rec.final_area_scored else 0.0
        self._put(self._game_of, seq0, np.full(n_new, gseq, dtype=np.int64))
        self._next_game += 1

    def _check_record(self, rec: GameRecord) -> None:
        key = (rec.game, json.dumps(rec.game_options, sort_keys=True))
        if key not in self._checked:
            same = key == self._game_key
            if not same:
                try:
                    from selfplay.games.registry import make_game
                    g = make_game(rec.game, **rec.game_options)
                    same = (g.name, json.dumps(g.options(), sort_keys=True)) == self._game_key
                except SelfplayError:
                    same = False
            self._checked[key] = same
        if not self._checked[key]:
            raise FormatError(f"game {rec.game_id!r} is {rec.game} {rec.game_options}, but this "
                              f"buffer holds {self.game.name} {self.game.options()}")
        t = rec.num_positions
        if t and tuple(rec.boards.shape[1:]) != self.compact_shape:
            raise FormatError(f"game {rec.game_id!r} has boards of shape {tuple(rec.boards.shape[1:])}, "
                              f"expected {self.compact_shape}")
        if t and rec.legal.shape[1] != self._legal.shape[1]:
            raise FormatError(f"game {rec.game_id!r} has legal rows of {rec.legal.shape[1]} bytes, "
                              f"expected {self._legal.shape[1]} for {self.num_actions} actions")
        own = rec.final_ownership
        if self.has_area and own is not None and tuple(np.shape(own)) != self.compact_shape:
            raise FormatError(f"game {rec.game_id!r} has a final ownership of shape {tuple(np.shape(own))}, "
                              f"expected {self.compact_shape}")

    def _put(self, arr: np.ndarray, seq: int, values: np.ndarray, size: int | None = None) -> None:
        size = arr.shape[0] if size is None else size
        n = len(values)
        if n == 0:
            return
        start = seq % size
        head = min(n, size - start)
        arr[start:start + head] = values[:head]
        if n > head:
            arr[:n - head] = values[head:]

    def _ring_slots(self, seq: int, n: int) -> np.ndarray:
        return (seq + np.arange(n)) % self.capacity

    def _evict(self, n: int) -> None:
        slots = self._ring_slots(self._oldest_seq, n)
        self._eligible -= int(np.count_nonzero(self._full[slots] & (self._pol_count[slots] > 0)))
        self._oldest_seq += n

    def _grow_entries(self, needed: int, e_oldest: int) -> None:
        old = self._e_action.shape[0]
        new = old
        while new < needed:
            new *= 2
        new = min(max(new, needed), self._max_entries)
        seqs = np.arange(e_oldest, self._next_entry)
        act = np.zeros(new, dtype=np.int16)
        prob = np.zeros(new, dtype=np.float16)
        act[seqs % new] = self._e_action[seqs % old]
        prob[seqs % new] = self._e_prob[seqs % old]
        self._e_action, self._e_prob = act, prob

    # ---- sampling ----------------------------------------------------------------------------
    def sample(self, batch_size: int, *, policy_targets_only: bool = False) -> dict[str, np.ndarray]:
        """A batch of ``batch_size`` positions drawn from the window (with replacement).

        Returns numpy arrays: ``planes`` float32 (B, C, H, W); ``policy`` float32 (B, A) rows
        summing to 1 (zero for a position stored without a policy target); ``value`` float32
        (B,) final outcome from the mover's view; ``mask`` bool (B, A) legal moves;
        ``full_search`` bool (B,); ``snapshot`` int32 (B,); ``symmetry`` int8 (B,); ``action``
        int64 (B,) the move played, transformed by the same symmetry. For a game scored by area
        (Go) also ``ownership`` int8 (B, H, W), ``score_margin`` float32 (B,) (both from the
        mover's view, the board under the same symmetry) and ``ownership_weight`` float32 (B,).
        ``policy_targets_only`` draws only full-search positions with a policy target."""
        if batch_size < 1:
            raise ConfigError(f"batch_size={batch_size} must be >= 1")
        if len(self) == 0:
            raise BufferEmptyError("the replay buffer holds no positions yet")
        if policy_targets_only and self._eligible == 0:
            raise BufferEmptyError("the replay buffer holds no full-search positions with a policy target")
        with self._mutex:
            seqs = self._draw(batch_size, policy_targets_only)
            return self._gather(seqs)

    def _uniform_or_recent(self, n: int) -> np.ndarray:
        size = len(self)
        u = self.rng.random(n)
        w = self.recency_weight
        if w > 0:
            # inverse CDF of the density (1 + w x) / (1 + w/2) on [0, 1)
            u = (np.sqrt(1.0 + w * (2.0 + w) * u) - 1.0) / w
        pos = np.minimum((u * size).astype(np.int64), size - 1)
        return self._oldest_seq + pos

    def _valid(self, seqs: np.ndarray, policy_only: bool) -> np.ndarray:
        slots = seqs % self.capacity
        ok = seqs - self._hist_avail[slots] >= self._oldest_seq  # history still in the window
        if policy_only:
            ok &= self._full[slots] & (self._pol_count[slots] > 0)
        return ok

    def _draw(self, b: int, policy_only: bool) -> np.ndarray:
        out = np.empty(0, dtype=np.int64)
        for _ in range(32):
            need = b - out.shape[0]
            if need <= 0:
                return out[:b]
            # oversample by the inverse share of suitable positions
            share = self._eligible / len(self) if policy_only else 1.0
            cand = self._uniform_or_recent(int(need / max(share, 1e-3) * 1.1) + 8)
            out = np.concatenate((out, cand[self._valid(cand, policy_only)]))
        if out.shape[0] >= b:
            return out[:b]
        # very few suitable positions: draw from an explicit list of them
        allseq = np.arange(self._oldest_seq, self._next_seq)
        good = allseq[self._valid(allseq, policy_only)]
        if good.shape[0] == 0:
            raise BufferEmptyError("no position in the window has its history and a policy target")
        return self.rng.choice(good, size=b)

    def _gather(self, seqs: np.ndarray) -> dict[str, np.ndarray]:
        cap = self.capacity
        b = seqs.shape[0]
        slots = seqs % cap
        hist = np.zeros((b, self.history, *self.compact_shape), dtype=np.int8)
        avail = self._hist_avail[slots]
        hist[:, 0] = self._boards[slots]
        for j in range(1, self.history):
            have = avail >= j
            hist[have, j] = self._boards[(seqs[have] - j) % cap]
        counts = self._pol_count[slots].astype(np.int64)
        total = int(counts.sum())
        excl = np.cumsum(counts) - counts
        entry = (np.arange(total) - np.repeat(excl, counts)
                 + np.repeat(self._pol_start[slots], counts)) % self._e_action.shape[0]
        rows = np.repeat(np.arange(b), counts)
        sym = None
        if self.augment and self.builder.num_symmetries > 1:
            sym = self.rng.integers(self.builder.num_symmetries, size=b)
        area: tuple[np.ndarray | None, ...] = (None, None, None)
        if self.has_area:
            g = self._game_of[slots] % self._g_own.shape[0]
            area = (self._g_own[g], self._g_margin[g], self._g_weight[g])
        out = self.builder.build(hist, self._to_play[slots], self._legal[slots], rows,
                                 self._e_action[entry], self._e_prob[entry].astype(np.float64),
                                 self._outcome[slots], self._full[slots], self._snapshot[slots], sym,
                                 *area)
        # the move played, under the same symmetry as the board (int64 (B,))
        out["action"] = self.builder.perms[out["symmetry"].astype(np.int64), self._action[slots].astype(np.int64)]
        return out

    def stats(self) -> dict[str, Any]:
        """Counts for metric lines: window_positions, window_capacity, games and positions added."""
        return {"window_positions": len(self), "window_capacity": self.capacity,
                "window_policy_targets": self._eligible, "buffer_games_added": self.games_added,
                "buffer_positions_added": self.positions_added, "buffer_bytes": self.nbytes}
