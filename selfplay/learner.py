"""The learner: trains the policy-value network on replay-buffer samples and publishes snapshots.

Loss (AlphaZero, Silver et al. 2017 "Mastering the game of Go without human knowledge" and 2018
"A general reinforcement-learning algorithm that masters chess, shogi and Go through self-play")::

    l = (z - v)^2  -  pi^T log p  +  c ||theta||^2

with ``pi`` the search's visit distribution (counted only on *full-search* positions, Wu 2019's
playout cap randomisation), ``z`` the final outcome and ``v`` the value, both from the side to
move in [-1, 1], ``p`` the network's policy over legal moves, and ``c`` = ``weight_decay``.

Optional objective ``policy_gradient`` (REINFORCE with the +-1 outcome, the self-play
reinforcement-learning stage of AlphaGo, Silver et al. 2016 "Mastering the game of Go with deep
neural networks and tree search"; Williams 1992)::

    l = -(z [- v(s)]) log p(a|s)  +  (z - v)^2  +  c ||theta||^2

on the move ``a`` actually played, every position counting.

Optional area terms (games scored by area, a network with ``area_heads``; Wu 2019,
"Accelerating Self-Play Learning in Go", ownership and score targets)::

    + w_o * mean_points CE((1 + o) / 2, (1 + tanh(u)) / 2)  +  w_s * (s - m / (H W))^2

averaged over the positions whose game was scored on its final area (``ownership_weight`` 1),
with ``o`` the final owner of each point and ``m`` the final score margin, both from the side
to move, ``u`` the ownership head's logit and ``s`` the score head; ``w_o`` =
``ownership_loss_weight``, ``w_s`` = ``score_loss_weight`` (both 0, i.e. off, by default).

The *sample reuse ratio* is samples trained / positions generated. The learner never trains
ahead of ``target_reuse_ratio``: step n is taken only while
``samples_trained + batch_size <= ratio * positions_generated``. When the ratio holds it back it
waits for new positions; if none arrives within ``max_wait_seconds`` it raises
:class:`ReuseRatioError` (the rule documented in docs/learning.md).

A loss that is NaN or infinite stops training with :class:`TrainingDivergedError` *before* the
optimiser step, so the network, the checkpoint and the last snapshot stay as they were.
"""

from __future__ import annotations

import hashlib
import json
import math
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping

import numpy as np
import torch
import torch.nn.functional as F
from safetensors.torch import load as safetensors_load
from safetensors.torch import save as safetensors_save

from selfplay.errors import ConfigError, SelfplayError, SnapshotError
from selfplay.games.base import Game
from selfplay.learner_config import LearnerConfig
from selfplay.metrics import MetricsLog
from selfplay.network import subnormals_flushed
from selfplay.rundir import atomic_write_bytes
from selfplay.snapshots import SnapshotStore, check_safetensors_bytes, shape_mismatches

CHECKPOINT_SCHEMA = 1


class TrainingDivergedError(SelfplayError):
    """The loss became NaN or infinite; training stopped, the last good snapshot stays newest."""


class ReuseRatioError(SelfplayError):
    """The target sample-reuse ratio cannot be held: no new data arrived for too long."""


class CheckpointError(SelfplayError):
    """A learner checkpoint is missing pieces, corrupt, or for another network."""


def learning_rate_at(config: LearnerConfig, step: int) -> float:
    """Learning rate for optimiser step ``step`` (0-based) under ``config.lr_schedule``.

    step: lr * gamma^(step // every); cosine (Loshchilov & Hutter 2017, SGDR, without restarts):
    lr_min + (lr - lr_min) * (1 + cos(pi * min(step, T) / T)) / 2."""
    lr = config.learning_rate
    if config.lr_schedule == "constant":
        return lr
    if config.lr_schedule == "step":
        return lr * config.lr_step_gamma ** (step // config.lr_step_every)
    t = min(step, config.lr_cosine_steps) / config.lr_cosine_steps
    return config.lr_min + (lr - config.lr_min) * 0.5 * (1.0 + math.cos(math.pi * t))


@dataclass
class LossParts:
    """Scalar losses of one step (each a mean over the batch, as defined in the module doc)."""

    loss: float
    loss_policy: float
    loss_value: float
    loss_l2: float
    policy_positions: int
    loss_ownership: float = 0.0
    loss_score: float = 0.0


def compute_loss(net: torch.nn.Module, batch: Mapping[str, np.ndarray], config: LearnerConfig
                 ) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
    """Total loss tensor and its parts for one sampled batch (see the module docstring).

    ``batch``: ``planes`` (B,C,H,W) float32, ``policy`` (B,A) rows summing to 1, ``value`` (B,)
    outcome from the mover's view, ``mask`` (B,A) legal moves, ``full_search`` (B,) bool, and for
    the policy-gradient objective ``action`` (B,) the move played."""
    x = torch.as_tensor(batch["planes"], dtype=torch.float32)
    z = torch.as_tensor(batch["value"], dtype=torch.float32)
    mask = torch.as_tensor(batch["mask"], dtype=torch.bool)
    # a row without any legal move (never produced by self-play) is treated as all-legal so the
    # log-softmax stays finite; its target is zero, so it adds nothing
    mask = mask | ~mask.any(dim=1, keepdim=True)
    use_area = config.ownership_loss_weight > 0 or config.score_loss_weight > 0
    if use_area:
        if not getattr(net, "has_area_heads", False):
            raise ConfigError("learner.ownership_loss_weight / score_loss_weight need a network with "
                              "area heads: set [network] area_heads = true")
        if "ownership" not in batch:
            raise ConfigError("learner.ownership_loss_weight / score_loss_weight need ownership targets, "
                              "which only games scored by area (Go) have")
        out = net.forward_with_area(x)
        logits, v = out["policy"], out["value"]
    else:
        logits, v = net(x)
    logp = torch.log_softmax(logits.masked_fill(~mask, float("-inf")), dim=1)
    logp = torch.where(mask, logp, torch.zeros_like(logp))
    loss_value = F.mse_loss(v.float(), z)

    if config.objective == "alphazero":
        target = torch.as_tensor(batch["policy"], dtype=torch.float32)
        full = torch.as_tensor(batch["full_search"], dtype=torch.bool)
        per_row = -(target * logp).sum(dim=1)
        n_full = full.sum()
        loss_policy = (per_row * full).sum() / n_full.clamp(min=1)
    else:
        if "action" not in batch:
            raise ConfigError("the policy_gradient objective needs the move played ('action') in each sample")
        a = torch.as_tensor(batch["action"], dtype=torch.int64)
        logp_a = logp.gather(1, a[:, None])[:, 0]
        weight = z - v.detach().float() if config.pg_baseline else z
        loss_policy = -(weight * logp_a).mean()
        n_full = torch.tensor(int(x.shape[0]))

    if config.weight_decay > 0:
        loss_l2 = config.weight_decay * sum((p.float() ** 2).sum() for p in net.parameters())
    else:
        loss_l2 = torch.zeros(())
    total = loss_policy + config.value_loss_weight * loss_value + loss_l2
    parts = {"loss_policy": loss_policy, "loss_value": loss_value, "loss_l2": loss_l2,
             "policy_positions": n_full}
    if use_area:
        loss_own, loss_score = area_losses(out, batch)
        total = total + config.ownership_loss_weight * loss_own + config.score_loss_weight * loss_score
        parts.update(loss_ownership=loss_own, loss_score=loss_score)
    return total, parts


def area_losses(out: Mapping[str, torch.Tensor], batch: Mapping[str, np.ndarray]
                ) -> tuple[torch.Tensor, torch.Tensor]:
    """(ownership loss, score loss) of the area heads' outputs ``out`` against the batch's
    ``ownership`` (B, H, W) and ``score_margin`` (B,) (mover's view), averaged over the rows whose
    ``ownership_weight`` is 1 (zero when none is)."""
    own = torch.as_tensor(np.asarray(batch["ownership"]), dtype=torch.float32)
    margin = torch.as_tensor(np.asarray(batch["score_margin"]), dtype=torch.float32)
    w = torch.as_tensor(np.asarray(batch["ownership_weight"]), dtype=torch.float32)
    n = w.sum().clamp(min=1.0)
    # (1 + tanh(u)) / 2 = sigmoid(2u): the cross-entropy of a logistic with logit 2u
    ce = F.binary_cross_entropy_with_logits(2.0 * out["ownership_logit"].float(), (1.0 + own) / 2.0,
                                            reduction="none").flatten(1).mean(dim=1)
    points = float(own[0].numel()) if own.ndim > 1 and own.shape[0] else 1.0
    se = (out["score"].float() - margin / points) ** 2
    return (ce * w).sum() / n, (se * w).sum() / n


def build_optimizer(net: torch.nn.Module, config: LearnerConfig) -> torch.optim.Optimizer:
    """SGD with momentum or Adam over every parameter; L2 is in the loss, not the optimiser."""
    params = [p for p in net.parameters() if p.requires_grad]
    if config.optimizer == "sgd":
        return torch.optim.SGD(params, lr=config.learning_rate, momentum=config.momentum)
    return torch.optim.Adam(params, lr=config.learning_rate, betas=tuple(config.adam_betas))


class Learner:
    """Trains ``net`` from ``buffer`` and publishes to ``store``; see the module docstring.

    ``buffer`` needs ``sample(batch_size, policy_targets_only=...) -> dict`` (the replay buffer's
    API). Counters: ``step`` (optimiser steps), ``samples_trained_total`` (self-play samples),
    ``pretrain_steps``; ``positions_generated`` is told by the caller through
    :meth:`note_generated` or the argument of :meth:`train_available`."""

    def __init__(self, game: Game, net: torch.nn.Module, config: LearnerConfig, buffer: Any,
                 store: SnapshotStore, metrics_log: MetricsLog | None = None) -> None:
        if not isinstance(config, LearnerConfig):
            raise ConfigError(f"learner config must be a LearnerConfig, not {type(config).__name__}")
        num_actions = getattr(net, "num_actions", game.num_actions)
        if num_actions != game.num_actions:
            raise ConfigError(f"network has {num_actions} moves, the game {game.name} has {game.num_actions}")
        self.game = game
        self.net = net
        self.config = config
        self.buffer = buffer
        self.store = store
        self.metrics = metrics_log or MetricsLog(store.run.metrics, "learner", "learner")
        self.optimizer = build_optimizer(net, config)
        self.step = 0
        self.samples_trained_total = 0
        self.pretrain_steps = 0
        self.positions_generated = 0
        self.snapshot_version = store.latest_version()
        self.checkpoint_dir = store.run.root / "learner"
        self._last_metrics_t = time.time()
        self._last_metrics_step = 0
        #: the newest per-step losses and counters (bounded), for plots and summaries
        self.history: deque[dict[str, float]] = deque(maxlen=100_000)

    # ---- the reuse ratio ---------------------------------------------------------------------
    def note_generated(self, positions_generated: int) -> None:
        """Tell the learner how many self-play positions exist so far (a running total)."""
        self.positions_generated = max(self.positions_generated, int(positions_generated))

    @property
    def reuse_ratio(self) -> float:
        """Samples trained per position generated so far (0 before any data)."""
        return self.samples_trained_total / self.positions_generated if self.positions_generated else 0.0

    def steps_allowed(self) -> int:
        """Steps the learner may take now without passing the target reuse ratio."""
        if self.positions_generated < self.config.min_buffer_positions:
            return 0
        budget = self.config.target_reuse_ratio * self.positions_generated - self.samples_trained_total
        return max(0, int(budget // self.config.batch_size))

    # ---- one optimiser step ------------------------------------------------------------------
    def train_on_batch(self, batch: Mapping[str, np.ndarray], *, counts_toward_reuse: bool = True) -> LossParts:
        """One optimiser step on ``batch`` (the replay buffer's sample format); no publishing.

        Raises TrainingDivergedError, leaving the network untouched, if the loss is not finite."""
        cfg = self.config
        lr = learning_rate_at(cfg, self.step + self.pretrain_steps)
        for group in self.optimizer.param_groups:
            group["lr"] = lr
        self.net.train()
        with subnormals_flushed():  # see selfplay.network.subnormals_flushed
            return self._optimiser_step(batch, counts_toward_reuse, lr)

    def _optimiser_step(self, batch: Mapping[str, np.ndarray], counts_toward_reuse: bool, lr: float) -> LossParts:
        cfg = self.config
        total, parts = compute_loss(self.net, batch, cfg)
        values = {k: float(v.detach()) for k, v in parts.items()}
        if not math.isfinite(float(total.detach())):
            raise TrainingDivergedError(
                f"the loss became {float(total.detach())} at learner step {self.step} "
                f"(policy {values['loss_policy']}, value {values['loss_value']}, l2 {values['loss_l2']}, "
                f"learning rate {lr:g}); training stopped before applying it. The newest good snapshot "
                f"is version {self.store.latest_version() or 'none'}; lower learner.learning_rate or "
                "set learner.grad_clip_norm")
        self.optimizer.zero_grad(set_to_none=True)
        total.backward()
        if cfg.grad_clip_norm is not None:
            torch.nn.utils.clip_grad_norm_(self.net.parameters(), cfg.grad_clip_norm)
        self.optimizer.step()
        n = int(np.asarray(batch["value"]).shape[0])
        if counts_toward_reuse:
            self.step += 1
            self.samples_trained_total += n
        else:
            self.pretrain_steps += 1
        return LossParts(float(total.detach()), values["loss_policy"], values["loss_value"],
                         values["loss_l2"], int(values["policy_positions"]),
                         values.get("loss_ownership", 0.0), values.get("loss_score", 0.0))

    def _sample(self, buffer: Any, *, need_policy: bool) -> dict[str, np.ndarray]:
        kw = {"policy_targets_only": True} if need_policy else {}
        return buffer.sample(self.config.batch_size, **kw)

    def train_step(self) -> LossParts:
        """Sample one batch from the buffer and take one optimiser step (ignores the ratio).

        The batch is drawn from all positions (each is a value target); the AlphaZero policy
        term is averaged over the batch's full-search rows only. Publishes every K steps."""
        batch = self._sample(self.buffer, need_policy=False)
        parts = self.train_on_batch(batch, counts_toward_reuse=True)
        if self.step % self.config.steps_per_snapshot == 0:
            self.publish()
        self._log(parts)
        return parts

    def train_available(self, positions_generated: int | None = None, max_steps: int | None = None) -> int:
        """Take every step the reuse ratio allows now (at most ``max_steps``); return how many."""
        if positions_generated is not None:
            self.note_generated(positions_generated)
        n = self.steps_allowed()
        if max_steps is not None:
            n = min(n, max_steps)
        for _ in range(n):
            self.train_step()
        return n

    def train_waiting(self, generated: Callable[[], int], steps: int, *, stop: Callable[[], bool] | None = None,
                      poll_seconds: float = 0.5) -> int:
        """Take ``steps`` steps, waiting for data whenever the reuse ratio holds the learner back.

        ``generated()`` returns the running total of positions generated (read from the buffer
        or catalog). Raises ReuseRatioError when ``max_wait_seconds`` pass with no new position
        while the learner is waiting. Returns the steps taken (fewer if ``stop()`` turned true)."""
        done = 0
        last_change = time.monotonic()
        last_seen = -1
        while done < steps:
            if stop is not None and stop():
                break
            now_generated = int(generated())
            if now_generated != last_seen:
                last_seen = now_generated
                last_change = time.monotonic()
            self.note_generated(now_generated)
            if self.steps_allowed() > 0:
                self.train_step()
                done += 1
                continue
            waited = time.monotonic() - last_change
            if waited >= self.config.max_wait_seconds:
                raise ReuseRatioError(self._stall_message(waited))
            time.sleep(min(poll_seconds, max(0.0, self.config.max_wait_seconds - waited)))
        return done

    def _stall_message(self, waited: float) -> str:
        cfg = self.config
        need = cfg.min_buffer_positions if self.positions_generated < cfg.min_buffer_positions else \
            math.ceil((self.samples_trained_total + cfg.batch_size) / cfg.target_reuse_ratio)
        return (f"the learner waited {waited:.0f} s (learner.max_wait_seconds) with no new positions: "
                f"{self.positions_generated} generated, {self.samples_trained_total} trained, target reuse ratio "
                f"{cfg.target_reuse_ratio:g} needs {need} positions for the next step of {cfg.batch_size}. "
                "Generation has stopped, so the ratio cannot be held; start workers, or raise "
                "learner.target_reuse_ratio / lower learner.min_buffer_positions")

    def check_reachable(self, total_positions: int) -> None:
        """Refuse, before anything runs, a ratio that ``total_positions`` can never satisfy (a run
        whose stop condition caps generation): the first step needs min_buffer_positions and
        ratio * total >= batch_size."""
        cfg = self.config
        if total_positions < cfg.min_buffer_positions:
            raise ConfigError(
                f"learner.min_buffer_positions={cfg.min_buffer_positions} is more than the {total_positions} "
                "positions this run will generate, so training would never start")
        if cfg.target_reuse_ratio * total_positions < cfg.batch_size:
            raise ConfigError(
                f"learner.target_reuse_ratio={cfg.target_reuse_ratio:g} with at most {total_positions} positions "
                f"allows {cfg.target_reuse_ratio * total_positions:.0f} samples, less than one batch of "
                f"{cfg.batch_size}: the ratio can never be met")

    # ---- supervised bootstrap ----------------------------------------------------------------
    def pretrain(self, records: Iterable[Any], steps: int, *, publish: bool = True) -> list[LossParts]:
        """Supervised first stage (AlphaGo's SL stage, Silver et al. 2016): train ``steps`` steps
        on ``records`` (e.g. SGF imports: one-hot policy of the expert move, outcome from the
        result), with the AlphaZero loss whatever the objective, then publish a snapshot.

        These steps do not count toward the self-play reuse ratio."""
        from selfplay.replay.buffer import ReplayBuffer

        recs = list(records)
        if not recs:
            raise ConfigError("pretrain was given no records")
        if steps < 1:
            raise ConfigError(f"pretrain steps={steps} must be at least 1")
        total = sum(r.num_positions for r in recs)
        buf = ReplayBuffer(self.game, capacity_positions=max(total, 1), augment=True, seed=self.config.seed)
        for r in recs:
            buf.add(r)
        saved = self.config
        if saved.objective != "alphazero":
            self.config = saved.model_copy(update={"objective": "alphazero"})
        out = []
        try:
            for _ in range(steps):
                parts = self.train_on_batch(self._sample(buf, need_policy=False), counts_toward_reuse=False)
                self._log(parts, phase="pretrain")
                out.append(parts)
        finally:
            self.config = saved
        if publish:
            self.publish(extra={"phase": "pretrain", "pretrain_records": len(recs)})
        return out

    # ---- snapshots and checkpoints -----------------------------------------------------------
    def publish(self, extra: Mapping[str, Any] | None = None) -> int:
        """Publish the current weights as the next snapshot, then checkpoint. Returns the version.

        Weights that are not finite (a diverged update) raise TrainingDivergedError and publish
        nothing: the last good snapshot and checkpoint stay the newest."""
        for name, t in self.net.state_dict().items():
            if t.is_floating_point() and not bool(torch.isfinite(t).all()):
                raise TrainingDivergedError(
                    f"the weights became NaN or infinite (tensor {name}) by learner step {self.step}; "
                    f"nothing was published. The newest good snapshot is version "
                    f"{self.store.latest_version() or 'none'}; lower learner.learning_rate or set learner.grad_clip_norm")
        parent = self.store.latest_version() or None
        version = self.store.publish(self.net, parent_version=parent, training_steps=self.step,
                                     samples_seen=self.samples_trained_total,
                                     extra={"pretrain_steps": self.pretrain_steps, **dict(extra or {})})
        self.snapshot_version = version
        self.save_checkpoint()
        return version

    def save_checkpoint(self) -> Path:
        """Write RUN/learner/checkpoint.safetensors (weights + optimiser tensors) and then
        checkpoint.json (counters, optimiser scalars, checksum of the tensors)."""
        self.checkpoint_dir.mkdir(parents=True, exist_ok=True)
        tensors: dict[str, torch.Tensor] = {}
        for k, v in self.net.state_dict().items():
            tensors[f"model/{k}"] = v.detach().cpu().contiguous().clone()
        opt = self.optimizer.state_dict()
        scalars: dict[str, dict[str, Any]] = {}
        for idx, state in opt["state"].items():
            for key, val in state.items():
                if isinstance(val, torch.Tensor):
                    tensors[f"optim/{idx}/{key}"] = val.detach().cpu().contiguous().clone()
                else:
                    scalars.setdefault(str(idx), {})[key] = val
        blob = safetensors_save(tensors)
        meta = {
            "schema": CHECKPOINT_SCHEMA, "game": self.game.name, "game_options": self.game.options(),
            "optimizer": self.config.optimizer, "step": self.step, "pretrain_steps": self.pretrain_steps,
            "samples_trained_total": self.samples_trained_total, "positions_generated": self.positions_generated,
            "snapshot_version": self.snapshot_version, "optimizer_scalars": scalars,
            "sha256": hashlib.sha256(blob).hexdigest(), "saved_at": time.time(),
        }
        atomic_write_bytes(self.checkpoint_dir / "checkpoint.safetensors", blob)
        path = self.checkpoint_dir / "checkpoint.json"
        atomic_write_bytes(path, (json.dumps(meta, indent=2, sort_keys=True) + "\n").encode())
        return path

    def resume(self) -> str:
        """Continue from RUN/learner/checkpoint.* if present (weights, optimiser state, counters);
        else from the newest snapshot's weights and counters; else start fresh.

        Returns "checkpoint", "snapshot" or "fresh". The checkpoint is written right after each
        of the learner's own snapshots, so it is the learner's exact state at its newest one;
        snapshots published meanwhile by someone else (``selfplay publish``) are not adopted by
        the learner: its next snapshot supersedes them."""
        meta_path = self.checkpoint_dir / "checkpoint.json"
        if meta_path.exists():
            self._load_checkpoint(meta_path)
            return "checkpoint"
        latest = self.store.latest()
        if latest is not None:
            info = self.store.load_into(self.net, latest.version)
            self.step = info.training_steps
            self.samples_trained_total = info.samples_seen
            self.snapshot_version = info.version
            self.pretrain_steps = int(info.extra.get("pretrain_steps", 0))
            return "snapshot"
        return "fresh"

    def _load_checkpoint(self, meta_path: Path) -> None:
        try:
            meta = json.loads(meta_path.read_bytes())
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise CheckpointError(f"learner checkpoint {meta_path} is not valid JSON: {exc}") from None
        if not isinstance(meta, dict) or meta.get("schema") != CHECKPOINT_SCHEMA:
            raise CheckpointError(f"learner checkpoint {meta_path} has an unknown schema")
        if meta.get("game") != self.game.name or meta.get("game_options") != self.game.options():
            raise CheckpointError(
                f"learner checkpoint {meta_path} is for {meta.get('game')} {meta.get('game_options')}, "
                f"not {self.game.name} {self.game.options()}")
        if meta.get("optimizer") != self.config.optimizer:
            raise CheckpointError(
                f"learner checkpoint {meta_path} holds {meta.get('optimizer')} state but learner.optimizer is "
                f"{self.config.optimizer}; move RUN/learner aside to start the optimiser afresh")
        tpath = self.checkpoint_dir / "checkpoint.safetensors"
        try:
            blob = tpath.read_bytes()
        except FileNotFoundError:
            raise CheckpointError(f"learner checkpoint tensors {tpath} are missing") from None
        try:
            check_safetensors_bytes(blob, str(tpath))
        except SnapshotError as exc:
            raise CheckpointError(str(exc)) from None
        if hashlib.sha256(blob).hexdigest() != meta.get("sha256"):
            raise CheckpointError(f"learner checkpoint tensors {tpath} fail their checksum")
        tensors = dict(safetensors_load(blob))
        model = {k[len("model/"):]: v for k, v in tensors.items() if k.startswith("model/")}
        problems = shape_mismatches(model, {k: tuple(v.shape) for k, v in self.net.state_dict().items()})
        if problems:
            raise CheckpointError(f"learner checkpoint does not fit this network: {'; '.join(problems[:6])}")
        opt_state: dict[int, dict[str, Any]] = {}
        for k, v in tensors.items():
            if k.startswith("optim/"):
                _, idx, key = k.split("/", 2)
                opt_state.setdefault(int(idx), {})[key] = v
        for idx, vals in (meta.get("optimizer_scalars") or {}).items():
            opt_state.setdefault(int(idx), {}).update(vals)
        fresh = self.optimizer.state_dict()
        with torch.no_grad():
            self.net.load_state_dict(model, strict=True)
        self.optimizer.load_state_dict({"state": opt_state, "param_groups": fresh["param_groups"]})
        self.step = int(meta["step"])
        self.pretrain_steps = int(meta.get("pretrain_steps", 0))
        self.samples_trained_total = int(meta["samples_trained_total"])
        self.positions_generated = int(meta.get("positions_generated", 0))
        self.snapshot_version = int(meta.get("snapshot_version", 0))

    # ---- metrics -----------------------------------------------------------------------------
    def _log(self, parts: LossParts, phase: str = "selfplay") -> None:
        now = time.time()
        total_steps = self.step + self.pretrain_steps
        dt = now - self._last_metrics_t
        sps = (total_steps - self._last_metrics_step) / dt if dt > 0 else 0.0
        row = dict(step=self.step, loss=parts.loss, loss_policy=parts.loss_policy, loss_value=parts.loss_value,
                   loss_l2=parts.loss_l2, samples_trained_total=self.samples_trained_total,
                   reuse_ratio=self.reuse_ratio, learning_rate=self.optimizer.param_groups[0]["lr"],
                   snapshot_version=self.snapshot_version, phase=phase)
        area = ({"loss_ownership": parts.loss_ownership, "loss_score": parts.loss_score}
                if self.config.ownership_loss_weight > 0 or self.config.score_loss_weight > 0 else {})
        self.history.append({"t": now, **{k: v for k, v in row.items() if k != "phase"}, **area})
        if dt >= 2.0 or total_steps <= 1 or total_steps % self.config.steps_per_snapshot == 0:
            self.metrics.write(steps_per_second=sps, pretrain_steps=self.pretrain_steps, **row, **area)
            self._last_metrics_t = now
            self._last_metrics_step = total_steps
