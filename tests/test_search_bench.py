"""`selfplay bench search`: the JSON carries the agreed keys; bad arguments are refused."""

from __future__ import annotations

import json

import pytest

from selfplay.cli import main


def test_bench_json_keys(capsys):
    code = main(["bench", "search", "--json", "--game", "tictactoe", "--net", "tiny", "--seconds", "0.3",
                 "--repeats", "1", "--games-in-parallel", "4", "--simulations", "8"])
    assert code == 0
    out = json.loads(capsys.readouterr().out)
    for key in ("inference_bound_evals_per_second", "selfplay_evals_per_second", "positions_per_second",
                "efficiency", "batching_speedup", "time_share_rules", "time_share_tree", "time_share_network"):
        assert isinstance(out[key], float) and out[key] >= 0, key
    assert out["inference_bound_evals_per_second"] > 0 and out["selfplay_evals_per_second"] > 0
    assert abs(out["time_share_rules"] + out["time_share_tree"] + out["time_share_network"] - 1) < 1e-6
    assert out["mean_batch_size"] <= 4
    backends = out["backends"]
    assert "torch" in backends and out["best_backend"] in backends
    for figures in backends.values():
        for key in ("bound_evals_per_second", "selfplay_evals_per_second", "positions_per_second", "efficiency"):
            assert figures[key] > 0, key
    best = backends[out["best_backend"]]
    assert best["positions_per_second"] == max(f["positions_per_second"] for f in backends.values())
    assert out["efficiency"] == best["efficiency"]
    # the median of the slices' ratios lies between their quartiles
    assert 0 < out["efficiency_low"] <= out["efficiency"] <= out["efficiency_high"]
    assert out["speedup_vs_torch"] > 0


def test_bench_refuses_an_unknown_backend(capsys):
    assert main(["bench", "search", "--backends", "tpu", "--game", "tictactoe"]) == 2
    assert "--backends: tpu" in capsys.readouterr().err


def test_bench_refuses_bad_arguments(capsys):
    assert main(["bench", "search", "--simulations", "0", "--game", "tictactoe"]) == 2
    assert "--simulations=0" in capsys.readouterr().err


@pytest.mark.slow  # starts three worker processes with the reference network
def test_bench_all_runs_its_parts_and_refuses_unknown_ones(capsys):
    assert main(["bench", "all", "--parts", "nonsense"]) == 2
    assert "--parts: 'nonsense'" in capsys.readouterr().err
    assert main(["bench", "all", "--json", "--quick", "--parts", "memory"]) == 0
    out = json.loads(capsys.readouterr().out)
    rss = out["memory"]["rss_bytes_by_games_in_parallel"]
    assert set(rss) == {"16", "64", "256"} and all(v > 50 * 2**20 for v in rss.values())
    assert out["seconds_total"] > 0
