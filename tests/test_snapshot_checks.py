"""Snapshots are checked by their outputs and dtypes before they are published and when a worker
loads them; the snapshot store never grows a run out of a mistyped path."""

from __future__ import annotations

import pytest
import torch
from safetensors.torch import save_file

from selfplay.cli import main as cli_main
from selfplay.config import RunConfig, dump_config
from selfplay.errors import RunDirError, SnapshotError
from selfplay.games.registry import make_game
from selfplay.network import NetworkConfig, build_network
from selfplay.rundir import RunDir, atomic_write_bytes
from selfplay.snapshots import SnapshotStore, output_problems

TTT = make_game("tictactoe")
#: finite in float32 (its largest value is about 3.4e38), yet any product of two overflows
HUGE = 3e38


def run_with_config(path):
    """A run whose run.toml describes the default network for tic-tac-toe."""
    path.mkdir(parents=True)
    cfg = RunConfig()
    atomic_write_bytes(path / "run.toml", dump_config(cfg).encode())
    return path, build_network(TTT, cfg.network, seed=5)


def huge(net):
    sd = {k: v.clone() for k, v in net.state_dict().items()}
    sd["stem.0.weight"].fill_(HUGE)
    return sd


def test_the_probe_accepts_a_fresh_network_and_names_the_overflowing_layer():
    net = build_network(TTT, NetworkConfig.tiny(), seed=1)
    assert output_problems(net) is None
    net.load_state_dict(huge(net))
    assert torch.isfinite(net.state_dict()["stem.0.weight"]).all()  # the NaN check cannot see it
    problem = output_problems(net)
    assert problem is not None and "stem" in problem and "overflow" in problem


def test_publish_refuses_weights_that_overflow(tmp_path):
    root, net = run_with_config(tmp_path / "run")
    store = SnapshotStore(root)
    v1 = store.publish(net)
    bad_net = build_network(TTT, RunConfig().network, seed=6)
    bad_net.load_state_dict(huge(bad_net))
    with pytest.raises(SnapshotError, match="overflow"):
        store.publish(bad_net)                      # the learner's path (a network)
    with pytest.raises(SnapshotError, match="overflow"):
        store.publish(huge(net), game="mnk", game_options=dict(TTT.options()))  # a dict: run.toml's net
    assert store.versions() == [v1]


def test_publish_command_refuses_3e38_int8_and_float64_weights_naming_them(tmp_path, capsys):
    root, net = run_with_config(tmp_path / "run")
    SnapshotStore(root).publish(net)
    cases = {
        "huge.safetensors": (huge(net), "overflow"),
        "int8.safetensors": ({k: (v.to(torch.int8) if k == "policy_fc.weight" else v)
                              for k, v in net.state_dict().items()}, "policy_fc.weight has dtype int8"),
        "f64.safetensors": ({k: (v.double() if k == "value_fc2.bias" else v)
                             for k, v in net.state_dict().items()}, "value_fc2.bias has dtype float64"),
    }
    for name, (sd, words) in cases.items():
        path = tmp_path / name
        save_file({k: v.contiguous() for k, v in sd.items()}, path)
        assert cli_main(["publish", str(root), str(path)]) == 2, name
        err = capsys.readouterr().err
        assert words in err and name in err and err.count("\n") == 1, err
    assert SnapshotStore(root).versions() == [1]


def test_a_bad_version_on_disk_is_kept_out_when_loading_naming_the_version(tmp_path):
    # a store without run.toml and a plain dict: nothing to probe at publish time, so the
    # version lands on disk (as one copied in by hand would); loading must refuse it
    store = SnapshotStore(tmp_path, create=True)
    good = build_network(TTT, NetworkConfig.tiny(), seed=1)
    v1 = store.publish(good)
    v2 = store.publish(huge(good), game="mnk", game_options=dict(TTT.options()))
    worker = build_network(TTT, NetworkConfig.tiny(), seed=2)
    store.load_into(worker, v1)
    before = {k: v.clone() for k, v in worker.state_dict().items()}
    with pytest.raises(SnapshotError, match=f"snapshot {v2} .*overflow"):
        store.load_into(worker, v2)
    with pytest.raises(SnapshotError, match=f"snapshot {v2}"):
        store.check_version(worker, v2)
    assert all(torch.equal(before[k], v) for k, v in worker.state_dict().items())  # kept its weights
    assert store.check_version(worker, v1).version == v1


def test_loading_refuses_a_snapshot_of_other_dtypes(tmp_path):
    store = SnapshotStore(tmp_path, create=True)
    net = build_network(TTT, NetworkConfig.tiny(), seed=1)
    v = store.publish({k: v.double() for k, v in net.state_dict().items()}, game="mnk",
                      game_options=dict(TTT.options()))
    with pytest.raises(SnapshotError, match=f"snapshot {v} .*dtype float64"):
        store.load_into(build_network(TTT, NetworkConfig.tiny(), seed=2), v)


def test_snapshot_store_on_a_mistyped_path_creates_nothing(tmp_path):
    typo = tmp_path / "rnu"
    with pytest.raises(RunDirError, match="does not exist"):
        SnapshotStore(typo)
    assert not typo.exists()
    notes = tmp_path / "notes"
    notes.mkdir()
    (notes / "todo.txt").write_text("not a run")
    with pytest.raises(RunDirError, match="not a run directory"):
        SnapshotStore(notes)
    assert sorted(p.name for p in notes.iterdir()) == ["todo.txt"]
    empty = tmp_path / "fresh"
    empty.mkdir()
    SnapshotStore(empty)  # an empty folder starts a run
    assert (empty / "snapshots").is_dir()
    SnapshotStore(RunDir.create(tmp_path / "made"))  # a RunDir the caller made on purpose
