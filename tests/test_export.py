"""The path to a downstream trainer: reader (with follow), torch dataset, and the npz export."""

from __future__ import annotations

import threading
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from torch.utils.data import DataLoader

from selfplay.cli import main
from selfplay.errors import RunDirError
from selfplay.games.registry import make_game
from selfplay.replay import synthetic
from selfplay.replay.dataset import ReplayDataset
from selfplay.replay.export import NothingToExportError, export_npz
from selfplay.replay.reader import RunReader
from selfplay.replay.store import RecordStore
from selfplay.rundir import RunDir

TTT = make_game("tictactoe")


def records(n, start=0, seed=0):
    rng = np.random.default_rng(seed + start)
    return [synthetic.random_record(TTT, rng, f"g{start + i}", game_name="tictactoe",
                                    game_options={}, snapshot=start + i) for i in range(n)]


@pytest.fixture
def run(tmp_path):
    recs = records(12)
    with RecordStore(tmp_path / "run", max_games=5) as store:
        store.add_games(recs)
    return tmp_path / "run", recs


def test_export_agrees_with_the_records(run, tmp_path):
    path, recs = run
    out = tmp_path / "data.npz"
    summary = export_npz(path, out)
    n = sum(r.num_positions for r in recs)
    assert summary.positions == n and summary.games == 12
    z = np.load(out, allow_pickle=False)
    assert z["planes"].shape == (n, *TTT.input_shape) and z["policy"].shape == (n, 9)
    row = 0
    for gi, rec in enumerate(recs):
        state = TTT.initial_state()
        for t in range(rec.num_positions):
            # the rules, replaying the move list, are the reference for input and legal moves
            np.testing.assert_array_equal(z["planes"][row], TTT.encode(state))
            np.testing.assert_array_equal(z["mask"][row], TTT.legal_mask(state))
            # a policy target only where the search had its full budget (playout cap
            # randomisation, Wu 2019): reduced-search rows are zero and weigh 0
            full = bool(rec.full_search[t])
            np.testing.assert_allclose(z["policy"][row], rec.policy_target(t, 9) if full else np.zeros(9), rtol=1e-6)
            assert z["policy_weight"][row] == (1.0 if full else 0.0)
            assert z["action"][row] == rec.actions[t] and z["root_value"][row] == np.float32(rec.root_values[t])
            assert z["value"][row] == rec.outcomes[t]
            assert z["snapshot"][row] == rec.snapshot[t] and z["game_index"][row] == gi
            assert z["move_number"][row] == t and z["full_search"][row] == rec.full_search[t]
            state = TTT.play(state, int(rec.actions[t]))
            row += 1
        assert z["game_ids"][gi] == rec.game_id
        # the value is the final result from the mover's view
        assert rec.result == (TTT.outcome(state) if TTT.is_terminal(state) else 0)
    full = z["full_search"]
    assert 0 < full.sum() < n  # the synthetic games mix full and reduced searches
    np.testing.assert_allclose(z["policy"][full].sum(axis=1), 1.0, rtol=1e-6)
    assert not z["policy"][~full].any()
    assert set(np.unique(z["value"])) <= {-1.0, 0.0, 1.0}
    # every array the docs list is in the file, and nothing undocumented
    doc = (Path(__file__).resolve().parents[1] / "docs" / "record-format.md").read_text()
    export_doc = doc[doc.index("## Export"):]
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    for name in z.files:
        assert f"`{name}`" in export_doc, f"{name} is not documented in docs/record-format.md"
        assert f"`{name}`" in readme, f"{name} is not listed in README.md"


def test_export_keeps_reduced_policies_when_asked(run, tmp_path):
    path, recs = run
    assert main(["export", str(path), "--out", str(tmp_path / "r.npz"), "--reduced-policies"]) == 0
    z = np.load(tmp_path / "r.npz")
    rows = [rec.policy_target(t, 9) for rec in recs for t in range(rec.num_positions)]
    np.testing.assert_allclose(z["policy"], np.array(rows), rtol=1e-6)
    np.testing.assert_array_equal(z["policy_weight"], z["full_search"].astype(np.float32))


def test_export_last_n_is_the_tail(run, tmp_path):
    path, recs = run
    export_npz(path, tmp_path / "all.npz")
    export_npz(path, tmp_path / "tail.npz", last=17, compress=True)
    full, tail = np.load(tmp_path / "all.npz"), np.load(tmp_path / "tail.npz")
    assert tail["planes"].shape[0] == 17
    for k in ("planes", "policy", "value", "mask", "snapshot", "move_number"):
        np.testing.assert_array_equal(tail[k], full[k][-17:])


def test_export_command_and_its_errors(run, tmp_path, capsys):
    path, recs = run
    out = tmp_path / "cli.npz"
    assert main(["export", str(path), "--format", "npz", "--out", str(out), "--last", "5"]) == 0
    assert "wrote 5 positions" in capsys.readouterr().out
    before = out.read_bytes()
    assert main(["export", str(path), "--out", str(out)]) == 2  # never replaced unasked
    assert "exists" in capsys.readouterr().err
    assert out.read_bytes() == before
    (tmp_path / "empty").mkdir()
    assert main(["export", str(tmp_path / "empty"), "--out", str(tmp_path / "e.npz")]) == 2
    assert "not a run directory" in capsys.readouterr().err
    RunDir.create(tmp_path / "fresh")
    with pytest.raises(NothingToExportError, match="no positions"):
        export_npz(tmp_path / "fresh", tmp_path / "f.npz")
    with pytest.raises(RunDirError, match=".npz"):
        export_npz(path, tmp_path / "x.txt")
    assert not (tmp_path / "f.npz").exists()
    assert not list(tmp_path.glob(".*"))  # no temporary files left behind


def test_followed_reader_sees_a_shard_that_lands_later(run):
    path, recs = run
    stop = threading.Event()
    reader = RunReader(path, follow=True, poll_interval=0.05, stop=stop)
    seen: list[str] = []

    def consume():
        for rec in reader.records():
            seen.append(rec.game_id)

    th = threading.Thread(target=consume)
    th.start()
    deadline = time.monotonic() + 20
    while len(seen) < 12 and time.monotonic() < deadline:
        time.sleep(0.02)
    assert len(seen) == 12
    with RecordStore(path) as store:
        store.add_games(records(3, start=100))
    while len(seen) < 15 and time.monotonic() < deadline:
        time.sleep(0.02)
    stop.set()
    th.join(timeout=10)
    assert not th.is_alive()
    assert seen[12:] == ["g100", "g101", "g102"]


def test_reader_stops_after_idle_timeout(run):
    path, _ = run
    t0 = time.monotonic()
    got = list(RunReader(path, follow=True, poll_interval=0.05, idle_timeout=0.3).records())
    assert len(got) == 12 and time.monotonic() - t0 < 10


def test_torch_dataset_streams_and_samples(run):
    path, recs = run
    n = sum(r.num_positions for r in recs)
    ds = ReplayDataset(path, batch_size=16, augment=False)
    batches = list(DataLoader(ds, batch_size=None))
    assert sum(b["planes"].shape[0] for b in batches) == n
    assert batches[0]["planes"].dtype == torch.float32 and batches[0]["mask"].dtype == torch.bool
    win = ReplayDataset(path, batch_size=32, window_positions=40, steps=3, seed=0)
    got = list(win)
    assert len(got) == 3 and got[0]["policy"].shape == (32, 9)
    assert torch.allclose(got[0]["policy"].sum(1), torch.ones(32))


def test_worker_games_flow_through_store_buffer_and_export(tmp_path):
    from selfplay.evaluators import UniformEvaluator
    from selfplay.replay.buffer import ReplayBuffer
    from selfplay.search import SearchConfig
    from selfplay.worker import SelfPlayWorker

    game = make_game("fourinrow")
    worker = SelfPlayWorker(game, UniformEvaluator(), SearchConfig(simulations=8, reduced_simulations=2),
                            games_in_parallel=3, worker_id="w0", seed=5)
    recs = worker.play_games(3)
    with RecordStore(tmp_path / "run") as store:
        added, dups = store.add_games(recs + recs[:1])
        assert len(added) == 3 and dups == [recs[0].game_id]
    buf = ReplayBuffer(game, 1000, seed=0)
    assert buf.refill_from(tmp_path / "run") == sum(r.num_positions for r in recs)
    export_npz(tmp_path / "run", tmp_path / "c4.npz")
    z = np.load(tmp_path / "c4.npz")
    committed = {r.game_id: r for r in RunReader(tmp_path / "run").records()}
    row = 0
    for gid in z["game_ids"]:
        rec = committed[str(gid)]
        state = game.initial_state()
        for t, a in enumerate(rec.actions):
            np.testing.assert_array_equal(z["planes"][row], game.encode(state))
            np.testing.assert_array_equal(z["mask"][row], game.legal_mask(state))
            state = game.play(state, int(a))
            row += 1
        if not rec.resigned:
            assert rec.result == game.outcome(state)
    assert row == z["planes"].shape[0]


def test_dataset_splits_shards_among_loader_processes(run):
    path, recs = run
    n = sum(r.num_positions for r in recs)
    ds = ReplayDataset(path, batch_size=8, augment=False)
    loader = DataLoader(ds, batch_size=None, num_workers=2, multiprocessing_context="fork")
    snaps = torch.cat([b["snapshot"] for b in loader])
    assert snaps.shape[0] == n  # every position once, none twice across the two processes
    want = np.concatenate([r.snapshot for r in recs])
    assert sorted(snaps.tolist()) == sorted(want.tolist())
