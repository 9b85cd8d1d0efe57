"""Search settings: one typed, validated config with a description under every field.

Published defaults (AlphaGo Zero / AlphaZero papers, Silver et al. 2017 and 2018): root
Dirichlet noise with epsilon 0.25 and alpha inversely proportional to the typical number of
legal moves (0.3 chess, 0.15 shogi, 0.03 Go; here alpha = 10 / typical legal moves), temperature
1 for the opening moves then close to 0, resignation disabled in 10% of games. Playout cap
randomisation from Wu (2019), "Accelerating Self-Play Learning in Go"; Gumbel root search from
Danihelka et al. (2022), "Policy improvement by planning with Gumbel".
"""

from __future__ import annotations

from typing import Any

from pydantic import ConfigDict, Field, ValidationError, field_validator, model_validator

from selfplay.config_model import ConfigModel
from selfplay.errors import ConfigError
from selfplay.games.base import Game
from selfplay.search.root import VARIANTS


class SearchConfig(ConfigModel):
    """Settings of the guided tree search and of self-play move choice."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    algorithm: str = Field(
        "puct", description="Root search: 'puct' (AlphaZero PUCT with Dirichlet noise and visit-count "
        "targets) or 'gumbel' (Gumbel top-m sampling with sequential halving and improved-policy targets); "
        "any name registered in selfplay.search.root.VARIANTS.")
    simulations: int = Field(200, ge=1, le=1_000_000, description="Simulations (leaf evaluations) per move of a full search.")
    c_puct: float = Field(1.5, gt=0, description="PUCT exploration constant c in Q + c P sqrt(N) / (1 + n).")
    unvisited_value_penalty: float = Field(
        0.0, ge=0, le=2, description="First-play urgency: an unvisited move's Q is the node's own value "
        "estimate minus this amount (0 = the node's value).")
    dirichlet_epsilon: float = Field(0.25, ge=0, le=1, description="Weight of the root Dirichlet noise in full PUCT searches (0 = no noise).")
    dirichlet_alpha: float | None = Field(
        None, gt=0, description="Dirichlet concentration; None = 10 / game.typical_legal_moves "
        "(the published inverse-proportional rule).")
    temperature: float = Field(1.0, ge=0, description="Move-choice temperature over root visit counts during the opening moves (PUCT).")
    temperature_moves: int = Field(30, ge=0, description="Number of opening moves played at `temperature`; later moves use `final_temperature`.")
    final_temperature: float = Field(0.0, ge=0, description="Temperature after the opening; 0 = the most visited move (ties broken at random).")
    full_search_share: float = Field(
        1.0, ge=0, le=1, description="Playout cap randomisation: share of moves searched with the full budget "
        "(policy targets); the others use `reduced_simulations` without noise. 1 = every move is full.")
    reduced_simulations: int = Field(
        32, ge=1, description="Simulations of a reduced (fast) search under playout cap randomisation "
        "(left unset, 32 or `simulations` if that is smaller).")
    resign_threshold: float | None = Field(
        None, gt=-1, lt=1, description="The mover resigns when its root value (mover's view) falls below this; None = never resign.")
    resign_probe_fraction: float = Field(
        0.1, ge=0, le=1, description="Share of games played with resignation switched off, to measure false positives.")
    resign_false_positive_target: float | None = Field(
        None, gt=0, lt=1, description="Lower the resignation threshold (never above `resign_threshold`) so that at "
        "most this share of the probe games' would-be resignations were not lost (Silver et al. 2017 kept it "
        "below 0.05); None = the threshold stays fixed.")
    rollout_mix_lambda: float = Field(
        0.0, ge=0, le=1, description="Leaf value = (1 - lambda) * network value + lambda * random-rollout outcome "
        "(AlphaGo, Silver et al. 2016); 0 = network only.")
    virtual_loss: float = Field(1.0, ge=0, description="Virtual loss added to each edge on a pending path when several leaves per game are gathered.")
    leaves_per_game: int = Field(1, ge=1, le=64, description="Leaves each game contributes to one batched evaluation (more than 1 uses virtual loss).")
    gumbel_sampled_moves: int = Field(16, ge=1, description="Gumbel: number m of root actions sampled without replacement (top-m of g + logits).")
    gumbel_c_visit: float = Field(50.0, gt=0, description="Gumbel: c_visit in sigma(q) = (c_visit + max N) * c_scale * q.")
    gumbel_c_scale: float = Field(1.0, gt=0, description="Gumbel: c_scale in sigma(q) = (c_visit + max N) * c_scale * q.")
    reuse_tree: bool = Field(True, description="Keep the subtree below the chosen move for the next search.")
    node_capacity_factor: float = Field(
        3.0, ge=1, le=64, description="Tree nodes kept per game, as a multiple of `simulations`; a reused subtree "
        "that would not fit with a full budget is dropped.")

    @field_validator("algorithm")
    @classmethod
    def _known_algorithm(cls, name: str) -> str:
        if name not in VARIANTS:
            raise ValueError(f"unknown root search {name!r}; known: {', '.join(sorted(VARIANTS))}")
        return name

    @model_validator(mode="after")
    def _consistent(self) -> "SearchConfig":
        if self.reduced_simulations > self.simulations and "reduced_simulations" not in self.model_fields_set:
            # the default (32) never exceeds a smaller full budget
            object.__setattr__(self, "reduced_simulations", self.simulations)
        if self.reduced_simulations > self.simulations:
            raise ValueError(f"reduced_simulations={self.reduced_simulations} must not exceed simulations={self.simulations}")
        if self.resign_false_positive_target is not None and (self.resign_threshold is None
                                                              or self.resign_probe_fraction <= 0):
            raise ValueError("resign_false_positive_target needs a resign_threshold (its ceiling) and a "
                             "resign_probe_fraction above 0 (the games it learns from)")
        return self

    # ---- helpers -------------------------------------------------------------------------------
    @classmethod
    def parse(cls, values: dict[str, Any]) -> "SearchConfig":
        """Build from a plain dict, turning validation failures into one ConfigError that names
        every bad field, its value and the reason."""
        try:
            return cls(**values)
        except ValidationError as exc:
            raise ConfigError(describe_validation_error("search", exc)) from None

    def alpha_for(self, game: Game) -> float:
        """Dirichlet alpha for ``game``: the configured value or 10 / typical legal moves."""
        if self.dirichlet_alpha is not None:
            return self.dirichlet_alpha
        return 10.0 / max(1.0, float(game.typical_legal_moves))

    def temperature_at(self, move_number: int) -> float:
        """Move-choice temperature for the move with 0-based index ``move_number``."""
        return self.temperature if move_number < self.temperature_moves else self.final_temperature

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able settings (for records)."""
        return self.model_dump()


def describe_validation_error(section: str, exc: ValidationError) -> str:
    """One line per problem: ``section.field = value: reason``."""
    parts = []
    for err in exc.errors():
        loc = ".".join(str(p) for p in err.get("loc", ())) or "(config)"
        value = err.get("input")
        shown = "" if isinstance(value, dict) else f" = {value!r}"
        parts.append(f"{section}.{loc}{shown}: {err.get('msg')}")
    return "; ".join(parts)
