"""``report`` and ``show`` on a synthetic run: PNGs exist and are not blank (file size and pixel
variance read back with matplotlib.image.imread), the page shows the configuration, plots
without data say so, and bad game ids or move numbers give clear errors."""

from __future__ import annotations

import json
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest

from selfplay.cli import main
from selfplay.errors import ConfigError
from selfplay.games.registry import make_game
from selfplay.monitor.data import GameNotFoundError
from selfplay.monitor.report import build_report, value_calibration, visit_entropies
from selfplay.monitor.show import PositionView, action_cells, draw_position, position_view, show_position
from selfplay.network import NetworkConfig, build_network
from selfplay.records import GameRecordBuilder
from selfplay.replay.store import RecordStore
from selfplay.replay.synthetic import random_record
from selfplay.rundir import RunDir
from selfplay.snapshots import SnapshotStore

T0 = 1_700_000_000.0
PLOTS = ("games_per_hour.png", "game_length.png", "snapshot_lag.png", "losses.png",
         "value_calibration.png", "policy_entropy.png", "resign_false_positives.png", "elo.png")


def assert_not_blank(path: Path) -> None:
    assert path.exists() and path.stat().st_size > 2000, path
    img = mpimg.imread(path)
    assert img.ndim == 3 and float(img[..., :3].var()) > 1e-4, f"{path.name} looks blank"


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("rep") / "run"
    rd = RunDir.create(root)
    rd.config.write_text('[game]\nname = "mnk"\n\n[search]\nsimulations = 16\n')
    game = make_game("mnk")
    snaps = SnapshotStore(rd)
    net = build_network(game, NetworkConfig.tiny(), seed=3)
    snaps.publish(net)  # version 0 (or the store's first number)
    v0 = snaps.latest_version()
    rng = np.random.default_rng(11)
    recs = [random_record(game, rng, f"g{i:03d}", game_name="mnk", game_options={}, worker_id=f"w{i % 2}",
                          snapshot=v0, full_search_share=0.5, started_at=T0 + 10 * i - 8,
                          finished_at=T0 + 10 * i) for i in range(60)]
    with RecordStore(rd, writer="main", max_games=16) as store:
        store.add_games(recs)
        store.flush()
    rows = []
    for k in range(0, 61, 5):
        t = T0 + 10 * k
        for w in ("w0", "w1"):
            rows.append({"t": t, "component": "worker", "source": w, "games_total": k // 2,
                         "positions_total": 8 * k // 2, "evals_total": 1000 * k, "snapshot_version": v0,
                         "resign_disabled_games_total": k // 10, "resign_probe_triggered_total": k // 20,
                         "resign_false_positives_total": k // 40})
        rows.append({"t": t, "component": "learner", "source": "learner", "step": 10 * k,
                     "loss": 2.0 / (1 + k), "loss_policy": 1.5 / (1 + k), "loss_value": 0.4 / (1 + k),
                     "loss_l2": 0.1})
    rows.append({"t": T0 + 300, "component": "snapshots", "source": "store", "version": v0 + 1,
                 "published_at": T0 + 300})
    for j, elo in enumerate((-50.0, 20.0, 85.0)):
        rows.append({"t": T0 + 200 * j, "component": "eval", "source": "evaluator", "opponent": "mcts-64",
                     "games": 40, "wins": 20 + j, "draws": 0, "losses": 20 - j, "elo": elo})
    with open(rd.metrics, "a") as f:
        f.writelines(json.dumps(r) + "\n" for r in rows)
    return root


def test_report_writes_every_plot_and_the_page(run: Path, tmp_path: Path) -> None:
    out = tmp_path / "report"
    plots = build_report(run, out)
    assert [p.file for p in plots] == list(PLOTS)
    assert all(p.has_data for p in plots), [(p.file, p.has_data) for p in plots]
    for name in PLOTS:
        assert_not_blank(out / name)
    page = (out / "index.html").read_text()
    assert "simulations = 16" in page  # the run's configuration
    for name in PLOTS:
        assert f'src="{name}"' in page


def test_report_of_an_empty_run_says_no_data_yet(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    RunDir.create(tmp_path / "fresh")
    assert main(["report", str(tmp_path / "fresh"), "--out", str(tmp_path / "out")]) == 0
    text = capsys.readouterr().out
    assert text.count("no data yet") == len(PLOTS)
    for name in PLOTS:
        assert_not_blank(tmp_path / "out" / name)  # the image carries the words, not a blank canvas
    assert main(["report", str(tmp_path / "missing"), "--out", str(tmp_path / "o2")]) == 2


def test_value_calibration_bins() -> None:
    # predictions 0.95 twice with outcomes +1 and -1, and -0.55 once with outcome -1:
    # bins of width 0.2 over [-1, 1]; 0.95 falls in the last bin (mean 0), -0.55 in bin 2 (mean -1)
    centres, means, counts = value_calibration(np.array([0.95, 0.95, -0.55]), np.array([1, -1, -1]))
    assert counts.tolist() == [0, 0, 1, 0, 0, 0, 0, 0, 0, 2]
    assert means[9] == pytest.approx(0.0) and means[2] == pytest.approx(-1.0)
    assert centres[9] == pytest.approx(0.9)


def test_visit_entropy_matches_shannon() -> None:
    # uniform visits over 4 moves: entropy ln 4 (Shannon 1948); a single move: 0
    b = GameRecordBuilder("e", "mnk", {}, "w", 0, {}, 0.0)
    b.add_position(np.zeros((3, 3)), 0, 0, np.ones(9, bool), np.array([0, 1, 2, 3]), np.ones(4), 0.0, True, 0)
    b.add_position(np.zeros((3, 3)), 1, 1, np.ones(9, bool), np.array([1]), np.array([7.0]), 0.0, True, 0)
    rec = b.finish(0, 1.0)
    assert visit_entropies(rec) == pytest.approx([np.log(4), 0.0])


def test_show_draws_a_recorded_position(run: Path, tmp_path: Path) -> None:
    out = tmp_path / "pos.png"
    assert main(["show", str(run), "--game", "g007", "--move", "2", "--out", str(out), "--simulations", "16"]) == 0
    assert_not_blank(out)


def test_show_rejects_bad_game_and_move(run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(GameNotFoundError, match="'g999' is not in the catalog"):
        show_position(run, "g999", 0, tmp_path / "x.png")
    with pytest.raises(ConfigError, match="out of range"):
        show_position(run, "g007", 99, tmp_path / "x.png")
    assert main(["show", str(run), "--game", "g007", "--move", "-1", "--out", str(tmp_path / "y.png")]) == 2
    assert "out of range" in capsys.readouterr().err


def test_column_game_layout_lands_on_the_lowest_empty_cell() -> None:
    g = make_game("fourinrow")
    s = g.play_sequence([3, 3])
    board = g.compact(s)
    cells, extras = action_cells(board, g.num_actions)
    h = board.shape[0]
    assert cells[3] == (h - 3, 3) and cells[0] == (h - 1, 0) and extras == []


def test_draw_position_on_synthetic_arrays(tmp_path: Path) -> None:
    g = make_game("mnk")
    s = g.play_sequence([4])
    legal = g.legal_mask(s)
    prior = legal / legal.sum()
    visits = np.where(np.arange(9) == 0, 1.0, 0.0)
    q = np.where(legal, np.linspace(-1, 1, 9), np.nan)
    view = PositionView(board=g.compact(s), to_play=1, prior=prior, visit_share=visits, q=q, legal=legal,
                        played=0, action_text=g.action_to_text)
    assert_not_blank(draw_position(view, tmp_path / "syn.png"))


def test_show_without_the_snapshot_still_draws_the_visits(tmp_path: Path) -> None:
    root = tmp_path / "nosnap"
    game = make_game("mnk")
    rec = random_record(game, np.random.default_rng(5), "lonely", game_name="mnk", game_options={},
                        snapshot=7, finished_at=T0)
    with RecordStore(root, writer="main") as store:
        store.add_games([rec])
        store.flush()
    view = position_view(root, "lonely", 1)
    assert view.prior is None and view.q is None
    assert "snapshot 7" in view.note
    assert np.isclose(view.visit_share.sum(), 1.0)
    assert_not_blank(draw_position(view, tmp_path / "nosnap.png"))
