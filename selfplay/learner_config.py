"""Typed settings of the learner.

:class:`LearnerConfig` is the ``[learner]`` section of the run configuration (``run.toml``)
(the in-process run's phase sizes, ``LoopConfig``, live in :mod:`selfplay.loop`). Every field
has a default and a docstring; a bad value is refused with the
field, the value and the reason (:class:`~selfplay.errors.ConfigError`).
"""

from __future__ import annotations

from typing import Any, ClassVar, Literal

from pydantic import ConfigDict, Field, ValidationError, model_validator

from selfplay.config_model import ConfigModel
from selfplay.errors import ConfigError


def config_error_from(exc: ValidationError, section: str) -> ConfigError:
    """One readable ConfigError from a pydantic ValidationError: field, value and reason."""
    parts = []
    for err in exc.errors():
        where = ".".join(str(x) for x in err.get("loc", ())) or "(section)"
        value = err.get("input")
        shown = "" if isinstance(value, dict) else f"={value!r}"
        parts.append(f"{section}.{where}{shown}: {err.get('msg', 'invalid')}")
    return ConfigError("; ".join(parts))


class _Section(ConfigModel):
    """A config section that refuses unknown fields and reports errors as ConfigError."""

    model_config = ConfigDict(extra="forbid", validate_assignment=True, use_attribute_docstrings=True)
    section_name: ClassVar[str] = "section"

    def __init__(self, **data: Any) -> None:
        try:
            super().__init__(**data)
        except ValidationError as exc:
            raise config_error_from(exc, type(self).section_name) from None


class LearnerConfig(_Section):
    """How the learner trains the network from the replay buffer."""

    section_name: ClassVar[str] = "learner"

    objective: Literal["alphazero", "policy_gradient"] = "alphazero"
    """Training objective. "alphazero": cross-entropy to the search's visit distribution on
    full-search positions + squared value error + L2 (Silver et al. 2017/2018). "policy_gradient":
    REINFORCE on the move played weighted by the +-1 outcome (-z log pi(a|s), the self-play RL stage
    of AlphaGo, Silver et al. 2016) + the same value regression and L2."""

    batch_size: int = Field(256, ge=1, le=65536)
    """Positions per optimiser step."""

    learning_rate: float = Field(0.02, gt=0.0, le=10.0)
    """Initial learning rate (before the schedule); must be > 0."""

    optimizer: Literal["sgd", "adam"] = "sgd"
    """Optimiser: SGD with momentum (as in the AlphaZero papers) or Adam."""

    momentum: float = Field(0.9, ge=0.0, lt=1.0)
    """SGD momentum (ignored by Adam)."""

    adam_betas: tuple[float, float] = (0.9, 0.999)
    """Adam's (beta1, beta2), each in [0, 1) (ignored by SGD)."""

    weight_decay: float = Field(1e-4, ge=0.0, le=1.0)
    """L2 coefficient c of the loss term c * ||theta||^2 over all parameters (AlphaZero's form,
    added to the loss and reported as loss_l2, not folded into the optimiser)."""

    value_loss_weight: float = Field(1.0, ge=0.0)
    """Weight of the squared value error in the total loss (1 in the AlphaZero papers)."""

    ownership_loss_weight: float = Field(0.0, ge=0.0, le=100.0)
    """Weight of the ownership loss (0: off). Needs ``[network] area_heads`` and a game scored
    by area (Go): the cross-entropy between the final owner of each point and the ownership
    head's prediction, both from the side to move's view, averaged over the points and over the
    positions whose game was scored on its area (Wu 2019's auxiliary ownership target)."""

    score_loss_weight: float = Field(0.0, ge=0.0, le=100.0)
    """Weight of the score loss (0: off). Needs ``[network] area_heads``: the squared error
    between the score head and the final score margin from the side to move's view divided by
    the number of points, averaged over the positions whose game was scored on its area."""

    pg_baseline: bool = False
    """Policy-gradient objective only: subtract the network's own (detached) value from the
    outcome as a variance-reducing baseline, (z - v(s)) instead of z."""

    lr_schedule: Literal["constant", "step", "cosine"] = "constant"
    """Learning-rate schedule over optimiser steps: constant; step (multiply by lr_step_gamma
    every lr_step_every steps); cosine (from learning_rate down to lr_min over lr_cosine_steps,
    then held at lr_min)."""

    lr_step_every: int = Field(10_000, ge=1)
    """Step schedule: steps between two decays."""

    lr_step_gamma: float = Field(0.1, gt=0.0, le=1.0)
    """Step schedule: factor applied at each decay."""

    lr_cosine_steps: int = Field(100_000, ge=1)
    """Cosine schedule: steps over which the rate falls from learning_rate to lr_min."""

    lr_min: float = Field(0.0, ge=0.0)
    """Cosine schedule: floor of the learning rate."""

    grad_clip_norm: float | None = Field(None, gt=0.0)
    """Clip the global gradient norm to this value before each step (unset: no clipping)."""

    steps_per_snapshot: int = Field(200, ge=1)
    """K: publish a snapshot (and write a checkpoint) every K optimiser steps."""

    target_reuse_ratio: float = Field(4.0, gt=0.0, le=10_000.0)
    """Samples trained per sample generated. The learner never trains ahead of it: it takes a
    step only while (samples trained + batch_size) <= ratio * positions generated, and otherwise
    waits for new data."""

    min_buffer_positions: int = Field(1000, ge=1)
    """Positions that must have been generated before the first training step."""

    max_wait_seconds: float = Field(600.0, gt=0.0)
    """Longest the learner waits for new data when the reuse ratio holds it back; if no new
    position arrives in that time, it stops with ReuseRatioError (generation has stopped, so the
    ratio can no longer be held)."""

    torch_threads: int = Field(1, ge=1, le=256)
    """Torch intra-op threads for the learner (set by the process that hosts it, e.g. the
    Ray learner actor; the one-process loop shares worker.threads)."""

    seed: int = Field(0, ge=0)
    """Seed of the learner's own sampling (the supervised pretraining window)."""

    @model_validator(mode="after")
    def _check(self) -> "LearnerConfig":
        for b in self.adam_betas:
            if not 0.0 <= b < 1.0:
                raise ValueError(f"adam_betas {list(self.adam_betas)} must each be in [0, 1)")
        if self.lr_schedule == "cosine" and self.lr_min > self.learning_rate:
            raise ValueError(f"lr_min {self.lr_min} is above learning_rate {self.learning_rate}")
        return self
