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

import time
from dataclasses import dataclass
from typing import Any, Protocol, Sequence, runtime_checkable

import numpy as np
import torch

from selfplay.errors import ConfigError
from selfplay.games.base import Game
from selfplay.network import PolicyValueNet, cpu_has_bf16_matrix_units, fold_for_inference

#: forward-pass precisions of :class:`NetworkEvaluator`; "auto" = bfloat16 where the CPU has
#: bfloat16 matrix units (AMX), float32 elsewhere
PRECISIONS = ("auto", "float32", "bfloat16")
#: "auto" takes bfloat16 only for towers at least this wide: measured here, narrower nets run
#: faster in float32 (the conversions cost more than the matrix units save)
AUTO_BF16_MIN_CHANNELS = 32


@dataclass
class LeafBatch:
    """Leaves waiting for evaluation.

    states: the game states (non-terminal); to_play: int8 (N,) player to move at each leaf;
    legal: bool (N, A) legal-move masks; rngs: the random generator of each leaf's game (so that
    rollouts are reproducible per game whatever else shares the batch)."""

    game: Game
    states: Sequence[Any]
    to_play: np.ndarray
    legal: np.ndarray
    rngs: Sequence[np.random.Generator]

    def __len__(self) -> int:
        return len(self.states)

    def histories(self) -> np.ndarray:
        """int8 (N, history_length, *compact_shape): the network's compact input boards."""
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


class NetworkEvaluator:
    """Batched policy-value network evaluation under ``torch.inference_mode``.

    ``threads`` sets ``torch.set_num_threads`` (process-wide) so that workers sharing a machine do
    not fight over cores; one thread by default. Pass ``game`` to check the fit at once.

    The forward pass runs on an inference copy of the net (:func:`selfplay.network.fold_for_inference`:
    batch norms folded into the convolutions, channels-last layout), which computes the same
    function faster on these CPUs. Weights loaded later into ``net`` in place (for instance by
    ``load_state_dict``) are noticed at the next call and the copy is rebuilt.

    ``precision``: "float32", "bfloat16", or "auto" (default) = bfloat16 on CPUs with bfloat16
    matrix units (AMX: several times the float32 speed at batch 16 and more) for towers of at
    least 32 channels, float32 otherwise.
    Priors and values come back as float32 either way; bfloat16 keeps about 3 significant
    digits, which moves priors and values by well under a percent (reduced-precision inference
    is common practice for search networks)."""

    def __init__(self, net: PolicyValueNet, threads: int = 1, game: Game | None = None,
                 channels_last: bool = True, precision: str = "auto") -> None:
        if not isinstance(net, PolicyValueNet):
            raise ConfigError(f"NetworkEvaluator needs a PolicyValueNet, got {type(net).__name__}")
        if not isinstance(threads, int) or threads < 1:
            raise ConfigError(f"evaluator threads={threads!r} must be a positive integer")
        if precision not in PRECISIONS:
            raise ConfigError(f"evaluator precision={precision!r} must be one of {', '.join(PRECISIONS)}")
        if precision == "auto":
            wide = net.config.channels >= AUTO_BF16_MIN_CHANNELS
            precision = "bfloat16" if wide and cpu_has_bf16_matrix_units() else "float32"
        self.precision = precision
        self.dtype = torch.bfloat16 if precision == "bfloat16" else torch.float32
        self.channels_last = bool(channels_last)
        self.net = net
        self.threads = threads
        torch.set_num_threads(threads)
        self.times = EvaluatorTimes()
        # tensors whose version counters tell that weights were replaced in place: the first
        # and last parameter and the first batch-norm statistic (load_state_dict and optimizer
        # steps touch them all; checking three keeps the per-call cost to a few microseconds)
        params, buffers = list(net.parameters()), list(net.buffers())
        self._tensors = [params[0], params[-1]] + buffers[:1]
        self._fingerprint = -1
        self._inference: torch.nn.Module | None = None
        if game is not None:
            self.check_game(game)

    @property
    def inference_net(self) -> torch.nn.Module:
        """The module the forward pass runs on, rebuilt when the source net's weights changed."""
        fingerprint = sum(t._version for t in self._tensors)
        if self._inference is None or fingerprint != self._fingerprint:
            self._inference = fold_for_inference(self.net, channels_last=self.channels_last, dtype=self.dtype)
            self._fingerprint = fingerprint
        return self._inference

    def check_game(self, game: Game) -> None:
        problem = self.net.fits(game)
        if problem:
            raise ConfigError(problem)

    def input_tensor(self, planes: np.ndarray) -> torch.Tensor:
        """The tensor the net is fed for float32 planes (N, C, H, W), in its memory format."""
        planes = np.asarray(planes, dtype=np.float32)
        if self.channels_last:
            # lay the planes out channels-last in numpy, then view them as NCHW: one copy
            x = torch.from_numpy(np.ascontiguousarray(planes.transpose(0, 2, 3, 1))).permute(0, 3, 1, 2)
        else:
            x = torch.from_numpy(np.ascontiguousarray(planes))
        return x.to(self.dtype) if self.dtype != torch.float32 else x

    def forward_planes(self, planes: np.ndarray, legal: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Network on ready-made input planes: (priors over legal moves, values)."""
        t0 = time.perf_counter()
        module = self.inference_net
        with torch.inference_mode():
            x = self.input_tensor(planes)
            logits, values = module(x)
            logits, values = logits.float(), values.float()
            mask = torch.from_numpy(np.ascontiguousarray(legal, dtype=bool))
            logits = logits.masked_fill(~mask, float("-inf"))
            priors = torch.softmax(logits, dim=1)
            out = priors.numpy().astype(np.float32, copy=False), values.numpy().astype(np.float32, copy=False)
        self.times.forward += time.perf_counter() - t0
        return out

    def evaluate(self, batch: LeafBatch) -> tuple[np.ndarray, np.ndarray]:
        t0 = time.perf_counter()
        planes = batch.planes()
        self.times.encode += time.perf_counter() - t0
        self.times.calls += 1
        self.times.leaves += len(batch)
        return self.forward_planes(planes, batch.legal)


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
                 max_moves: int | None = None) -> None:
        try:
            lam = float(lam)
        except (TypeError, ValueError):
            raise ConfigError(f"rollout mix lambda={lam!r} must be a number in [0, 1]") from None
        if not 0.0 <= lam <= 1.0 or lam != lam:
            raise ConfigError(f"rollout mix lambda={lam} must be in [0, 1]")
        self.lam = lam
        self.network = NetworkEvaluator(net, threads=threads, game=game)
        self.max_moves = max_moves
        self.times = self.network.times

    @property
    def net(self) -> PolicyValueNet:
        return self.network.net

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
                   threads: int = 1) -> Evaluator:
    """The evaluator a run's settings ask for: the network (``lambda = 0``), the network mixed
    with rollouts (``0 < lambda``), or pure rollouts when there is no network."""
    if net is None:
        return RandomRolloutEvaluator()
    if rollout_mix_lambda == 0.0:
        return NetworkEvaluator(net, threads=threads, game=game)
    return MixedEvaluator(net, rollout_mix_lambda, threads=threads, game=game)


__all__ = [
    "Evaluator", "EvaluatorTimes", "LeafBatch", "MixedEvaluator", "NetworkEvaluator",
    "RandomRolloutEvaluator", "UniformEvaluator", "make_evaluator", "random_rollout_value",
    "uniform_priors",
]
