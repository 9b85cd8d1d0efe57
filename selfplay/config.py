"""The run configuration: one typed model per section, read from and written to TOML.

A run is described by a :class:`RunConfig` with the sections

- ``[game]``     which game and its options,
- ``[network]``  the policy-value network (:class:`selfplay.network.NetworkConfig`),
- ``[search]``   the tree search (:class:`selfplay.search.config.SearchConfig`),
- ``[worker]``   how each self-play worker plays (:class:`WorkerConfig`),
- ``[replay]``   shards, catalog and the replay window (:class:`selfplay.replay.config.ReplayConfig`),
- ``[learner]``  the trainer (:class:`selfplay.learner.LearnerConfig`),
- ``[evaluation]`` rated games during the run, for the Elo ladder (:class:`EvaluationConfig`),
- ``[run]``      how many workers, the seed and the stop conditions (:class:`RunSection`).

Every field carries a description; :func:`dump_config` writes each one above its value, so a
dumped config documents itself. A bad value is refused by :func:`load_config` /
:func:`config_from_dict` with a :class:`~selfplay.errors.ConfigError` naming the field, the value
and the reason, before anything starts.

Presets (``selfplay/presets/NAME.toml``) hold only the fields that differ from the defaults.
"""

from __future__ import annotations

import json
import math
import os
import tomllib
from importlib import resources
from pathlib import Path
from typing import Any, Literal, Mapping

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from selfplay.config_model import ConfigModel
from selfplay.errors import ConfigError, SelfplayError
from selfplay.learner_config import LearnerConfig
from selfplay.network_config import NetworkConfig
from selfplay.replay.config import ReplayConfig
from selfplay.search.config import SearchConfig

# ---- sections owned by this module --------------------------------------------------------------


class GameConfig(ConfigModel):
    """Which game is played, and its options."""

    model_config = ConfigDict(extra="forbid")

    name: str = Field("mnk", description="registry name of the game (mnk, fourinrow, go)")
    options: dict[str, int | float | bool | str] = Field(
        default_factory=dict,
        description="options passed to the game's factory, e.g. {m = 3, n = 3, k = 3} for mnk or "
        "{size = 9, komi = 7.5} for go; unset options take the game's defaults",
    )

    @model_validator(mode="after")
    def _game_exists(self) -> "GameConfig":
        from selfplay.games.registry import make_game

        try:
            game = make_game(self.name, **self.options)
        except SelfplayError as exc:
            raise ValueError(str(exc)) from None
        # Write every option out (the game's own defaults included), so run.toml is complete.
        self.options = dict(game.options())
        return self


class WorkerConfig(ConfigModel):
    """How one self-play worker plays."""

    model_config = ConfigDict(extra="forbid")

    games_in_parallel: int = Field(
        16, ge=1, le=4096,
        description="games one worker plays at once; one leaf of each (more with virtual loss) "
        "goes into a single batched forward pass per step",
    )
    threads: int = Field(1, ge=1, le=256, description="threads of each worker's forward pass (one per CPU it is given)")
    inference: Literal["auto", "torch", "openvino", "onnxruntime"] = Field(
        "auto",
        description="runtime of the network's forward pass: 'auto' = the fastest that imports here, "
        "measured at the worker's batch size when it starts (a couple of seconds; remembered per "
        "machine), or one by name; precision follows the CPU (bfloat16 on matrix units, else float32)",
    )
    snapshot_pickup: Literal["between_moves", "between_games"] = Field(
        "between_moves",
        description="when a worker looks for a newer snapshot: between moves (every "
        "snapshot_poll_seconds while it plays), or only at a step where one of its games finished",
    )
    snapshot_poll_seconds: float = Field(
        2.0, gt=0, le=3600, description="how often (s) a worker asks the snapshot store for a newer version",
    )
    report_seconds: float = Field(
        2.0, gt=0, le=600,
        description="how long (s) a worker plays before it reports its finished games and counters; "
        "also bounds how long a clean stop waits for workers",
    )


class EvaluationConfig(ConfigModel):
    """Rated evaluation games during the run, feeding the Elo ladder (`selfplay ladder`).

    Every few snapshots, a bounded match of the newest one against earlier rated snapshots (and
    an optional fixed anchor); see docs/strength.md."""

    model_config = ConfigDict(extra="forbid")

    enabled: bool = Field(False, description="play rated evaluation games while the run goes (off by default: "
                          "they take CPU from self-play)")
    every_versions: int = Field(
        5, ge=1, le=100_000,
        description="evaluate the newest snapshot once it is at least this many versions past the last one evaluated")
    games: int = Field(20, ge=2, le=10_000, description="games against each opponent (even: each moves first in half)")
    opponents: int = Field(
        2, ge=1, le=16,
        description="earlier rated snapshots each evaluation plays: the last one evaluated, snapshot 1, then "
        "others spread over the rated ones")
    simulations: int | None = Field(
        None, ge=1, le=1_000_000, description="search simulations per move of evaluated snapshots (unset: the run's "
        "[search] simulations)")
    anchor: str = Field(
        "", description="a fixed extra opponent: '' (none), 'mcts' (random-rollout search) or 'gtp:COMMAND' "
        "(a GTP v2 engine, Go runs only, e.g. 'gtp:/usr/games/gnugo --mode gtp --level 0 --chinese-rules')")
    anchor_simulations: int | None = Field(
        None, ge=1, le=1_000_000, description="simulations of the 'mcts' anchor (unset: the same as the snapshots')")
    opening_moves: int | None = Field(
        None, ge=0, le=100, description="seeded random moves opening each pair of games (unset: 2, or 4 on "
        "boards with more than 50 moves)")
    threads: int = Field(1, ge=1, le=256, description="torch threads of the evaluation (its share of the CPUs)")
    gtp_timeout: float = Field(60.0, gt=0, le=3600, description="seconds to wait for each reply of a GTP anchor")
    gate_threshold: float | None = Field(
        None, gt=0, lt=1,
        description="gating (AlphaGo Zero): a new snapshot becomes the one workers use only if it scores at least "
        "this against the current one (0.55 in the paper); unset = no gating, as in AlphaZero")
    gate_games: int = Field(40, ge=2, le=10_000, description="games of a gating match (even; 400 in AlphaGo Zero)")

    @field_validator("games", "gate_games")
    @classmethod
    def _even(cls, v: int) -> int:
        if v % 2:
            raise ValueError("must be even, so each player moves first in half the games")
        return v

    @field_validator("anchor")
    @classmethod
    def _anchor_form(cls, v: str) -> str:
        v = v.strip()
        if v not in ("", "mcts") and not (v.startswith("gtp:") and v[4:].strip()):
            raise ValueError("must be '', 'mcts' or 'gtp:COMMAND'")
        return v


class RunSection(ConfigModel):
    """Workers, seed and stop conditions of one run (a resumed run may change it, as it may [evaluation])."""

    model_config = ConfigDict(extra="forbid")

    workers: int = Field(
        0, ge=0, le=100_000,
        description="self-play workers; 0 = one per CPU of the cluster (the launcher tops up "
        "workers as nodes join)",
    )
    seed: int = Field(0, ge=0, lt=2**63, description="run seed; every worker's and game's seed derives from it")
    games: int = Field(0, ge=0, description="stop after this many games are committed (0 = no limit)")
    positions: int = Field(0, ge=0, description="stop after this many positions are committed (0 = no limit)")
    minutes: float = Field(0.0, ge=0, description="stop after this many minutes of wall time (0 = no limit)")
    learner: bool = Field(
        True,
        description="train in this run; false = generation only, for a trainer of your own that "
        "publishes snapshots with `selfplay publish`",
    )
    status_seconds: float = Field(10.0, gt=0, description="seconds between one-line status reports")
    top_up_seconds: float = Field(
        10.0, gt=0, description="seconds between checks for new CPUs in the cluster (new workers are started on them)",
    )
    buffer_shards: int = Field(
        1, ge=1, le=64,
        description="replay buffer shards on the head, each its own process with its own shard files; "
        "workers are divided among them (more shards serve more workers, see docs/cluster.md)",
    )

    @field_validator("minutes")
    @classmethod
    def _finite(cls, v: float) -> float:
        if not math.isfinite(v):
            raise ValueError("must be a finite number")
        return v


class RunConfig(ConfigModel):
    """A whole run: every section of the configuration."""

    model_config = ConfigDict(extra="forbid")

    game: GameConfig = Field(default_factory=GameConfig, description="the game")
    network: NetworkConfig = Field(default_factory=NetworkConfig, description="the policy-value network")
    search: SearchConfig = Field(default_factory=SearchConfig, description="the tree search")
    worker: WorkerConfig = Field(default_factory=WorkerConfig, description="self-play workers")
    replay: ReplayConfig = Field(default_factory=ReplayConfig, description="record storage and replay window")
    learner: LearnerConfig = Field(default_factory=LearnerConfig, description="the learner")
    evaluation: EvaluationConfig = Field(default_factory=EvaluationConfig, description="rated evaluation games")
    run: RunSection = Field(default_factory=RunSection, description="workers, seed and stop conditions")

    def has_stop_condition(self) -> bool:
        return bool(self.run.games or self.run.positions or self.run.minutes)

    def identity(self) -> dict[str, Any]:
        """The sections that fix what a run directory holds (all but :data:`RESUMABLE_SECTIONS`).

        A run directory may only be resumed with a config whose identity is the same."""
        data = self.model_dump(mode="json")
        for section in RESUMABLE_SECTIONS:
            data.pop(section)
        data["replay"].pop("verify_on_open", None)  # how a resume checks its shards, not what they hold
        return data


#: sections a resumed run may change (the rest must match run.toml): the stop conditions and
#: workers, and the evaluation (rated games change no record of the run)
RESUMABLE_SECTIONS = ("run", "evaluation")


# ---- loading -------------------------------------------------------------------------------------


def _unknown_keys(model: type[BaseModel], data: Any, prefix: str = "") -> list[str]:
    """Dotted names of keys in ``data`` that ``model`` has no field for (checked recursively)."""
    if not isinstance(data, Mapping):
        return []
    out: list[str] = []
    fields = model.model_fields
    for key, value in data.items():
        name = f"{prefix}{key}"
        if key not in fields:
            out.append(name)
            continue
        ann = fields[key].annotation
        if isinstance(ann, type) and issubclass(ann, BaseModel):
            out.extend(_unknown_keys(ann, value, name + "."))
    return out


def _format_validation_error(exc: ValidationError, data: Mapping[str, Any], origin: str) -> str:
    parts = []
    for err in exc.errors():
        loc = ".".join(str(x) for x in err["loc"] if not str(x).startswith("function-"))
        value: Any = data
        found = True
        for key in err["loc"]:
            if isinstance(value, Mapping) and key in value:
                value = value[key]
            else:
                found = False
                break
        reason = err["msg"]
        if reason.startswith("Value error, "):
            reason = reason[len("Value error, "):]
        if loc and reason.startswith(loc + "."):
            parts.append(reason)  # a section that names its own field already (e.g. learner.x=...)
        elif found and err["type"] != "missing" and not isinstance(value, Mapping):
            parts.append(f"{loc} = {_show(value)}: {reason}")
        else:
            parts.append(f"{loc}: {reason}")
    return f"{origin}: " + "; ".join(parts)


def _show(value: Any) -> str:
    try:
        return json.dumps(value)
    except (TypeError, ValueError):
        return repr(value)


def config_from_dict(data: Mapping[str, Any], origin: str = "config") -> RunConfig:
    """Validate a nested mapping (as read from TOML) into a :class:`RunConfig`.

    Raises ConfigError naming each bad field, its value and the reason."""
    if not isinstance(data, Mapping):
        raise ConfigError(f"{origin}: expected a table of sections, got {type(data).__name__}")
    unknown = _unknown_keys(RunConfig, data)
    if unknown:
        raise ConfigError(f"{origin}: unknown field(s) {', '.join(unknown)}")
    try:
        return RunConfig.model_validate(dict(data))
    except ValidationError as exc:
        raise ConfigError(_format_validation_error(exc, data, origin)) from None


def load_config(path: str | os.PathLike[str]) -> RunConfig:
    """Read and validate a TOML config file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"config file {str(p)!r} does not exist") from None
    except IsADirectoryError:
        raise ConfigError(f"config file {str(p)!r} is a directory") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"config file {str(p)!r} cannot be read: {exc}") from None
    return config_from_toml(text, origin=str(p))


#: largest config text read (characters): a run config is a few kilobytes
MAX_CONFIG_CHARS = 1024 * 1024
#: deepest nesting of tables and arrays accepted (a run config needs 3: section, table, array)
MAX_CONFIG_DEPTH = 16


def _nesting_depth_over(text: str, limit: int) -> bool:
    """True if brackets or braces outside strings and comments nest deeper than ``limit``
    (checked before parsing: tomllib recurses once per level)."""
    depth, i, n = 0, 0, len(text)
    quote = ""
    while i < n:
        c = text[i]
        if quote:
            if c == "\\" and quote in ('"', '"""'):
                i += 2
                continue
            if text.startswith(quote, i):
                i += len(quote)
                quote = ""
                continue
        elif c == "#":
            j = text.find("\n", i)
            i = n if j < 0 else j
            continue
        elif c in "\"'":
            quote = c * 3 if text.startswith(c * 3, i) else c
            i += len(quote)
            continue
        elif c in "[{":
            depth += 1
            if depth > limit:
                return True
        elif c in "]}":
            depth = max(0, depth - 1)
        i += 1
    return False


def config_from_toml(text: str, origin: str = "config") -> RunConfig:
    """Validate TOML text. An empty text, more than :data:`MAX_CONFIG_CHARS` characters or
    nesting deeper than :data:`MAX_CONFIG_DEPTH` is refused with one line."""
    if len(text) > MAX_CONFIG_CHARS:
        raise ConfigError(f"{origin}: {len(text)} characters is more than a run config can be "
                          f"({MAX_CONFIG_CHARS}); not a config file?")
    if _nesting_depth_over(text, MAX_CONFIG_DEPTH):
        raise ConfigError(f"{origin}: tables or arrays nested more than {MAX_CONFIG_DEPTH} deep; "
                          "a run config nests at most 3")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{origin}: not valid TOML: {exc}") from None
    except RecursionError:
        raise ConfigError(f"{origin}: nested too deeply to read") from None
    if not data:
        raise ConfigError(f"{origin}: the config is empty; it must name at least its game, e.g. "
                          "[game] name = \"mnk\" (`selfplay config show tictactoe` prints a full one)")
    return config_from_dict(data, origin)


def preset_names() -> list[str]:
    """Names of the presets shipped in the package."""
    root = resources.files("selfplay") / "presets"
    return sorted(p.name[:-5] for p in root.iterdir() if p.name.endswith(".toml"))


def preset_text(name: str) -> str:
    """The TOML text of preset ``name``; ConfigError if there is no such preset."""
    if not name or "/" in name or "\\" in name or name.startswith("."):
        raise ConfigError(f"preset name {name!r} is not valid; presets: {', '.join(preset_names())}")
    res = resources.files("selfplay") / "presets" / f"{name}.toml"
    if not res.is_file():
        raise ConfigError(f"no preset named {name!r}; presets: {', '.join(preset_names())}")
    return res.read_text(encoding="utf-8")


def load_preset(name: str) -> RunConfig:
    """The validated config of preset ``name``."""
    return config_from_toml(preset_text(name), origin=f"preset {name!r}")


def with_overrides(config: RunConfig, overrides: Mapping[str, Any]) -> RunConfig:
    """A copy of ``config`` with dotted-name overrides (``{"run.games": 10}``), validated again."""
    data = config.model_dump(mode="json")
    for dotted, value in overrides.items():
        node = data
        *path, leaf = dotted.split(".")
        for key in path:
            if not isinstance(node.get(key), dict):
                raise ConfigError(f"override {dotted!r}: {key!r} is not a section")
            node = node[key]
        node[leaf] = value
    return config_from_dict(data, origin="config with command-line overrides")


def identity_differences(a: RunConfig, b: RunConfig) -> list[str]:
    """Dotted names of fields outside ``[run]`` where ``a`` and ``b`` differ."""
    out: list[str] = []

    def walk(x: Any, y: Any, prefix: str) -> None:
        if isinstance(x, dict) and isinstance(y, dict):
            for key in sorted(set(x) | set(y)):
                walk(x.get(key), y.get(key), f"{prefix}{key}.")
        elif x != y:
            out.append(prefix.rstrip("."))

    walk(a.identity(), b.identity(), "")
    return out


# ---- writing TOML with comments ----------------------------------------------------------------


def _toml_key(key: str) -> str:
    if key and all(c.isalnum() or c in "_-" for c in key):
        return key
    return json.dumps(key)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        text = repr(value)
        return text if any(c in text for c in ".en") else text + ".0"
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        if not value:
            return "{}"
        return "{ " + ", ".join(f"{_toml_key(str(k))} = {_toml_value(v)}" for k, v in value.items()) + " }"
    raise ConfigError(f"cannot write {value!r} ({type(value).__name__}) to TOML")


def _comment_lines(text: str | None, width: int = 96) -> list[str]:
    if not text:
        return []
    words = " ".join(text.split()).split(" ")
    lines, cur = [], "#"
    for w in words:
        if len(cur) + 1 + len(w) > width and cur != "#":
            lines.append(cur)
            cur = "#"
        cur += " " + w
    lines.append(cur)
    return lines


def _default_text(field: Any) -> str | None:
    try:
        default = field.get_default(call_default_factory=True)
    except Exception:  # pragma: no cover - exotic factories
        return None
    if isinstance(default, BaseModel):
        return None
    try:
        return _toml_value(default) if default is not None else "unset"
    except ConfigError:
        return None


def _dump_model(model: BaseModel, table: str, lines: list[str], comments: bool) -> None:
    cls = type(model)
    scalars, subtables = [], []
    for name, field in cls.model_fields.items():
        value = getattr(model, name)
        (subtables if isinstance(value, BaseModel) else scalars).append((name, field, value))
    if table:
        if lines:
            lines.append("")
        if comments:
            doc = (cls.__doc__ or "").strip().splitlines()
            lines.extend(_comment_lines(doc[0] if doc else None))
        lines.append(f"[{table}]")
    for name, field, value in scalars:
        data = model.model_dump(mode="json", include={name})[name]
        if comments:
            desc = field.description or ""
            default = _default_text(field)
            if default is not None:
                desc = f"{desc} (default {default})" if desc else f"default {default}"
            lines.extend(_comment_lines(desc))
        if data is None:
            lines.append(f"# {_toml_key(name)} = (unset)")
        else:
            lines.append(f"{_toml_key(name)} = {_toml_value(data)}")
    for name, _field, value in subtables:
        _dump_model(value, f"{table}.{name}" if table else name, lines, comments)


def dump_config(config: RunConfig, comments: bool = True, header: str | None = None) -> str:
    """TOML text of ``config`` with every field written out; with ``comments``, each field's
    description and default above it. ``load_config`` of the text gives ``config`` back."""
    lines: list[str] = [ln for part in (header or "").split("\n") if part for ln in _comment_lines(part)]
    _dump_model(config, "", lines, comments)
    return "\n".join(lines).lstrip("\n") + "\n"
