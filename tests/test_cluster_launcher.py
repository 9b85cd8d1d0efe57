"""`selfplay run` refuses bad input before anything starts (no Ray, nothing written); its stop
conditions, game budget and status line (shared by both run paths)."""

from __future__ import annotations

import argparse
import socket

import pytest

from selfplay.commands.run import RunPlan, resolve_run, write_run_toml
from selfplay.cli import main
from selfplay.config import dump_config, load_config, load_preset, with_overrides


def _run(argv, capsys):
    code = main(["run", *argv])
    return code, capsys.readouterr().err


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _args(**kw):
    base = dict(preset=None, config=None, out=None, games=None, positions=None, minutes=None, workers=None,
                resume=False, no_learner=False, address=None, metrics_port=None, metrics_host="127.0.0.1",
                in_process=False)
    base.update(kw)
    return argparse.Namespace(**base)


def _make_run(tmp_path, preset="tictactoe"):
    out = tmp_path / "run"
    plan = resolve_run(_args(preset=preset, out=str(out)))
    write_run_toml(plan)
    return out


def test_unknown_preset(tmp_path, capsys):
    code, err = _run(["--preset", "chess", "--out", str(tmp_path / "r")], capsys)
    assert code == 2
    assert "no preset named 'chess'" in err and "tictactoe" in err
    assert not (tmp_path / "r").exists()


def test_more_workers_than_cpus(tmp_path, capsys):
    code, err = _run(["--preset", "tictactoe", "--out", str(tmp_path / "r"), "--workers", "4096"], capsys)
    assert code == 2
    assert "--workers 4096" in err and "CPU" in err
    assert not (tmp_path / "r").exists()


def test_unreachable_address(tmp_path, capsys, monkeypatch):
    monkeypatch.delenv("RAY_ADDRESS", raising=False)
    port = _free_port()
    code, err = _run(["--preset", "tictactoe", "--out", str(tmp_path / "r"), "--address", f"127.0.0.1:{port}"],
                     capsys)
    assert code == 2
    assert f"127.0.0.1:{port}" in err and "cannot reach" in err
    assert not (tmp_path / "r").exists()
    code, err = _run(["--preset", "tictactoe", "--out", str(tmp_path / "r"), "--address", "headnode"], capsys)
    assert code == 2 and "not host:port" in err


def test_ray_address_variable_is_used(tmp_path, monkeypatch):
    monkeypatch.setenv("RAY_ADDRESS", "10.1.2.3:6379")
    plan = resolve_run(_args(preset="tictactoe", out=str(tmp_path / "r")))
    assert plan.address == "10.1.2.3:6379"
    monkeypatch.delenv("RAY_ADDRESS")
    assert resolve_run(_args(preset="tictactoe", out=str(tmp_path / "r"))).address is None


def test_bad_stop_conditions(tmp_path, capsys):
    for flag, value in (("--games", "0"), ("--positions", "-5"), ("--minutes", "0"), ("--workers", "0")):
        code, err = _run(["--preset", "tictactoe", "--out", str(tmp_path / "r"), flag, value], capsys)
        assert code == 2, flag
        assert flag in err, err


def test_needs_a_config(tmp_path, capsys):
    code, err = _run(["--out", str(tmp_path / "r")], capsys)
    assert code == 2 and "--preset NAME or --config FILE" in err


def test_existing_run_needs_resume(tmp_path, capsys):
    out = _make_run(tmp_path)
    code, err = _run(["--preset", "tictactoe", "--out", str(out)], capsys)
    assert code == 2 and "holds a run" in err and "--resume" in err
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "notes.txt").write_text("mine")
    code, err = _run(["--preset", "tictactoe", "--out", str(tmp_path / "other")], capsys)
    assert code == 2 and "is not empty" in err
    assert (tmp_path / "other" / "notes.txt").read_text() == "mine"


def test_resume_refuses_another_game_or_config(tmp_path, capsys):
    out = _make_run(tmp_path)
    before = (out / "run.toml").read_bytes()
    code, err = _run(["--preset", "fourinrow", "--out", str(out), "--resume"], capsys)
    assert code == 2
    assert "from another game" in err and "game.name is 'mnk' there, 'fourinrow' here" in err
    cfg = tmp_path / "c.toml"
    cfg.write_text(dump_config(with_overrides(load_preset("tictactoe"), {"search.simulations": 65})))
    code, err = _run(["--config", str(cfg), "--out", str(out), "--resume"], capsys)
    assert code == 2 and "from another config" in err and "search.simulations is 64 there, 65 here." in err
    assert (out / "run.toml").read_bytes() == before  # nothing rewritten


def test_resume_keeps_the_stored_config_and_takes_new_stop_conditions(tmp_path):
    out = _make_run(tmp_path)
    plan = resolve_run(_args(out=str(out), resume=True, games=77, workers=1))
    assert plan.config.identity() == load_preset("tictactoe").identity()
    assert plan.config.run.games == 77 and plan.config.run.workers == 1
    write_run_toml(plan)
    assert load_config(out / "run.toml").run.games == 77


def test_resume_of_nothing(tmp_path, capsys):
    code, err = _run(["--out", str(tmp_path / "none"), "--resume"], capsys)
    assert code == 2 and "does not exist; nothing to resume" in err
    (tmp_path / "empty").mkdir()
    code, err = _run(["--out", str(tmp_path / "empty"), "--resume"], capsys)
    assert code == 2 and "has no run.toml" in err


def test_run_toml_is_complete(tmp_path):
    out = _make_run(tmp_path)
    text = (out / "run.toml").read_text()
    assert load_config(out / "run.toml") == load_preset("tictactoe")
    assert "# threads of each worker's forward pass" in text
    assert isinstance(resolve_run(_args(out=str(out), resume=True)), RunPlan)


def test_stop_conditions_and_status_line():
    from selfplay.roles.run import status_line, stop_reached

    cfg = with_overrides(load_preset("tictactoe"), {"run.games": 100, "run.positions": 0, "run.minutes": 0})
    assert stop_reached(cfg, 99, 700, 0.0) is None
    assert stop_reached(cfg, 100, 700, 0.0) == "games reached"
    assert stop_reached(with_overrides(cfg, {"run.games": 0, "run.positions": 700}), 5, 700, 0.0) == "positions reached"
    half_minute = with_overrides(cfg, {"run.games": 0, "run.minutes": 0.5})
    assert stop_reached(half_minute, 5, 7, 29.0) is None
    assert stop_reached(half_minute, 5, 7, 31.0) == "minutes reached"
    line = status_line({"games_total": 100, "positions_total": 700, "window_positions": 700, "window_capacity": 1000},
                       elapsed=31.0, initial_games=0, initial_positions=0, workers=2, snapshot_version=3, learner=None)
    assert "games 100 " in line and "positions 700 " in line and "window 700/1,000" in line


def test_game_budget_never_allots_more_games_than_wanted():
    """--games N: the workers together may start at most N games (none lost), shared between
    them, and a restarted worker's lost games are given out again."""
    from selfplay.roles.run import GameBudget

    cfg = with_overrides(load_preset("tictactoe"), {"run.games": 40})
    b = GameBudget(cfg, 0, 0, worker_count=2, lookahead=64)
    assert b.limit_for(0) == 20 and b.limit_for(1) == 20  # the 40 games shared out
    b.report(0, "s0.", finished=20, added_games=20, added_positions=140)
    assert b.limit_for(0, "s0.") == 20  # worker 1 still holds the other 20: nothing more to start
    b.report(1, "s0.", finished=5, added_games=4, added_positions=30)  # one of them a duplicate
    assert b.limit_for(1, "s0.") == 20 and b.limit_for(0, "s0.") == 21  # the duplicate's place goes out again
    b.report(1, "s0.r1.", finished=0, added_games=0, added_positions=0)  # restarted: its 15 in flight are lost
    assert b.wanted() == 16 and b.stored_games == 24
    assert b.limit_for(1, "s0.r1.") == 8 and b.limit_for(0, "s0.") == 28  # 8 + 8 open: the 16 wanted
    # --positions: the mean game length so far turns the positions still wanted into games
    pos = GameBudget(with_overrides(cfg, {"run.games": 0, "run.positions": 700}), 10, 70, worker_count=1, lookahead=8)
    assert pos.wanted() == 90 and pos.limit_for(0) == 90  # (700 - 70) / 7 positions a game
    unknown = GameBudget(with_overrides(cfg, {"run.games": 0, "run.positions": 700}), 0, 0, worker_count=1,
                         lookahead=8)
    assert unknown.wanted() is None and unknown.limit_for(0) == 8  # no game stored yet: a first lookahead
    free = GameBudget(with_overrides(cfg, {"run.games": 0, "run.minutes": 1.0}), 0, 0, worker_count=1, lookahead=8)
    assert free.limit_for(0) is None


def test_buffer_shard_counters_merge_into_one_buffer():
    from selfplay.roles.buffer import merge_buffer_stats

    def shard(pending_games, pending_positions, window):
        # every shard reads the same catalog: its durable counts are the whole run's
        return {"games_durable": 100, "positions_durable": 900, "pending_games": pending_games,
                "pending_positions": pending_positions, "duplicates_total": 3, "shards_total": 7,
                "window_positions": window, "window_capacity": 1000, "window_policy_targets": window // 2,
                "newest_snapshot_in_data": 4}

    merged = merge_buffer_stats([shard(2, 20, 500), shard(5, 40, 300)])
    assert merged["games_total"] == 100 + 2 + 5 and merged["positions_total"] == 900 + 60
    assert merged["window_positions"] == 800 and merged["window_capacity"] == 2000
    assert merged["duplicates_total"] == 3 and merged["buffer_shards"] == 2


def test_actor_startup_errors_become_one_line():
    from cluster.driver import startup_error

    text = ("The actor died because of an error raised in its creation task, ray::BufferActor.__init__()\n"
            "  File \"store.py\", line 120, in _take_lock\n"
            "selfplay.errors.RunDirError: run directory '/r' already has an open record store named 'buffer0'")
    err = startup_error("the replay buffer", RuntimeError(text))
    assert str(err) == ("the replay buffer could not start: run directory '/r' already has an open record "
                        "store named 'buffer0'")


def test_resume_into_a_live_run_is_refused_before_anything_is_touched(tmp_path, capsys):
    import os

    from selfplay.roles.runlock import RunLock

    out = _make_run(tmp_path)
    before = (out / "run.toml").read_bytes()
    live = RunLock.acquire(out)  # another `selfplay run` holds the directory
    try:
        for extra in ([], ["--in-process"]):
            code, err = _run(["--out", str(out), "--resume", "--games", "5", *extra], capsys)
            assert code == 2 and f"in use by pid {os.getpid()}" in err, err
            assert (out / "run.toml").read_bytes() == before  # not rewritten
            assert not (out / "metrics.jsonl").exists()
    finally:
        live.release()


def test_every_command_the_closing_summary_suggests_parses(tmp_path):
    """The 'next:' lines of `selfplay run`'s closing summary are commands a user can paste:
    each parses with the command's own argument parser (a missing required option failed)."""
    import shlex

    from selfplay.cli import build_parser
    from selfplay.roles.run import closing_summary
    from selfplay.rundir import RunDir

    text = closing_summary(RunDir(tmp_path / "run"), "minutes reached",
                           {"games_total": 10, "positions_total": 70, "shards_total": 1}, elapsed=60.0,
                           initial_games=0, initial_positions=0, snapshot_version=2, learner={"step": 5})
    commands = [line.strip() for line in text.splitlines() if line.strip().startswith("selfplay ")]
    assert len(commands) >= 4
    parser = build_parser()
    for command in commands:
        argv = shlex.split(command.split("   ")[0])[1:]
        if "--help" in argv:  # prints the subcommand's help and exits 0
            with pytest.raises(SystemExit) as exit_info:
                parser.parse_args(argv)
            assert exit_info.value.code == 0, command
        else:
            parser.parse_args(argv)  # SystemExit (a usage error) fails the test
