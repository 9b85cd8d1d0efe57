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
PLOTS = ("games_per_hour.png", "results_by_colour.png", "game_length.png", "snapshot_lag.png", "losses.png",
         "learning_rate.png", "sample_reuse.png", "buffer_fill.png", "value_calibration.png",
         "policy_entropy.png", "resign_false_positives.png", "elo.png")


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
                     "loss_l2": 0.1, "learning_rate": 0.02 if k < 30 else 0.002, "reuse_ratio": 0.1 * k})
        rows.append({"t": t, "component": "buffer", "source": "buffer0", "games_total": k,
                     "positions_total": 8 * k, "window_positions": 8 * k, "window_capacity": 1000})
    rows.append({"t": T0 + 300, "component": "snapshots", "source": "store", "version": v0 + 1,
                 "published_at": T0 + 300})
    for j, elo in enumerate((-50.0, 20.0, 85.0)):
        # the ladder's contract: player, snapshot_version, elo and its interval
        rows.append({"t": T0 + 200 * j, "component": "eval", "source": "ladder", "opponent": "mcts-64",
                     "player": f"snapshot-{j}", "snapshot_version": j, "games": 40, "wins": 20 + j,
                     "draws": 0, "losses": 20 - j, "elo": elo, "elo_low": elo - 30, "elo_high": elo + 30})
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
    assert text.count("no data yet") == len(PLOTS) - 1 and "no evaluation in this run" in text
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


def image_sources(page: str) -> list[str]:
    """The src of every <img> of an HTML page (Python's own HTML parser)."""
    from html.parser import HTMLParser

    found: list[str] = []

    class Imgs(HTMLParser):
        def handle_starttag(self, tag, attrs):  # noqa: ANN001
            if tag == "img":
                found.append(dict(attrs)["src"])

    Imgs().feed(page)
    return found


def test_every_image_the_page_shows_exists(run: Path, tmp_path: Path) -> None:
    out = tmp_path / "rep"
    build_report(run, out)
    srcs = image_sources((out / "index.html").read_text())
    assert sorted(srcs) == sorted(PLOTS)
    for src in srcs:
        assert_not_blank(out / src)


def test_page_numbers_are_formatted_and_state_is_named(run: Path, tmp_path: Path) -> None:
    import re

    out = tmp_path / "rep"
    build_report(run, out)
    page = (out / "index.html").read_text()
    table = page[page.index("<table>"):page.index("</table>")]
    cells = re.findall(r"<td>([^<]*)</td>", table)
    # no raw floats such as 1234.5678 or 1796180286.39 in the table (thousands separators instead)
    assert not [c for c in cells if re.fullmatch(r"-?\d{4,}(\.\d+)?", c)], cells
    assert "<th>state</th><td>running" in table  # the snapshot store wrote a line moments ago


def test_one_learner_line_is_drawn_and_the_legend_stays_outside(tmp_path: Path) -> None:
    import matplotlib.pyplot as plt

    from selfplay.monitor.report import ReportBuilder

    rd = RunDir.create(tmp_path / "one")
    rd.metrics.write_text(json.dumps({"t": T0, "component": "learner", "source": "learner", "step": 1,
                                      "loss": 2.5, "loss_policy": 2.0, "loss_value": 0.4, "loss_l2": 0.1,
                                      "learning_rate": 0.02}) + "\n")
    b = ReportBuilder(rd.root, tmp_path / "out")
    fig, ax = plt.subplots()
    assert "1 learner report" in b.draw_losses(ax)
    # one point per part, drawn with a marker so it shows
    assert all(len(line.get_xdata()) == 1 and line.get_marker() == "o" for line in ax.get_lines())
    fig.canvas.draw()
    legend = ax.get_legend().get_window_extent()
    assert legend.x0 >= ax.get_window_extent().x1  # right of the axes: it covers no curve
    plt.close(fig)
    plots = {p.file: p for p in b.build()}
    assert plots["losses.png"].has_data and plots["learning_rate.png"].has_data
    img = mpimg.imread(tmp_path / "out" / "losses.png")[..., :3]
    # the total's marker in matplotlib's first default colour, tab:blue #1f77b4
    blue = np.abs(img - np.array([0x1F, 0x77, 0xB4]) / 255).sum(axis=2) < 0.05
    assert blue.sum() > 10


def test_version_axes_have_whole_ticks(run: Path, tmp_path: Path) -> None:
    import matplotlib.pyplot as plt

    from selfplay.monitor.report import ReportBuilder

    b = ReportBuilder(run, tmp_path / "out")
    fig, ax = plt.subplots()
    assert b.draw_elo(ax) == "3 evaluation(s)"
    fig.canvas.draw()
    assert all(float(t).is_integer() for t in ax.get_xticks())
    assert ax.get_xlabel() == "snapshot version"
    # the interval is drawn: error bars from elo_low to elo_high
    assert any(len(c.get_segments()) == 3 for c in ax.collections)
    plt.close(fig)


def test_resignation_off_is_said_so(tmp_path: Path) -> None:
    rd = RunDir.create(tmp_path / "nores")
    rd.config.write_text('[game]\nname = "mnk"\n\n[search]\nsimulations = 16\n')
    plots = {p.file: p for p in build_report(rd.root, tmp_path / "out")}
    assert not plots["resign_false_positives.png"].has_data
    assert plots["resign_false_positives.png"].note == "resignation is off in this run"
    assert plots["elo.png"].note == "no evaluation in this run"


def test_report_replaces_a_folder_only_when_asked(run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "rep"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    assert main(["report", str(run), "--out", str(out)]) == 2
    assert "--overwrite" in capsys.readouterr().err and not (out / "index.html").exists()
    assert main(["report", str(run), "--out", str(out), "--overwrite", "--last", "10"]) == 0
    assert (out / "index.html").exists() and (out / "notes.txt").read_text() == "mine"


def test_the_page_loads_every_image_in_chromium(run: Path, tmp_path: Path) -> None:
    """Real headless Chromium (Debian's ``chromium``) opens index.html; a script added to a copy
    of the page lists, after load, every image whose pixels did not arrive."""
    import shutil
    import subprocess

    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("chromium is not installed (apt-get install -y chromium)")
    out = tmp_path / "rep"
    build_report(run, out)
    page = (out / "index.html").read_text()
    probe = ("<script>window.addEventListener('load', () => { const bad = [...document.images]"
             ".filter(i => !i.complete || i.naturalWidth === 0).map(i => i.getAttribute('src'));"
             " document.body.setAttribute('data-images', document.images.length + ':' + bad.join(',')); });"
             "</script></body>")
    (out / "probe.html").write_text(page.replace("</body>", probe))
    proc = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--allow-file-access-from-files",
                           "--virtual-time-budget=5000", "--dump-dom", (out / "probe.html").as_uri()],
                          capture_output=True, text=True, timeout=120)
    import re

    m = re.search(r'data-images="(\d+):([^"]*)"', proc.stdout)
    assert m, proc.stderr[-2000:]
    assert int(m.group(1)) == len(PLOTS) and m.group(2) == "", m.group(0)
