"""The metrics schema: every metric line a run writes, as data.

Each component (``worker``, ``buffer``, ``learner``, ``snapshots``, ``snapshot_server``, ``run``,
``eval``) has a :class:`Component` entry listing its fields with their type, unit and meaning.
The roles write these lines (:mod:`selfplay.roles`), the monitor, the Prometheus endpoint and
the report read them, and section 1 of ``docs/metrics.md`` is generated from this module
(``python -m selfplay.metrics_schema docs/metrics.md`` rewrites it; a test checks it is current).
:func:`line_problems` checks one line against the schema (the tests run it on whole runs).
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

#: the Python types a field's JSON value may have, by the schema's type name
_TYPES: dict[str, tuple[type, ...]] = {
    "int": (int,), "float": (int, float), "str": (str,), "bool": (bool,), "list": (list,),
}


@dataclass(frozen=True)
class MetricField:
    """One field of a metric line."""

    name: str
    type: str  # "int", "float", "str", "bool"
    unit: str  # "games", "s", "1/s", "version", "-" ...
    meaning: str
    required: bool = False  # present on every line of its component (else: on some lines)
    choices: tuple[str, ...] = ()  # the allowed values of a str field ("" entries: free text)


@dataclass(frozen=True)
class Component:
    """The lines of one component."""

    name: str
    source: str  # what the line's ``source`` names
    about: str
    fields: tuple[MetricField, ...]

    def field(self, name: str) -> MetricField | None:
        for f in self.fields:
            if f.name == name:
                return f
        return None


def _f(name: str, type_: str, unit: str, meaning: str, required: bool = False,
       choices: tuple[str, ...] = ()) -> MetricField:
    return MetricField(name, type_, unit, meaning, required, choices)


#: fields of every line
COMMON = (
    _f("t", "float", "Unix s", "when the line was written", True),
    _f("component", "str", "-", "which component wrote it (the headings below)", True),
    _f("source", "str", "-", "which instance wrote it (a worker id, `buffer0`, `learner` ...)", True),
    _f("final", "bool", "-", "true on the last line a role writes when it stops (all its counters)"),
)

FINAL_NOTE = "Every role writes a last line with all its counters and `\"final\": true` when it stops."

WORKER = Component("worker", "the worker id, e.g. `w0000`", "one self-play worker (the self-play role)", (
    _f("games_total", "int", "games", "games this worker finished that the buffer stored (duplicates excluded)", True),
    _f("positions_total", "int", "positions", "positions (moves) in those games", True),
    _f("duplicates_total", "int", "games", "finished games the buffer already held (a retried send)", True),
    _f("games_started_total", "int", "games", "games this worker started", True),
    _f("evals_total", "int", "evaluations", "network evaluations (leaves evaluated) so far", True),
    _f("evals_per_second", "float", "1/s", "evaluations per second of busy time, as the worker measures it", True),
    _f("positions_per_second", "float", "1/s", "moves made per second of busy time, as the worker measures it", True),
    _f("snapshot_version", "int", "version", "snapshot the worker plays with now", True),
    _f("games_in_flight", "int", "games", "games being played right now (at most G per worker)", True),
    _f("resign_disabled_games_total", "int", "games",
       "finished games in which resignation was switched off (the false-positive probe)", True),
    _f("resign_probe_triggered_total", "int", "games",
       "of those, games in which a player's root value crossed the resignation threshold (would have resigned)", True),
    _f("resign_false_positives_total", "int", "games", "of those, games the would-have-resigned player did not lose", True),
    _f("resignations_total", "int", "games", "games ended by resignation", True),
    _f("resign_threshold_now", "float", "value", "the resignation threshold in use now (only with "
       "`[search] resign_false_positive_target`: lowered from `resign_threshold` by the probe games)"),
    _f("collisions_total", "int", "-", "virtual-loss collisions in the search", True),
    _f("batches_total", "int", "batches", "batched evaluator calls", True),
    _f("mean_batch_size", "float", "leaves", "leaves per batched evaluator call", True),
    _f("seconds_busy", "float", "s", "time spent playing", True),
    _f("seconds_rules", "float", "s", "time in the game's rules", True),
    _f("seconds_tree", "float", "s", "time in the search tree", True),
    _f("seconds_network", "float", "s", "time in the evaluator's forward pass", True),
    _f("seconds_encode", "float", "s", "time building network inputs", True),
    _f("seconds_rollout", "float", "s", "time in rollouts (mixed evaluators)", True),
    _f("time_share_rules", "float", "ratio", "share of rules + tree + network time spent in the rules", True),
    _f("time_share_tree", "float", "ratio", "share spent in the tree", True),
    _f("time_share_network", "float", "ratio", "share spent in the network", True),
    _f("inference_backend", "str", "-", "runtime of the forward pass (docs/inference.md)",
       choices=("torch", "openvino", "onnxruntime")),
    _f("inference_precision", "str", "-", "precision of the forward pass", choices=("float32", "bfloat16")),
    _f("inference_bound_evals_per_second", "float", "1/s",
       "the chosen backend's speed measured by `auto` at the worker's batch size (absent when the "
       "per-machine cache made the choice)"),
    _f("snapshot_swaps_total", "int", "versions", "new weights put into use (each compiled off the hot path)"),
    _f("snapshot_swap_seconds_last", "float", "s", "seconds the newest version took to export and compile"),
    _f("snapshot_swap_seconds_total", "float", "s", "seconds all versions took to export and compile"),
    _f("snapshots_refused_total", "int", "versions",
       "versions whose weights did not fit or failed to compile (the previous one stayed in use)"),
))

BUFFER = Component("buffer", "the buffer shard, e.g. `buffer0`", "one replay buffer shard (the buffer role)", (
    _f("games_total", "int", "games",
       "games the run has stored: committed to the catalog (all shards; a game is journalled and "
       "catalogued before the buffer accepts it)", True),
    _f("positions_total", "int", "positions", "positions in those games", True),
    _f("pending_games", "int", "games", "games accepted but not yet on disk: always 0 since games are "
       "journalled before they are accepted (kept for readers of older runs)", True),
    _f("duplicates_total", "int", "games", "retried writes of an already stored game, ignored", True),
    _f("window_positions", "int", "positions", "positions held in this shard's replay window now", True),
    _f("window_capacity", "int", "positions", "size of this shard's replay window", True),
    _f("shards_total", "int", "shards", "shard files finalised (whole run)", True),
    _f("newest_snapshot_in_data", "int", "version", "newest snapshot version among the stored games", True),
    _f("refilled_positions", "int", "positions", "positions read back into the window at start (a resume)", True),
    _f("event", "str", "-", "`recovery` on the line a buffer writes right after opening a run that needed "
       "recovery (see `recovery`)", choices=("recovery",)),
    _f("recovery", "str", "-", "what opening the record store found and repaired, sentences joined by `; `: "
       "journals replayed (with a torn tail cut), catalog rebuilt, stale temporary files removed, shards "
       "indexed or quarantined"),
))

LEARNER = Component("learner", "`learner`", "the learner role", (
    _f("step", "int", "steps", "optimisation steps so far (a counter without the `_total` suffix)", True),
    _f("samples_trained_total", "int", "samples", "positions drawn into minibatches so far", True),
    _f("reuse_ratio", "float", "ratio", "samples trained per position generated", True),
    _f("snapshot_version", "int", "version", "newest snapshot the learner published", True),
    _f("pretrain_steps", "int", "steps", "supervised steps before self-play", True),
    _f("steps_per_second", "float", "1/s", "steps per second since the previous line"),
    _f("loss", "float", "-", "total loss = `loss_policy + loss_value + loss_l2` (AlphaZero loss), plus the "
       "ownership and score terms times their learner weights when the area heads train"),
    _f("loss_policy", "float", "nats", "cross-entropy of the policy against the visit distribution"),
    _f("loss_value", "float", "-", "squared error of the value against the outcome"),
    _f("loss_l2", "float", "-", "L2 weight penalty"),
    _f("loss_ownership", "float", "nats", "ownership head's cross-entropy against the final area (Go, "
       "only with `[network] area_heads` and a learner weight)"),
    _f("loss_score", "float", "-", "score head's squared error against the final margin (same condition)"),
    _f("learning_rate", "float", "-", "current learning rate"),
    _f("phase", "str", "-", "`pretrain` or `selfplay`", choices=("pretrain", "selfplay")),
    _f("resumed_from", "str", "-", "where the learner started from: `checkpoint`, `snapshot` or `fresh`",
       choices=("checkpoint", "snapshot", "fresh")),
))

SNAPSHOTS = Component("snapshots", "the snapshot store's writer: `snapshots` (version 1), `learner`, `publish` ...",
                      "one line per published snapshot (the same facts are in `RUN/snapshots/NNNNNN.json`)", (
    _f("version", "int", "version", "the version just published (versions only increase)", True),
    _f("published_at", "float", "Unix s", "when it became visible", True),
    _f("parent_version", "int", "version", "the version it was trained from (null for none)"),
    _f("training_steps", "int", "steps", "learner steps behind it"),
    _f("samples_seen", "int", "samples", "samples the learner had trained on"),
))

SNAPSHOT_SERVER = Component("snapshot_server", "`snapshots`",
                            "the snapshot publishing role: follows the store, serves the newest weights", (
    _f("version", "int", "version", "snapshot version served to workers now", True),
    _f("versions_loaded_total", "int", "versions", "versions loaded and served", True),
    _f("refused_total", "int", "versions", "versions refused (did not load or fit the game)", True),
))

RUN = Component("run", "`driver` on the Ray path, `local` in-process",
                "the run itself: start, heartbeat, stop. A run whose last run line is not a stop and whose "
                "newest heartbeat is older than 30 s has crashed (at once, read on the driver's host, when "
                "the start line's process no longer runs)", (
    _f("event", "str", "-", "`start`, `heartbeat` (at least every 10 s while running) or `stop`", True,
       choices=("start", "heartbeat", "stop")),
    _f("pid", "int", "-", "start: process id of the driver"),
    _f("host", "str", "-", "start: host name of the driver"),
    _f("mode", "str", "-", "start: `ray` or `in-process`", choices=("ray", "in-process")),
    _f("session", "int", "-", "start: number of this opening of the run directory (0 first)"),
    _f("stop_reason", "str", "-",
       "stop: `games reached`, `positions reached`, `minutes reached`, `interrupted` (Ctrl-C), "
       "`terminated` (SIGTERM), `stopped by the caller` or `error: <one-line message>`",
       choices=("games reached", "positions reached", "minutes reached", "interrupted", "terminated",
                "stopped by the caller", "error: ")),
    _f("games_total", "int", "games", "stop: games the run holds"),
    _f("positions_total", "int", "positions", "stop: positions the run holds"),
))

EVAL = Component("eval", "who evaluated", "match results (optional)", (
    _f("opponent", "str", "-", "who was played (`minimax`, `mcts-200`, `snapshot-3` ...)", True),
    _f("player", "str", "-", "who played it"),
    _f("games", "int", "games", "games of the match", True),
    _f("wins", "int", "games", "wins, from the player's side", True),
    _f("draws", "int", "games", "draws", True),
    _f("losses", "int", "games", "losses", True),
    _f("elo", "float", "Elo", "Elo difference implied by the score, E = 1 / (1 + 10^(-D/400)) (Elo's rating system)"),
    _f("snapshot_version", "int", "version", "the snapshot evaluated (the Elo plot then uses it as its x axis)"),
    _f("version", "int", "version", "the snapshot evaluated (older writers)"),
    _f("train_seconds", "float", "s", "training time behind the snapshot"),
    _f("elo_low", "float", "Elo", "lower end of the rating's 95% interval (the evaluation role: Bradley-Terry ladder)"),
    _f("elo_high", "float", "Elo", "upper end of the rating's 95% interval"),
    _f("anchor", "str", "-", "the ladder's player fixed at 0 Elo (snapshot 1)"),
    _f("opponents", "list", "-", "the players the round played (names as in `selfplay ladder`)"),
    _f("simulations", "int", "simulations", "search simulations per move of the evaluated snapshots"),
    _f("seconds", "float", "s", "wall time of the round"),
    _f("errors", "list", "-", "opponents that could not be played, each with the reason"),
    _f("error", "str", "-", "why a round failed as a whole (opponent `failed`)"),
))

GATE = Component("gate", "who evaluated", "gating matches (AlphaGo Zero; only with `[evaluation] gate_threshold`)", (
    _f("candidate", "int", "version", "the new snapshot", True),
    _f("current", "int", "version", "the snapshot workers use now", True),
    _f("games", "int", "games", "games of the match", True),
    _f("wins", "int", "games", "the candidate's wins", True),
    _f("draws", "int", "games", "draws", True),
    _f("losses", "int", "games", "the candidate's losses", True),
    _f("score", "float", "ratio", "the candidate's score, draws counting half", True),
    _f("threshold", "float", "ratio", "the score the candidate needed", True),
    _f("passed", "bool", "-", "whether the candidate became the snapshot workers use", True),
))

COMPONENTS: dict[str, Component] = {c.name: c for c in (WORKER, BUFFER, LEARNER, SNAPSHOTS, SNAPSHOT_SERVER, RUN, EVAL, GATE)}

#: stop reasons of a ``run`` stop line (an error's is ``"error: "`` + one line)
STOP_REASONS = RUN.field("stop_reason").choices  # type: ignore[union-attr]


def _type_ok(value: Any, type_name: str) -> bool:
    if value is None:
        return True
    if type_name != "bool" and isinstance(value, bool):
        return False
    return isinstance(value, _TYPES[type_name])


def line_problems(row: Mapping[str, Any]) -> list[str]:
    """What is wrong with metric line ``row`` by the schema (empty when it fits): an unknown
    component, a field the component does not have, a value of the wrong type or choice, a
    required field missing (a final line may omit the per-step fields)."""
    comp = COMPONENTS.get(str(row.get("component")))
    if comp is None:
        return [f"unknown component {row.get('component')!r}"]
    out = []
    common = {f.name: f for f in COMMON}
    for name, value in row.items():
        f = common.get(name) or comp.field(name)
        if f is None:
            out.append(f"{comp.name}: unknown field {name!r}")
            continue
        if not _type_ok(value, f.type):
            out.append(f"{comp.name}.{name}: {value!r} is not {f.type}")
        elif f.choices and isinstance(value, str) and not any(
                value == c or (c.endswith(": ") and value.startswith(c)) for c in f.choices):
            out.append(f"{comp.name}.{name}: {value!r} is not one of {', '.join(f.choices)}")
    for f in COMMON + comp.fields:
        if f.required and f.name not in row:
            out.append(f"{comp.name}: required field {f.name!r} missing")
    return out


# ---- docs/metrics.md, section 1 -------------------------------------------------------------------

BEGIN_MARK = "<!-- BEGIN metric lines: generated by `python -m selfplay.metrics_schema docs/metrics.md` -->"
END_MARK = "<!-- END metric lines -->"


def _table(fields: tuple[MetricField, ...]) -> list[str]:
    rows = ["| field | type | unit | meaning |", "|---|---|---|---|"]
    for f in fields:
        need = "" if f.required else " (not on every line)"
        rows.append(f"| `{f.name}` | {f.type} | {f.unit} | {f.meaning}{need} |")
    return rows


def render_markdown() -> str:
    """Section 1 of docs/metrics.md (between the markers)."""
    lines = [
        "One JSON object per line, appended with a single `write` (`selfplay/metrics.py`). The fields "
        "are defined in `selfplay/metrics_schema.py`; this section is generated from it. Every line has:",
        "", *_table(COMMON), "",
        FINAL_NOTE + " Counters are cumulative and end in `_total`. A counter that goes *down* means its "
        "writer restarted (a replaced worker counts from 0 again); the monitor folds the drop in, as "
        "Prometheus' `rate()` does. A torn last line (a writer died mid-line) is skipped until it is complete; "
        "a malformed complete line is skipped and counted (`metrics_bad_lines` in the status).",
    ]
    for comp in COMPONENTS.values():
        lines += ["", f"### component `{comp.name}` (source = {comp.source})", "", comp.about[0].upper() + comp.about[1:] + ".",
                  "", *_table(comp.fields)]
    return "\n".join(lines) + "\n"


def rewrite_doc(path: str | Path) -> bool:
    """Replace the generated section of ``path``; True if the file changed."""
    p = Path(path)
    text = p.read_text()
    start, end = text.index(BEGIN_MARK) + len(BEGIN_MARK), text.index(END_MARK)
    new = text[:start] + "\n" + render_markdown() + text[end:]
    if new != text:
        p.write_text(new)
        return True
    return False


def doc_section(path: str | Path) -> str:
    """The generated section as it stands in ``path``."""
    text = Path(path).read_text()
    return text[text.index(BEGIN_MARK) + len(BEGIN_MARK):text.index(END_MARK)].lstrip("\n")


if __name__ == "__main__":  # pragma: no cover - a maintenance command
    for arg in sys.argv[1:]:
        print(f"{arg}: {'rewritten' if rewrite_doc(arg) else 'up to date'}")
