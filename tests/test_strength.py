"""Rated matches in a run: the rated-game tables, `selfplay match` / `selfplay ladder`, the
evaluation role and gating, with real files and real SQLite.

Outside references: Elo's expected score and the Bradley–Terry fit are checked in
tests/test_ratings.py; here the two-player ladder is checked against the logit of the observed
score (Bradley & Terry 1952), and gating against AlphaGo Zero's rule (Silver et al. 2017,
Methods: a new network is used only if it wins at least 55% of the evaluation games).
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest

from selfplay.cli import main
from selfplay.config import config_from_dict, dump_config, load_config
from selfplay.errors import FormatError
from selfplay.evaluation import elo_difference
from selfplay.games.registry import make_game
from selfplay.metrics import read_metrics
from selfplay.network import build_network
from selfplay.network_config import NetworkConfig
from selfplay.replay.match_results import MatchResults, PlayerEntry, RatedGame
from selfplay.rundir import atomic_write_bytes
from selfplay.snapshots import SnapshotStore
from selfplay.strength import ladder
from strength_support import make_run


@pytest.fixture()
def c4_run(tmp_path: Path) -> Path:
    return make_run(tmp_path / "run", "fourinrow", {}, snapshots=4, simulations=4).root


def _ladder_json(run: Path, capsys: pytest.CaptureFixture) -> dict:
    capsys.readouterr()
    assert main(["ladder", str(run), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


# ---- the tables --------------------------------------------------------------------------------

def test_rated_games_are_stored_once_with_players(tmp_path: Path) -> None:
    path = tmp_path / "catalog.sqlite"
    players = [PlayerEntry("v1@8", "snapshot", 1, {"simulations": 8}), PlayerEntry("mcts@8", "mcts", None, {"simulations": 8})]
    games = [RatedGame("m1", i, "v1@8" if i % 2 == 0 else "mcts@8", "mcts@8" if i % 2 == 0 else "v1@8",
                       (1, -1, 0, 1)[i], 20 + i, "rules", "3 4", "match", 1.0) for i in range(4)]
    with MatchResults(path) as t:
        assert t.add_match(players, games) == 4
        assert t.add_match(players, games) == 0  # the same match again adds nothing
    with MatchResults(path, readonly=True) as t:
        stored = t.games()
        assert [g.result for g in stored] == [1, -1, 0, 1]
        assert t.players()["v1@8"].settings == {"simulations": 8}
        assert t.score_triples()[2] == ("v1@8", "mcts@8", 0.5)
    assert MatchResults(tmp_path / "missing.sqlite", readonly=True).games() == []


def test_a_damaged_catalog_is_named(tmp_path: Path) -> None:
    bad = tmp_path / "catalog.sqlite"
    bad.write_bytes(b"this is not a database" * 100)
    with pytest.raises(FormatError, match="catalog.sqlite"):
        MatchResults(bad)
    with sqlite3.connect(tmp_path / "odd.sqlite") as con:  # a hostile row: a result outside -1..1
        con.executescript("CREATE TABLE rated_games (seq INTEGER PRIMARY KEY, match_id TEXT, game_index INT, "
                          "first TEXT, second TEXT, result INT, moves INT, ended_by TEXT, opening TEXT, "
                          "origin TEXT, played_at REAL); INSERT INTO rated_games VALUES "
                          "(1, 'm', 0, 'a', 'b', 7, 1, 'rules', '', 'match', 0)")
    with pytest.raises(FormatError, match="result 7"):
        MatchResults(tmp_path / "odd.sqlite", readonly=True).games()


# ---- selfplay match / ladder -----------------------------------------------------------------------

def test_match_stores_alternating_colours_and_the_ladder_rates_them(c4_run: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["match", str(c4_run), "1", "latest", "--games", "8", "--simulations", "4", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["games"] == 8 and summary["player"] == "v1@4" and summary["opponent"] == "v4@4"
    with MatchResults(c4_run / "catalog.sqlite", readonly=True) as t:
        games = t.games()
        players = t.players()
    assert len(games) == 8
    assert sum(g.first == "v1@4" for g in games) == 4  # colours alternate exactly
    assert players["v4@4"].snapshot == 4 and players["v4@4"].settings["simulations"] == 4
    assert players["v4@4"].settings["root_noise"] is False
    # the stored games give the match's own tally
    v1_score = sum(g.score_of_first() if g.first == "v1@4" else 1 - g.score_of_first() for g in games)
    assert v1_score == summary["wins"] + 0.5 * summary["draws"]

    table = _ladder_json(c4_run, capsys)
    assert table["anchor"] == "v1@4"
    rows = {r["player"]: r for r in table["players"]}
    assert set(rows) == {"v1@4", "v4@4"}
    for key in ("elo", "elo_low", "elo_high", "games"):
        assert key in rows["v4@4"]
    assert rows["v1@4"]["elo"] == 0.0 and rows["v4@4"]["games"] == 8
    # two players: Bradley–Terry gives the logit of the score (here with one virtual draw)
    s4 = (8 - v1_score + 0.5) / 9
    assert rows["v4@4"]["elo"] == pytest.approx(elo_difference(s4), abs=0.06)
    assert rows["v4@4"]["elo_low"] < rows["v4@4"]["elo"] < rows["v4@4"]["elo_high"]

    assert main(["match", str(c4_run), "v2", "mcts", "--games", "2", "--simulations", "4"]) == 0
    assert "stored in" in capsys.readouterr().out
    assert main(["ladder", str(c4_run)]) == 0
    text = capsys.readouterr().out
    assert "mcts@4" in text and "95% interval" in text and "v1@4 is anchored at 0" in text


@pytest.mark.parametrize("argv, message", [
    (["9", "1", "--games", "2"], "snapshot 9 does not exist"),
    (["1", "2", "--games", "0"], "--games 0 must be a positive even number"),
    (["1", "2", "--games", "-4"], "--games -4 must be a positive even number"),
    (["1", "2", "--games", "3"], "must be even"),
    (["1", "banana", "--games", "2"], "player 'banana' is not a snapshot version"),
    (["1", "1", "--games", "2"], "cannot be rated against itself"),
    (["1", "--games", "2"], "either as B or with --opponent-gtp"),
    (["1", "2", "--games", "2", "--simulations", "0"], "--simulations 0 must be at least 1"),
    (["1", "--opponent-gtp", "gnugo --mode gtp", "--games", "2"], "a GTP engine plays Go"),
])
def test_match_bad_input_is_named(c4_run: Path, capsys: pytest.CaptureFixture, argv: list[str], message: str) -> None:
    assert main(["match", str(c4_run), *argv]) == 2
    assert message in capsys.readouterr().err


def test_two_snapshots_of_different_games_are_refused(c4_run: Path, capsys: pytest.CaptureFixture) -> None:
    ttt = make_game("mnk", m=3, n=3, k=3)
    SnapshotStore(c4_run).publish(build_network(ttt, NetworkConfig.tiny()))  # version 5: another game
    assert main(["match", str(c4_run), "1", "5", "--games", "2"]) == 2
    err = capsys.readouterr().err
    assert "snapshot 5" in err and "mnk" in err and "fourinrow" in err


def test_ladder_of_a_run_without_rated_games(c4_run: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["ladder", str(c4_run)]) == 0
    assert "no rated games" in capsys.readouterr().out
    assert _ladder_json(c4_run, capsys)["players"] == []
    assert main(["ladder", str(c4_run / "nope")]) == 2


# ---- the evaluation role -------------------------------------------------------------------------

def _enable_evaluation(run: Path, **settings: object) -> None:
    cfg = load_config(run / "run.toml")
    data = cfg.model_dump(mode="json")
    data["evaluation"].update({"enabled": True, **settings})
    atomic_write_bytes(run / "run.toml", dump_config(config_from_dict(data)).encode())


def test_evaluation_config_is_off_by_default_and_checked() -> None:
    cfg = config_from_dict({})
    assert cfg.evaluation.enabled is False and cfg.evaluation.gate_threshold is None
    with pytest.raises(Exception, match="evaluation.games = 3: must be even"):
        config_from_dict({"evaluation": {"games": 3}})
    with pytest.raises(Exception, match="evaluation.anchor"):
        config_from_dict({"evaluation": {"anchor": "stockfish"}})


def test_evaluation_role_rounds(c4_run: Path) -> None:
    from selfplay.roles.evaluation import EvaluationRole

    _enable_evaluation(c4_run, every_versions=2, games=2, opponents=2, anchor="mcts", simulations=4)
    role = EvaluationRole(c4_run)
    assert role.due() == 4  # newest (4) is 2 or more past snapshot 1
    line = role.step()
    assert line is not None
    assert line["component"] == "eval" and line["player"] == "v4@4" and line["snapshot_version"] == 4
    assert line["opponents"] == ["v1@4", "mcts@4"]
    assert line["games"] == 4 and line["wins"] + line["draws"] + line["losses"] == 4
    assert line["elo_low"] <= line["elo"] <= line["elo_high"]
    assert role.due() is None and role.step() is None  # nothing new
    store = SnapshotStore(c4_run)
    game = make_game("fourinrow")
    cfg = load_config(c4_run / "run.toml")
    for seed in (10, 11):
        store.publish(build_network(game, cfg.network, seed=seed))
    fresh = EvaluationRole(c4_run)  # a restarted role reads what was evaluated from the catalog
    assert fresh.evaluated_versions() == [4]
    assert fresh.opponents_for(6) == [4, 1]
    lines = fresh.run_pending()
    assert [ln["snapshot_version"] for ln in lines] == [6]
    assert lines[0]["opponents"] == ["v4@4", "v1@4", "mcts@4"]
    written = [r for r in read_metrics(c4_run / "metrics.jsonl") if r["component"] == "eval"]
    assert [r["snapshot_version"] for r in written] == [4, 6]
    rows = {r["player"]: r for r in ladder(c4_run)["players"]}
    assert rows["v6@4"]["elo"] == lines[0]["elo"]  # the line carries the ladder's rating


def test_evaluation_role_disabled_does_nothing(c4_run: Path) -> None:
    from selfplay.roles.evaluation import EvaluationRole

    role = EvaluationRole(c4_run)
    assert role.due() is None and role.run_pending() == []
    assert role.gate(4, 1) is True  # no threshold: no gate (AlphaZero)


def test_gating_accepts_only_a_candidate_that_scores_the_threshold(c4_run: Path) -> None:
    from selfplay.roles.evaluation import EvaluationRole

    _enable_evaluation(c4_run, gate_threshold=0.55, gate_games=6, simulations=4)
    role = EvaluationRole(c4_run)
    assert role.accepted_version() == 1
    accepted = role.gate_pending()
    gate = [r for r in read_metrics(c4_run / "metrics.jsonl") if r["component"] == "gate"][-1]
    assert gate["candidate"] == 4 and gate["current"] == 1 and gate["games"] == 6
    score = (gate["wins"] + 0.5 * gate["draws"]) / 6
    assert gate["passed"] == (score >= 0.55)  # AlphaGo Zero: at least 55%
    assert accepted == (4 if gate["passed"] else 1)
    assert EvaluationRole(c4_run).accepted_version() == accepted
    (c4_run / "accepted-snapshot.json").write_text("{broken")
    with pytest.raises(Exception, match="accepted-snapshot.json is corrupt"):
        role.accepted_version()


def test_evaluation_settings_may_change_on_resume() -> None:
    from selfplay.config import identity_differences

    a = config_from_dict({})
    b = config_from_dict({"evaluation": {"enabled": True, "games": 40}})
    assert identity_differences(a, b) == []  # rated games change no record of the run
    c = config_from_dict({"search": {"simulations": 64}})
    assert identity_differences(a, c) == ["search.simulations"]


def test_a_failing_anchor_or_snapshot_never_stops_the_run(c4_run: Path) -> None:
    from selfplay.roles.evaluation import FAILED_OPPONENT, EvaluationRole

    _enable_evaluation(c4_run, every_versions=2, games=2, opponents=1, simulations=4)
    data = load_config(c4_run / "run.toml").model_dump(mode="json")
    data["evaluation"]["anchor"] = "gtp:/nonexistent/engine --mode gtp"
    cfg = config_from_dict(data)
    role = EvaluationRole(c4_run, cfg)
    line = role.step()  # the GTP anchor cannot play four-in-a-row: named, the round goes on
    assert line["opponents"] == ["v1@4"] and line["games"] == 2
    assert "plays Go" in line["errors"][0]["error"]
    # a newest snapshot whose weights are damaged: one "failed" line, not retried
    store = SnapshotStore(c4_run)
    for seed in (20, 21):
        store.publish(build_network(make_game("fourinrow"), cfg.network, seed=seed))
    weights = c4_run / "snapshots" / "000006.safetensors"
    weights.write_bytes(weights.read_bytes()[:-64] + b"\0" * 64)
    failed = role.step()
    assert failed["opponent"] == FAILED_OPPONENT and failed["snapshot_version"] == 6
    assert "checksum" in failed["error"]
    assert role.step() is None
