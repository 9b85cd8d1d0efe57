"""`selfplay bench rules`: the figures it prints (behaviour only; no wall-clock thresholds)."""

from __future__ import annotations

import json

import pytest

from selfplay.bench import rules
from selfplay.cli import main
from selfplay.games.registry import game_names


def test_json_has_an_entry_per_game_with_positive_rates(capsys):
    keys = [k for k, (name, _, _) in rules.BENCH_GAMES.items() if name in game_names()]
    assert {"fourinrow", "gomoku15"} <= set(keys)
    rc = main(["bench", "rules", "--json", "--seconds", "0.02", "--repeats", "2", "--game-names", ",".join(keys)])
    assert rc == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["benchmark"] == "rules" and doc["repeats"] == 2
    assert set(doc["games"]) == set(keys)
    for key, entry in doc["games"].items():
        assert entry["moves_per_second"] > 0, key
        assert entry["legal_masks_per_second"] > 0, key
        assert entry["moves_per_cpu_second"] > 0, key
        assert len(entry["moves_per_second_repeats"]) == 2
        assert min(entry["moves_per_second_repeats"]) <= entry["moves_per_second"] <= max(entry["moves_per_second_repeats"])
        assert entry["games_finished"] >= 0 and entry["mean_game_length"] != 0
        assert entry["microseconds_per_move"] == pytest.approx(1e6 / entry["moves_per_second"])
    assert doc["games"]["fourinrow"]["options"] == {"columns": 7, "rows": 6, "k": 4}
    if "go9" in doc["games"]:
        from selfplay.games.registry import make_game

        if hasattr(make_game("go", size=9), "benchmark_playouts"):
            assert doc["games"]["go9"]["kernel_moves_per_second"] > 0
        target = doc["target"]
        assert target["moves_per_second_target"] == 100_000
        assert target["interface_ratio"] == pytest.approx(doc["games"]["go9"]["moves_per_second"] / 100_000)


def test_table_names_each_game(capsys):
    rc = main(["bench", "rules", "--seconds", "0.02", "--repeats", "1", "--game-names", "fourinrow,gomoku15"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "four-in-a-row 7x6" in out and "gomoku 15x15" in out and "moves/s" in out


def test_random_playouts_play_whole_games():
    from selfplay.games.registry import make_game
    import numpy as np

    game = make_game("tictactoe")
    moves, games, elapsed, cpu = rules.random_playouts(game, 0.05, np.random.default_rng(0))
    assert games > 0 and elapsed >= 0.05 and cpu > 0
    # a tic-tac-toe game lasts 5 to 9 moves
    assert 5 * games <= moves <= 9 * (games + 1)


@pytest.mark.parametrize(
    "args, message",
    [
        (["--seconds", "0"], "--seconds"),
        (["--seconds", "-1"], "--seconds"),
        (["--repeats", "0"], "--repeats"),
        (["--game-names", "chess"], "chess"),
        (["--game-names", ","], "--game-names"),
    ],
)
def test_bad_arguments_are_named(capsys, args, message):
    rc = main(["bench", "rules", *args])
    assert rc == 2
    assert message in capsys.readouterr().err
