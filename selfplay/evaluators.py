"""Leaf evaluators: give a batch of search leaves their move priors and values.

Every evaluator takes a :class:`LeafBatch` (the leaves' states, side to move and legal masks,
plus the random generator of the game each leaf belongs to) and returns

- ``priors``: float32 (N, A), a distribution over the legal moves (zero on illegal ones);
- ``values``: float32 (N,), in [-1, 1] from the view of the player to move at the leaf.

Implementations:

- :class:`NetworkEvaluator` — the policy-value network, one batched forward pass per call.
- :class:`RandomRolloutEvaluator` — uniform priors, value = outcome of one uniformly random
  playout: plain Monte Carlo tree search (the baseline that needs no network).
- :class:`UniformEvaluator` — uniform priors and value 0: search guided by terminal outcomes only.
- :class:`MixedEvaluator` — network priors; value ``(1 - lambda) v_net + lambda z_rollout``,
  the leaf evaluation of AlphaGo (Silver et al. 2016, "Mastering the game of Go with deep neural
  networks and tree search", Eq. for V(s_L)).
"""

from __future__ import annotations

import copy
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Protocol, Sequence, runtime_checkable

import numpy as np
import torch

from selfplay.errors import ConfigError
from selfplay.games.base import Game
from selfplay.inference.base import INFERENCE_CHOICES, PRECISIONS
from selfplay.network import PolicyValueNet


@dataclass
class LeafBatch:
    """Leaves waiting for evaluation.

    states: the game states (non-terminal); to_play: int8 (N,) player to move at each leaf;
    legal: bool (N, A) legal-move masks, or None where the search asks an evaluator with
    ``evaluate_logits`` before the leaves' legal moves are worked out (it needs none there);
    rngs: the random generator of each leaf's game (so that rollouts are reproducible per game
    whatever else shares the batch)."""

    game: Game
    states: Sequence[Any]
    to_play: np.ndarray
    legal: np.ndarray | None
    rngs: Sequence[np.random.Generator]

    def __len__(self) -> int:
        return len(self.states)

    def histories(self) -> np.ndarray:
        """int8 (N, history_length, *compact_shape): the network's compact input boards (read
        straight from the search's state pool when the states are its rows)."""
        pooled = getattr(self.states, "histories", None)
        if pooled is not None:
            return pooled()
        return self.game.compact_histories(self.states)

    def planes(self) -> np.ndarray:
        """float32 (N, *input_shape): the network input."""
        return self.game.planes_from_compact(self.histories(), self.to_play)


@runtime_checkable
class Evaluator(Protocol):
    """What the search asks of a leaf evaluator."""

    def check_game(self, game: Game) -> None:
        """Raise ConfigError if this evaluator cannot evaluate positions of ``game``."""

    def evaluate(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        """(priors float32 (N, A) over legal moves, values float32 (N,) from the leaf mover's view)."""

    # Optional: ``evaluate_logits(batch) -> (logits float32 (N, A), values float32 (N,))``, the raw
    # policy whose softmax over each leaf's legal moves is what ``evaluate`` returns as priors. The
    # search uses it where present (it computes that softmax while storing the priors, or, in a
    # game with a state pool, when a descent first needs the leaf's legal moves: its
    # ``batch.legal`` is then None).


def uniform_priors(legal: np.ndarray) -> np.ndarray:
    """float32 (N, A): the uniform distribution over each row's legal moves."""
    counts = legal.sum(axis=1, keepdims=True)
    return (legal / np.maximum(counts, 1)).astype(np.float32)


def random_rollout_value(game: Game, state: Any, rng: np.random.Generator, max_moves: int | None = None) -> float:
    """Play uniformly random legal moves from ``state`` to the end; return the outcome in
    {-1, 0, 1} from the view of the player to move at ``state`` (0 if the cap is reached)."""
    mover = game.to_play(state)
    cap = game.max_moves if max_moves is None else max_moves
    s = state
    steps = 0
    while not game.is_terminal(s):
        if steps >= cap:
            return 0.0
        legal = np.flatnonzero(game.legal_mask(s))
        s = game.play(s, int(legal[rng.integers(legal.size)]))
        steps += 1
    return float(game.value_for_mover(s, mover))


@dataclass
class EvaluatorTimes:
    """Seconds spent inside an evaluator: building inputs vs the network's forward pass."""

    encode: float = 0.0
    forward: float = 0.0
    rollout: float = 0.0
    calls: int = 0
    leaves: int = 0


@dataclass
class SwapStats:
    """How new weights (snapshots) reached the forward pass.

    swaps_total: weight sets put into use; swap_seconds_total / last_swap_seconds: seconds spent
    exporting and compiling them (in the background for :meth:`NetworkEvaluator.prepare`, on the
    hot path for weights changed in place); blocking_swaps_total: of those, swaps compiled on the
    hot path; refused: version -> why its compile failed (the previous weights stayed in use)."""

    swaps_total: int = 0
    blocking_swaps_total: int = 0
    swap_seconds_total: float = 0.0
    last_swap_seconds: float = 0.0
    refused: dict[int, str] = field(default_factory=dict)


def softmax_over_legal(logits: np.ndarray, legal: np.ndarray) -> np.ndarray:
    """float32 (N, A): the softmax of ``logits`` over each row's legal actions, 0 on illegal ones."""
    masked = np.where(legal, logits.astype(np.float32, copy=False), np.float32(-np.inf))
    masked -= masked.max(axis=1, keepdims=True)
    np.exp(masked, out=masked)
    masked /= masked.sum(axis=1, keepdims=True)
    return masked


#: backend chosen by "auto" per (network shape, batch, threads, precision) in this process, so a
#: second evaluator of the same worker does not calibrate again
_AUTO_CHOICES: dict[str, str] = {}


class NetworkEvaluator:
    """Batched policy-value network evaluation on an inference backend.

    ``backend``: "torch", "openvino", "onnxruntime" (see :mod:`selfplay.inference`) or "auto" =
    the fastest of those that import here, measured at ``batch_hint`` leaves per call by a short
    calibration (:func:`selfplay.inference.choose.choose_backend`; ``self.choice`` says what it
    measured). ``threads``: threads of the forward pass (torch's is process-wide), one by
    default, so workers sharing a machine do not fight over cores. Pass ``game`` to check the
    fit at once.

    ``precision``: "float32", "bfloat16", or "auto" (default) = bfloat16 on CPUs with bfloat16
    matrix units (AMX), float32 elsewhere; :func:`selfplay.inference.resolve_precision` has
    each backend's rule. Priors and values come back as float32 either way; bfloat16 keeps
    about 3 significant digits, which moves priors and values by well under a percent
    (reduced-precision inference is common practice for search networks).

    New weights: :meth:`prepare` compiles a snapshot in a background thread while the current
    one keeps playing, and :meth:`swap_if_ready` puts it into use between steps. Weights loaded
    into ``net`` in place (``load_state_dict``, an optimiser step) are noticed at the next call
    and compiled there (a blocking swap)."""

    def __init__(self, net: PolicyValueNet, threads: int = 1, game: Game | None = None,
                 precision: str = "auto", backend: str = "torch",
                 batch_hint: int | None = None, say: Callable[[str], None] | None = None) -> None:
        if not isinstance(net, PolicyValueNet):
            raise ConfigError(f"NetworkEvaluator needs a PolicyValueNet, got {type(net).__name__}")
        if not isinstance(threads, int) or threads < 1:
            raise ConfigError(f"evaluator threads={threads!r} must be a positive integer")
        if precision not in PRECISIONS:
            raise ConfigError(f"evaluator precision={precision!r} must be one of {', '.join(PRECISIONS)}")
        if backend not in INFERENCE_CHOICES:
            raise ConfigError(f"inference backend {backend!r} must be one of {', '.join(INFERENCE_CHOICES)}")
        self.net = net
        self.threads = threads
        self.requested_precision = precision
        self.batch_hint = batch_hint
        self.times = EvaluatorTimes()
        self.swaps = SwapStats()
        self.choice: Any = None
        self._say = say
        self._lock = threading.Lock()
        self._ready: tuple[int, PolicyValueNet, Any, float] | None = None
        self._pending: threading.Thread | None = None
        torch.set_num_threads(threads)
        if game is not None:
            self.check_game(game)
        self.backend = backend if backend != "auto" else self._choose(batch_hint)
        if self.choice is None:
            self._compiled = self._compile(net)
        self._fingerprint = self._weights_fingerprint()

    # ---- backend --------------------------------------------------------------------------
    def _choose(self, batch_hint: int | None) -> str:
        from selfplay.inference.choose import cache_key, choose_backend

        batch = max(1, int(batch_hint or 32))
        key = cache_key(self.net, batch, self.threads, self.requested_precision)
        if key in _AUTO_CHOICES:
            return _AUTO_CHOICES[key]
        self.choice = choose_backend(self.net, batch, self.threads, self.requested_precision, say=self._say)
        self._compiled = self.choice.compiled
        _AUTO_CHOICES[key] = self.choice.backend
        if self._say:
            self._say(self.choice.describe())
        return self.choice.backend

    def _compile(self, net: PolicyValueNet) -> Any:
        from selfplay.inference.base import build_backend

        return build_backend(self.backend, net, self.threads, self.requested_precision, self.batch_hint)

    @property
    def compiled(self) -> Any:
        """The compiled network in use now: float32 planes -> (logits, values)."""
        return self._current()

    @property
    def precision(self) -> str:
        """The precision the forward pass runs at now ("float32" or "bfloat16")."""
        return self._compiled.precision

    def _weights_fingerprint(self) -> int:
        # version counters of the first and last parameter and the first batch-norm statistic:
        # load_state_dict and optimiser steps touch them all (the three tensors are looked up
        # once per network, so a call costs well under a microsecond)
        if getattr(self, "_watched_net", None) is not self.net:
            params, buffers = list(self.net.parameters()), list(self.net.buffers())
            self._watched = (params[0], params[-1], (buffers or params)[0])
            self._watched_net = self.net
        first, last, stats = self._watched
        return first._version + last._version + stats._version + id(self.net)

    def _current(self) -> Any:
        fingerprint = self._weights_fingerprint()
        if fingerprint != self._fingerprint:  # weights replaced in place: compile on the hot path
            t0 = time.perf_counter()
            self._compiled = self._compile(self.net)
            self._note_swap(time.perf_counter() - t0, blocking=True)
            self._fingerprint = self._weights_fingerprint()
        return self._compiled

    def _note_swap(self, seconds: float, blocking: bool) -> None:
        self.swaps.swaps_total += 1
        self.swaps.blocking_swaps_total += int(blocking)
        self.swaps.swap_seconds_total += seconds
        self.swaps.last_swap_seconds = seconds

    # ---- new weights off the hot path --------------------------------------------------------
    def prepare(self, weights: PolicyValueNet | dict[str, torch.Tensor], version: int,
                background: bool = True) -> bool:
        """Compile ``weights`` (a net of the same shape, or its state dict) as snapshot
        ``version``; in a background thread unless ``background`` is False. The current weights
        stay in use until :meth:`swap_if_ready`. Weights that do not fit, or a failed compile,
        are recorded in ``swaps.refused`` (the version and why) and change nothing; returns
        False when the weights were refused at once."""
        new_net = copy.deepcopy(self.net)
        state = weights.state_dict() if isinstance(weights, torch.nn.Module) else weights
        try:
            new_net.load_state_dict(state, strict=True)
        except (RuntimeError, TypeError, KeyError) as exc:
            self.swaps.refused[int(version)] = f"weights do not fit the network: {str(exc).splitlines()[0]}"
            return False
        new_net.eval()

        def work() -> None:
            t0 = time.perf_counter()
            try:
                compiled = self._compile(new_net)
            except Exception as exc:  # noqa: BLE001 - a runtime may fail in many ways; keep playing
                with self._lock:
                    self.swaps.refused[int(version)] = f"{type(exc).__name__}: {exc}".splitlines()[0]
                return
            with self._lock:
                self._ready = (int(version), new_net, compiled, time.perf_counter() - t0)

        if self._pending is not None:
            self._pending.join()  # one compile at a time; the newer version replaces the older
        if background:
            self._pending = threading.Thread(target=work, name=f"compile-v{version}", daemon=True)
            self._pending.start()
        else:
            work()
        return True

    def swap_if_ready(self, wait: bool = False) -> int | None:
        """Put a prepared snapshot into use; returns its version, or None if none is ready
        (``wait``: block until the pending compile has finished)."""
        if wait and self._pending is not None:
            self._pending.join()
        with self._lock:
            ready, self._ready = self._ready, None
        if ready is None:
            return None
        version, new_net, compiled, seconds = ready
        self.net, self._compiled = new_net, compiled
        self._fingerprint = self._weights_fingerprint()
        self._note_swap(seconds, blocking=False)
        return version

    # ---- evaluation ---------------------------------------------------------------------------
    def check_game(self, game: Game) -> None:
        problem = self.net.fits(game)
        if problem:
            raise ConfigError(problem)

    def forward_logits(self, planes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Raw network outputs for float32 planes (N, C, H, W): (logits (N, A), values (N,))."""
        return self._current()(planes)

    def forward_planes(self, planes: np.ndarray, legal: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Network on ready-made input planes: (priors over legal moves, values)."""
        t0 = time.perf_counter()
        logits, values = self._current()(planes)
        out = softmax_over_legal(logits, np.asarray(legal, dtype=bool)), values.astype(np.float32, copy=False)
        self.times.forward += time.perf_counter() - t0
        return out

    def _planes(self, batch: LeafBatch) -> np.ndarray:
        """The network input of ``batch``, counted (encoding time, calls, leaves)."""
        t0 = time.perf_counter()
        planes = batch.planes()
        self.times.encode += time.perf_counter() - t0
        self.times.calls += 1
        self.times.leaves += len(batch)
        return planes

    def evaluate(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        return self.forward_planes(self._planes(batch), batch.legal)

    def evaluate_logits(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        """The network's raw outputs for ``batch``: (policy logits float32 (N, A), values float32
        (N,)); :meth:`evaluate`'s priors are the logits' softmax over each leaf's legal moves."""
        planes = self._planes(batch)
        t0 = time.perf_counter()
        out = self._current()(planes)
        self.times.forward += time.perf_counter() - t0
        return out

    def describe(self) -> dict[str, Any]:
        """Backend facts for metric lines: backend, precision, swap costs, versions refused, and
        the bound ``auto`` measured (absent when the per-machine cache made the choice)."""
        out = {"inference_backend": self.backend, "inference_precision": self.precision,
               "snapshot_swaps_total": self.swaps.swaps_total,
               "snapshot_swap_seconds_last": self.swaps.last_swap_seconds,
               "snapshot_swap_seconds_total": self.swaps.swap_seconds_total,
               "snapshots_refused_total": len(self.swaps.refused)}
        bound = self.choice.bound_evals_per_second if self.choice is not None else None
        if bound is not None:
            out["inference_bound_evals_per_second"] = bound
        return out


class RandomRolloutEvaluator:
    """Uniform priors over legal moves; value = one uniformly random playout's outcome from the
    leaf (mover's view). Plain Monte Carlo tree search, the no-network baseline."""

    def __init__(self, rollouts: int = 1, max_moves: int | None = None) -> None:
        if not isinstance(rollouts, int) or rollouts < 1:
            raise ConfigError(f"rollouts={rollouts!r} must be a positive integer")
        self.rollouts = rollouts
        self.max_moves = max_moves
        self.times = EvaluatorTimes()

    def check_game(self, game: Game) -> None:
        return None

    def evaluate(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        t0 = time.perf_counter()
        values = np.empty(len(batch), dtype=np.float32)
        for i, (s, rng) in enumerate(zip(batch.states, batch.rngs)):
            total = 0.0
            for _ in range(self.rollouts):
                total += random_rollout_value(batch.game, s, rng, self.max_moves)
            values[i] = total / self.rollouts
        self.times.rollout += time.perf_counter() - t0
        self.times.calls += 1
        self.times.leaves += len(batch)
        return uniform_priors(batch.legal), values


class UniformEvaluator:
    """Uniform priors and value 0 for every non-terminal leaf: the search learns only from the
    exact values of terminal positions it reaches."""

    def __init__(self) -> None:
        self.times = EvaluatorTimes()

    def check_game(self, game: Game) -> None:
        return None

    def evaluate(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        self.times.calls += 1
        self.times.leaves += len(batch)
        return uniform_priors(batch.legal), np.zeros(len(batch), dtype=np.float32)


class MixedEvaluator:
    """Network priors; leaf value ``(1 - lam) * v_net + lam * z_rollout`` with ``z_rollout`` the
    outcome of a uniformly random playout (AlphaGo's mixing of the value network and fast
    rollouts, Silver et al. 2016). ``lam`` must lie in [0, 1]."""

    def __init__(self, net: PolicyValueNet, lam: float, threads: int = 1, game: Game | None = None,
                 max_moves: int | None = None, backend: str = "torch", batch_hint: int | None = None,
                 say: Callable[[str], None] | None = None) -> None:
        try:
            lam = float(lam)
        except (TypeError, ValueError):
            raise ConfigError(f"rollout mix lambda={lam!r} must be a number in [0, 1]") from None
        if not 0.0 <= lam <= 1.0 or lam != lam:
            raise ConfigError(f"rollout mix lambda={lam} must be in [0, 1]")
        self.lam = lam
        self.network = NetworkEvaluator(net, threads=threads, game=game, backend=backend,
                                        batch_hint=batch_hint, say=say)
        self.max_moves = max_moves
        self.times = self.network.times

    @property
    def net(self) -> PolicyValueNet:
        return self.network.net

    def prepare(self, weights: Any, version: int, background: bool = True) -> None:
        self.network.prepare(weights, version, background)

    def swap_if_ready(self, wait: bool = False) -> int | None:
        return self.network.swap_if_ready(wait)

    def describe(self) -> dict[str, Any]:
        return self.network.describe()

    def check_game(self, game: Game) -> None:
        self.network.check_game(game)

    def evaluate(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        priors, v_net = self.network.evaluate(batch)
        if self.lam == 0.0:
            return priors, v_net
        t0 = time.perf_counter()
        z = np.array([random_rollout_value(batch.game, s, rng, self.max_moves)
                      for s, rng in zip(batch.states, batch.rngs)], dtype=np.float32)
        self.times.rollout += time.perf_counter() - t0
        return priors, ((1.0 - self.lam) * v_net + self.lam * z).astype(np.float32)


def make_evaluator(net: PolicyValueNet | None, game: Game, rollout_mix_lambda: float = 0.0,
                   threads: int = 1, inference: str = "torch", batch_hint: int | None = None,
                   say: Callable[[str], None] | None = None) -> Evaluator:
    """The evaluator a run's settings ask for: the network (``lambda = 0``), the network mixed
    with rollouts (``0 < lambda``), or pure rollouts when there is no network.

    ``inference``: the backend of the network's forward pass ("auto", "torch", "openvino",
    "onnxruntime"; ``[worker] inference``); ``batch_hint``: leaves per call the worker will
    feed it (games in parallel x leaves per game), the batch "auto" calibrates at; ``say``
    receives the one-line notices of "auto" (what it chose, backends it could not use)."""
    if net is None:
        return RandomRolloutEvaluator()
    if rollout_mix_lambda == 0.0:
        return NetworkEvaluator(net, threads=threads, game=game, backend=inference, batch_hint=batch_hint, say=say)
    return MixedEvaluator(net, rollout_mix_lambda, threads=threads, game=game, backend=inference,
                          batch_hint=batch_hint, say=say)


__all__ = [
    "Evaluator", "EvaluatorTimes", "LeafBatch", "MixedEvaluator", "NetworkEvaluator",
    "RandomRolloutEvaluator", "SwapStats", "UniformEvaluator", "make_evaluator", "random_rollout_value",
    "softmax_over_legal", "uniform_priors",
]
