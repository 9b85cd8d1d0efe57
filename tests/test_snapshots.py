"""Snapshot store: atomic, increasing versions; refusal of pickles, foreign games, wrong shapes,
corrupt files; the publish command for a user's own trainer."""

from __future__ import annotations

import hashlib
import json
import pickle
import threading

import pytest
import torch
from safetensors.torch import save_file

from selfplay.cli import main as cli_main
from selfplay.errors import SnapshotError
from selfplay.games.registry import make_game
from selfplay.metrics import read_metrics
from selfplay.network import NetworkConfig, build_network
from selfplay.rundir import RunDir
from selfplay.snapshots import SnapshotStore


@pytest.fixture()
def ttt():
    return make_game("tictactoe")


@pytest.fixture()
def net(ttt):
    return build_network(ttt, NetworkConfig.tiny(), seed=1)


class NotWeights:
    """An arbitrary picklable object, which a weights-only torch.load must refuse."""


def _params_equal(a: torch.nn.Module, b: torch.nn.Module) -> bool:
    sa, sb = a.state_dict(), b.state_dict()
    return sa.keys() == sb.keys() and all(torch.equal(sa[k], sb[k]) for k in sa)


def test_publish_and_load_round_trip(tmp_path, ttt, net):
    store = SnapshotStore(tmp_path)
    assert store.latest() is None
    v1 = store.publish(net, training_steps=0, samples_seen=0)
    other = build_network(ttt, NetworkConfig.tiny(), seed=2)
    v2 = store.publish(other, parent_version=v1, training_steps=10, samples_seen=2560)
    assert (v1, v2) == (1, 2)
    assert (tmp_path / "snapshots" / "000002.safetensors").exists()
    info = store.latest()
    assert info.version == 2 and info.parent_version == 1
    assert info.game == "mnk" and info.game_options == {"m": 3, "n": 3, "k": 3}
    assert info.architecture == {"blocks": 1, "channels": 16, "input_shape": [3, 3, 3], "num_actions": 9}
    assert info.training_steps == 10 and info.samples_seen == 2560 and info.published_at > 0
    # the recorded checksum is SHA-256 of the weights file (FIPS 180-4, via hashlib)
    blob = (tmp_path / "snapshots" / "000002.safetensors").read_bytes()
    assert info.sha256 == hashlib.sha256(blob).hexdigest()
    target = build_network(ttt, NetworkConfig.tiny(), seed=3)
    store.load_into(target, 1)
    assert _params_equal(target, net)
    store.load_into(target)  # newest
    assert _params_equal(target, other)
    rows = [r for r in read_metrics(RunDir(tmp_path).metrics) if r["component"] == "snapshots"]
    assert [r["version"] for r in rows] == [1, 2] and rows[1]["parent_version"] == 1


def test_a_publisher_killed_between_its_two_writes_leaves_no_gap(tmp_path, net):
    """Versions have no gaps (the soak's and the run tests' check): weights left without their
    metadata by a killed publisher are invisible and the next publish takes their number."""
    store = SnapshotStore(tmp_path)
    store.publish(net)
    # a publisher died after writing the weights of version 2 but before its metadata
    (tmp_path / "snapshots" / "000002.safetensors").write_bytes(b"partial")
    assert store.versions() == [1] and store.latest().version == 1  # invisible: no metadata yet
    assert store.publish(net) == 2
    assert store.versions() == [1, 2]
    store.load_into(net, 2)  # the new weights replaced the partial file (checksum and shapes pass)
    assert store.publish(net) == 3


def test_concurrent_publishers_take_distinct_versions(tmp_path, net):
    store_a, store_b = SnapshotStore(tmp_path, source="a"), SnapshotStore(tmp_path, source="b")
    got: list[int] = []
    lock = threading.Lock()

    def publish(store):
        for _ in range(5):
            v = store.publish(net)
            with lock:
                got.append(v)

    threads = [threading.Thread(target=publish, args=(s,)) for s in (store_a, store_b)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(got) == list(range(1, 11))


def test_pickle_file_is_refused_and_net_keeps_its_weights(tmp_path, ttt, net):
    store = SnapshotStore(tmp_path)
    store.publish(net)
    target = build_network(ttt, NetworkConfig.tiny(), seed=7)
    before = {k: v.clone() for k, v in target.state_dict().items()}
    path = tmp_path / "snapshots" / "000001.safetensors"
    # a torch.save file renamed .safetensors, with its checksum put in the metadata so that only
    # the format check can catch it
    torch.save(net.state_dict(), path)
    meta = tmp_path / "snapshots" / "000001.json"
    info = json.loads(meta.read_text())
    info["sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
    meta.write_text(json.dumps(info))
    with pytest.raises(SnapshotError, match="zip archive|pickle"):
        store.load_into(target, 1)
    # a raw pickle stream (protocol 2+ starts with the PROTO opcode 0x80: Python pickle docs)
    path.write_bytes(pickle.dumps({"x": 1}, protocol=4))
    with pytest.raises(SnapshotError, match="pickle"):
        store.load_into(target, 1)
    assert all(torch.equal(before[k], v) for k, v in target.state_dict().items())


def test_corrupt_file_fails_checksum(tmp_path, ttt, net):
    store = SnapshotStore(tmp_path)
    store.publish(net)
    path = tmp_path / "snapshots" / "000001.safetensors"
    data = bytearray(path.read_bytes())
    data[-5] ^= 0xFF  # flip a byte inside the tensor data
    path.write_bytes(bytes(data))
    with pytest.raises(SnapshotError, match="checksum"):
        store.load(1)


def test_truncated_header_is_a_clear_error(tmp_path, net):
    store = SnapshotStore(tmp_path)
    store.publish(net)
    path = tmp_path / "snapshots" / "000001.safetensors"
    path.write_bytes(path.read_bytes()[:20])
    meta = tmp_path / "snapshots" / "000001.json"
    info = json.loads(meta.read_text())
    info["sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
    meta.write_text(json.dumps(info))
    with pytest.raises(SnapshotError, match="not a safetensors file|corrupt"):
        store.load(1)


def test_corrupt_metadata_is_skipped_by_latest_and_refused_by_info(tmp_path, net):
    store = SnapshotStore(tmp_path)
    store.publish(net)
    store.publish(net)
    (tmp_path / "snapshots" / "000002.json").write_text("{not json")
    assert store.latest().version == 1
    with pytest.raises(SnapshotError, match="not valid JSON"):
        store.info(2)


def test_snapshot_for_another_game_is_refused(tmp_path, ttt):
    store = SnapshotStore(tmp_path)
    big = make_game("mnk", m=4, n=4, k=3)
    store.publish(build_network(big, NetworkConfig.tiny()))
    target = build_network(ttt, NetworkConfig.tiny())
    with pytest.raises(SnapshotError, match="options"):
        store.load_into(target, 1)
    four = make_game("fourinrow")
    store.publish(build_network(four, NetworkConfig.tiny()))
    with pytest.raises(SnapshotError, match="fourinrow"):
        store.load_into(target, 2)


def test_mismatched_shapes_are_refused(tmp_path, ttt, net):
    store = SnapshotStore(tmp_path)
    wider = build_network(ttt, NetworkConfig(blocks=1, channels=8, value_hidden=16))
    store.publish(wider)
    with pytest.raises(SnapshotError, match="shape"):
        store.load_into(net, 1)


def test_non_finite_weights_are_never_published(tmp_path, net):
    store = SnapshotStore(tmp_path)
    sd = {k: v.clone() for k, v in net.state_dict().items()}
    sd["policy_fc.bias"][0] = float("nan")
    with pytest.raises(SnapshotError, match="NaN"):
        store.publish(sd, game="mnk", game_options={"m": 3, "n": 3, "k": 3})
    assert store.versions() == []


def test_missing_version_names_what_exists(tmp_path, net):
    store = SnapshotStore(tmp_path)
    store.publish(net)
    with pytest.raises(SnapshotError, match="does not exist.*1"):
        store.load(5)


# ---- selfplay publish ----------------------------------------------------------------------

def test_publish_command_accepts_safetensors_and_weights_only_pt(tmp_path, ttt, net, capsys):
    run = tmp_path / "run"
    store = SnapshotStore(run, create=True)
    store.publish(net)
    mine = build_network(ttt, NetworkConfig.tiny(), seed=11)
    st = tmp_path / "mine.safetensors"
    save_file({k: v.contiguous() for k, v in mine.state_dict().items()}, st)
    assert cli_main(["publish", str(run), str(st)]) == 0
    assert json.loads(capsys.readouterr().out)["version"] == 2
    pt = tmp_path / "mine.pt"
    torch.save(mine.state_dict(), pt)
    assert cli_main(["publish", str(run), str(pt), "--parent", "1"]) == 0
    info = store.latest()
    assert info.version == 3 and info.parent_version == 1 and info.game == "mnk"
    target = build_network(ttt, NetworkConfig.tiny())
    store.load_into(target)
    assert _params_equal(target, mine)


def test_publish_command_refuses_wrong_shapes_and_pickled_objects(tmp_path, ttt, net, capsys):
    run = tmp_path / "run"
    store = SnapshotStore(run, create=True)
    store.publish(net)
    wrong = build_network(ttt, NetworkConfig(blocks=2, channels=16, value_hidden=16))
    st = tmp_path / "wrong.safetensors"
    save_file({k: v.contiguous() for k, v in wrong.state_dict().items()}, st)
    assert cli_main(["publish", str(run), str(st)]) == 2
    assert "does not fit" in capsys.readouterr().err

    pt = tmp_path / "evil.pt"
    torch.save({"obj": NotWeights()}, pt)  # weights_only=True must refuse it
    assert cli_main(["publish", str(run), str(pt)]) == 2
    assert "weights-only" in capsys.readouterr().err
    renamed = tmp_path / "renamed.safetensors"
    torch.save(net.state_dict(), renamed)
    assert cli_main(["publish", str(run), str(renamed)]) == 2
    assert "pickle" in capsys.readouterr().err
    assert store.versions() == [1]  # nothing was written by the refused attempts


def test_publish_command_on_a_non_run_directory(tmp_path, capsys):
    assert cli_main(["publish", str(tmp_path / "nope"), str(tmp_path / "w.safetensors")]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_safetensors_header_length_with_low_byte_0x80_is_not_taken_for_a_pickle():
    # The safetensors format starts with the header length as a little-endian u64
    # (safetensors format spec); a length of 0x0b80 makes the first byte 0x80, the pickle opcode.
    import json as _json
    import struct as _struct

    from selfplay.snapshots import check_safetensors_bytes

    header = _json.dumps({"__metadata__": {"pad": "x" * 3000}}).encode()
    header = header[:0x0B80 - 2] + b'"}' if len(header) > 0x0B80 else header + b" " * (0x0B80 - len(header))
    data = _struct.pack("<Q", 0x0B80) + header
    assert data[:1] == b"\x80"
    check_safetensors_bytes(data, "test")  # must not raise
    with pytest.raises(SnapshotError, match="pickle"):
        check_safetensors_bytes(b"\x80\x04\x95" + b"\x00" * 20, "test")


def test_publish_command_checks_against_run_toml_when_no_snapshot_exists(tmp_path, ttt, capsys):
    from selfplay.config import config_from_dict, dump_config

    run = tmp_path / "run"
    RunDir.create(run)
    cfg = config_from_dict({"game": {"name": "mnk", "options": {"m": 3, "n": 3, "k": 3}},
                            "network": {"blocks": 1, "channels": 16, "value_hidden": 16}})
    (run / "run.toml").write_text(dump_config(cfg))
    wrong = build_network(ttt, NetworkConfig(blocks=1, channels=8, value_hidden=16))
    st = tmp_path / "w.safetensors"
    save_file({k: v.contiguous() for k, v in wrong.state_dict().items()}, st)
    assert cli_main(["publish", str(run), str(st)]) == 2
    assert "does not fit" in capsys.readouterr().err
    right = build_network(ttt, NetworkConfig.tiny(), seed=4)
    save_file({k: v.contiguous() for k, v in right.state_dict().items()}, st)
    assert cli_main(["publish", str(run), str(st)]) == 0
    info = SnapshotStore(run).latest()
    assert info.version == 1 and info.parent_version is None and info.architecture["channels"] == 16


def test_publish_command_refuses_a_snapshot_file_of_another_game(tmp_path, ttt, net, capsys):
    run = tmp_path / "run"
    SnapshotStore(run, create=True).publish(net)
    other = SnapshotStore(tmp_path / "other", create=True)
    # same shapes, other game name: only the file's own metadata can tell
    other.publish(net.state_dict(), game="gomoku", game_options={"m": 3, "n": 3, "k": 3})
    path = tmp_path / "other" / "snapshots" / "000001.safetensors"
    assert cli_main(["publish", str(run), str(path)]) == 2
    assert "gomoku" in capsys.readouterr().err
