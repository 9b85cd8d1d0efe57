"""The metrics schema (selfplay/metrics_schema.py) is the one definition of the metric lines:
docs/metrics.md section 1 is generated from it, every line a run writes fits it, and every
component it defines is written by some role."""

from __future__ import annotations

from pathlib import Path

import pytest

from selfplay.metrics import MetricsLog, read_metrics
from selfplay.metrics_schema import COMPONENTS, doc_section, line_problems, render_markdown

ROOT = Path(__file__).resolve().parent.parent


def test_docs_section_is_generated_from_the_schema():
    assert doc_section(ROOT / "docs" / "metrics.md") == render_markdown(), \
        "docs/metrics.md is stale: run `python -m selfplay.metrics_schema docs/metrics.md`"


def test_hostile_lines_are_named():
    ok = {"t": 1.0, "component": "run", "source": "local", "event": "stop", "stop_reason": "error: disk full"}
    assert line_problems(ok) == []
    assert line_problems({**ok, "component": "weather"}) == ["unknown component 'weather'"]
    assert line_problems({**ok, "speed": 3}) == ["run: unknown field 'speed'"]
    assert line_problems({**ok, "stop_reason": "bored"})[0].startswith("run.stop_reason: 'bored' is not one of")
    assert line_problems({**ok, "pid": "12"}) == ["run.pid: '12' is not int"]
    assert line_problems({**ok, "pid": True}) == ["run.pid: True is not int"]
    assert line_problems({k: v for k, v in ok.items() if k != "event"}) == ["run: required field 'event' missing"]


def test_every_component_is_written_and_every_line_fits(tmp_path):
    """An in-process run with the learner writes every component but ``eval`` and ``gate``; a
    match with a metrics log and a gating match write those. Each line fits the schema; each role ends with a final line."""
    from test_loop_learns import tiny_config

    from selfplay.evaluation import MinimaxPlayer, RandomPlayer, play_match
    from selfplay.games.registry import make_game
    from selfplay.loop import LoopConfig, run_local_loop

    run_dir = tmp_path / "run"
    status = run_local_loop(tiny_config(games=48), run_dir, loop=LoopConfig(games_per_phase=16))
    assert status.learner_steps > 0
    ttt = make_game("tictactoe")
    play_match(ttt, RandomPlayer(), MinimaxPlayer(ttt), 2, seed=1,
               metrics_log=MetricsLog(run_dir / "metrics.jsonl", "eval", "test"))
    from selfplay.config import with_overrides
    from selfplay.roles.evaluation import EvaluationRole
    from selfplay.snapshots import SnapshotStore

    gated = with_overrides(tiny_config(), {"evaluation.gate_threshold": 0.55, "evaluation.gate_games": 2,
                                           "evaluation.simulations": 4})
    EvaluationRole(run_dir, gated).gate(SnapshotStore(run_dir).latest_version(), 1)  # writes a gate line
    rows = list(read_metrics(run_dir / "metrics.jsonl"))
    assert {r["component"] for r in rows} == set(COMPONENTS)
    for r in rows:
        assert line_problems(r) == [], r
    finals = {r["component"] for r in rows if r.get("final")}
    assert finals == {"worker", "buffer", "learner", "snapshot_server"}
    stops = [r for r in rows if r["component"] == "run" and r["event"] == "stop"]
    assert len(stops) == 1 and stops[0]["stop_reason"] == "games reached" and stops[0]["games_total"] == 48
    # the final lines hold the same counts as the catalog
    worker = [r for r in rows if r["component"] == "worker" and r.get("final")][0]
    buffer = [r for r in rows if r["component"] == "buffer" and r.get("final")][0]
    assert worker["games_total"] == buffer["games_total"] == 48 and buffer["pending_games"] == 0


@pytest.mark.parametrize("name", sorted(COMPONENTS))
def test_every_field_has_a_type_unit_and_meaning(name):
    comp = COMPONENTS[name]
    assert comp.fields and comp.about and comp.source
    for f in comp.fields:
        assert f.type in ("int", "float", "str", "bool", "list") and f.unit and f.meaning, f
