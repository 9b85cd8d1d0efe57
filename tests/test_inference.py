"""Inference backends agree with the float32 network and with each other.

References: ONNX Runtime (a runtime this project did not write) executing the exported ONNX file
(the open ONNX standard); torch's own float32 forward pass; OpenVINO. Tolerances: float32
runtimes within 1e-4 on logits and values (float32 rounding of reordered sums: common
practice); bfloat16 runtimes as close to float32 as torch's own bfloat16 path is, with a small
allowance (bfloat16 keeps 8 bits of mantissa).
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import torch

from selfplay.errors import ConfigError
from selfplay.evaluators import NetworkEvaluator, softmax_over_legal
from selfplay.games.registry import make_game
from selfplay.inference import BACKEND_NAMES, backend_available, build_backend
from selfplay.inference.choose import cache_path, choose_backend
from selfplay.inference.onnx_export import export_onnx_model, read_model_metadata
from selfplay.network import NetworkConfig, build_network
from selfplay.search.config import SearchConfig
from selfplay.worker import SelfPlayWorker

GO = make_game("go", size=9)
NET = build_network(GO, NetworkConfig(blocks=2, channels=32, value_hidden=32), seed=3)
AVAILABLE = [b for b in BACKEND_NAMES if backend_available(b) is None]


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("PLYFOUNDRY_CACHE_DIR", str(tmp_path / "cache"))


def real_positions(n: int = 24, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Input planes and legal masks of positions from random 9x9 games (captures, passes)."""
    rng = np.random.default_rng(seed)
    planes, legal = [], []
    while len(planes) < n:
        s = GO.initial_state()
        for _ in range(int(rng.integers(0, 60))):
            if GO.is_terminal(s):
                break
            acts = np.flatnonzero(GO.legal_mask(s))
            s = GO.play(s, int(rng.choice(acts)))
        if GO.is_terminal(s):
            continue
        planes.append(GO.encode(s))
        legal.append(GO.legal_mask(s))
    return np.stack(planes).astype(np.float32), np.stack(legal)


def random_planes(n: int = 16, seed: int = 1) -> np.ndarray:
    return np.random.default_rng(seed).random((n, *GO.input_shape), dtype=np.float32).round()


def torch_float32(planes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    with torch.inference_mode():
        logits, values = NET(torch.from_numpy(planes))
    return logits.numpy(), values.numpy()


def test_onnx_runtime_runs_the_exported_file_like_the_float32_network(tmp_path):
    """Reference: ONNX Runtime executing the exported model file per the ONNX standard."""
    ort = pytest.importorskip("onnxruntime")
    path = tmp_path / "net.onnx"
    path.write_bytes(export_onnx_model(NET, GO, version=7))
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    assert [i.name for i in session.get_inputs()] == ["planes"]
    assert [o.name for o in session.get_outputs()] == ["policy_logits", "value"]
    for planes in (random_planes(), real_positions()[0]):
        logits, values = session.run(None, {"planes": planes})
        ref_logits, ref_values = torch_float32(planes)
        assert logits.shape == (len(planes), GO.num_actions) and values.shape == (len(planes),)
        assert np.abs(logits - ref_logits).max() < 1e-4
        assert np.abs(values - ref_values).max() < 1e-4


def test_exported_model_describes_itself():
    meta = read_model_metadata(export_onnx_model(NET, GO, version=12))
    assert meta["plyfoundry.game"] == "go"
    assert json.loads(meta["plyfoundry.game_options"])["size"] == 9
    assert json.loads(meta["plyfoundry.input_shape"]) == list(GO.input_shape)
    names = json.loads(meta["plyfoundry.action_names"])
    assert len(names) == GO.num_actions == int(meta["plyfoundry.num_actions"])
    assert names[-1].lower() == "pass"  # Go's pass follows the 81 points
    assert meta["plyfoundry.snapshot_version"] == "12"
    assert "side to move" in meta["plyfoundry.input_layout"]


@pytest.mark.parametrize("backend", AVAILABLE)
def test_float32_backends_agree_with_torch(backend):
    compiled = build_backend(backend, NET, threads=1, precision="float32")
    assert compiled.precision == "float32"
    planes, _ = real_positions()
    logits, values = compiled(planes)
    ref_logits, ref_values = torch_float32(planes)
    assert np.abs(logits - ref_logits).max() < 1e-4
    assert np.abs(values - ref_values).max() < 1e-4


@pytest.mark.parametrize("precision", ["float32", "bfloat16"])
def test_openvino_steady_batch_pads_near_full_calls_and_answers_like_the_dynamic_model(precision):
    """With a batch hint OpenVINO serves calls of 90-100 % of it from a fixed-shape copy (padded,
    the padding dropped): every call size gives each row what torch float32 gives it (bfloat16:
    within twice torch bfloat16's own distance), whatever the call sizes before it."""
    if "openvino" not in AVAILABLE:
        pytest.skip("openvino is not installed")
    from selfplay.inference.openvino_backend import STEADY_FILL

    compiled = build_backend("openvino", NET, precision=precision, batch=20)
    assert compiled.steady_batch == 20 and compiled._steady_from == int(np.ceil(STEADY_FILL * 20))
    planes, _ = real_positions(24, seed=4)
    ref_logits, ref_values = torch_float32(planes)
    if precision == "float32":
        tol_l = tol_v = 1e-4
    else:
        bf = build_backend("torch", NET, precision="bfloat16")(planes)
        tol_l = 2 * np.abs(bf[0] - ref_logits).max() + 1e-3
        tol_v = 2 * np.abs(bf[1] - ref_values).max() + 1e-3
    for n in (20, 18, 19, 24, 5, 20, 18):  # steady, padded, padded, dynamic (more), dynamic (few), ...
        logits, values = compiled(planes[:n])
        assert logits.shape == (n, GO.num_actions) and values.shape == (n,)
        assert np.abs(logits - ref_logits[:n]).max() <= tol_l, n
        assert np.abs(values - ref_values[:n]).max() <= tol_v, n
    assert build_backend("openvino", NET, precision=precision).steady_batch == 0  # no hint: dynamic only


@pytest.mark.parametrize("backend", [b for b in AVAILABLE if b != "onnxruntime"])
def test_bfloat16_backends_stay_as_close_as_torch_bfloat16(backend):
    planes, legal = real_positions()
    ref_logits, ref_values = torch_float32(planes)
    torch_bf = build_backend("torch", NET, precision="bfloat16")(planes)
    compiled = build_backend(backend, NET, precision="bfloat16")
    logits, values = compiled(planes)
    allowance_logits = 2 * np.abs(torch_bf[0] - ref_logits).max() + 1e-3
    allowance_values = 2 * np.abs(torch_bf[1] - ref_values).max() + 1e-3
    assert np.abs(logits - ref_logits).max() <= allowance_logits
    assert np.abs(values - ref_values).max() <= allowance_values
    p, q = softmax_over_legal(ref_logits, legal), softmax_over_legal(logits, legal)
    kl = np.sum(np.where(p > 0, p * (np.log(np.maximum(p, 1e-30)) - np.log(np.maximum(q, 1e-30))), 0), axis=1)
    assert kl.mean() < 1e-3


def test_onnxruntime_refuses_bfloat16_with_a_reason():
    if "onnxruntime" not in AVAILABLE:
        pytest.skip("onnxruntime is not installed")
    with pytest.raises(ConfigError, match="float32 only"):
        build_backend("onnxruntime", NET, precision="bfloat16")


def test_seeded_games_play_the_same_moves_on_every_float32_backend():
    game = make_game("go", size=5)
    net = build_network(game, NetworkConfig.tiny(), seed=5)
    search = SearchConfig(simulations=12, reduced_simulations=4, temperature_moves=4)
    moves = {}
    for backend in AVAILABLE:
        ev = NetworkEvaluator(net, game=game, backend=backend, precision="float32")
        worker = SelfPlayWorker(game, ev, search, games_in_parallel=3, worker_id="w", seed=11)
        moves[backend] = [list(r.actions) for r in worker.play_games(3)]
    first = moves[AVAILABLE[0]]
    for backend, played in moves.items():
        assert played == first, backend


def test_auto_chooses_a_measured_backend_and_remembers_it():
    first = choose_backend(NET, batch=8, seconds=0.02, rounds=1)
    assert first.backend in AVAILABLE and not first.from_cache
    assert set(first.evals_per_second) == set(AVAILABLE)
    assert first.bound_evals_per_second == max(first.evals_per_second.values())
    assert cache_path().exists()
    again = choose_backend(NET, batch=8, seconds=0.02, rounds=1)
    assert again.from_cache and again.backend == first.backend
    planes, _ = real_positions(4)
    assert np.abs(again.compiled(planes)[1] - torch_float32(planes)[1]).max() < 0.05


def test_a_damaged_cache_file_is_ignored():
    path = cache_path()
    path.parent.mkdir(parents=True)
    path.write_text("{not json" + "x" * 100)
    choice = choose_backend(NET, batch=4, seconds=0.01, rounds=1)
    assert choice.backend in AVAILABLE and not choice.from_cache
    path.write_bytes(b"[" * (2 << 20))  # oversized: not read at all
    assert not choose_backend(NET, batch=4, seconds=0.01, rounds=1).from_cache


@pytest.mark.parametrize("backend", AVAILABLE)
def test_a_new_snapshot_is_compiled_in_the_background_and_swapped_between_calls(backend):
    ev = NetworkEvaluator(NET, game=GO, backend=backend, precision="float32")
    planes, legal = real_positions(6)
    before = ev.forward_planes(planes, legal)
    newer = build_network(GO, NET.config, seed=99)
    assert ev.prepare(newer, version=2)
    # until the swap the old weights answer
    assert np.allclose(ev.forward_planes(planes, legal)[1], before[1], atol=1e-6)
    assert ev.swap_if_ready(wait=True) == 2
    with torch.inference_mode():
        expected = newer(torch.from_numpy(planes))[1].numpy()
    assert np.abs(ev.forward_planes(planes, legal)[1] - expected).max() < 1e-4
    assert ev.swaps.swaps_total == 1 and ev.swaps.blocking_swaps_total == 0
    assert ev.describe()["snapshot_swap_seconds_last"] > 0
    assert ev.swap_if_ready() is None


def test_weights_that_do_not_fit_are_refused_and_the_previous_ones_kept():
    ev = NetworkEvaluator(NET, game=GO, backend="torch", precision="float32")
    planes, legal = real_positions(3)
    before = ev.forward_planes(planes, legal)[1]
    wrong = build_network(GO, NetworkConfig.tiny(), seed=1)
    assert not ev.prepare(wrong, version=5)
    assert "do not fit" in ev.swaps.refused[5]
    assert ev.swap_if_ready(wait=True) is None
    assert np.allclose(ev.forward_planes(planes, legal)[1], before)


def test_weights_changed_in_place_are_noticed():
    net = build_network(GO, NetworkConfig.tiny(), seed=1)
    ev = NetworkEvaluator(net, game=GO, backend=AVAILABLE[-1], precision="float32")
    planes, legal = real_positions(3)
    before = ev.forward_planes(planes, legal)[1]
    net.load_state_dict(build_network(GO, NetworkConfig.tiny(), seed=2).state_dict())
    after = ev.forward_planes(planes, legal)[1]
    assert not np.allclose(before, after)
    assert ev.swaps.blocking_swaps_total == 1


def test_a_backend_that_does_not_import_is_named_with_its_install_line(tmp_path):
    """The same interpreter with openvino made unimportable (a real import failure)."""
    script = textwrap.dedent("""
        import sys
        class Block:
            def find_spec(self, name, path=None, target=None):
                if name == "openvino" or name.startswith("openvino."):
                    raise ImportError("openvino is blocked for this test")
        sys.meta_path.insert(0, Block())
        from selfplay.games.registry import make_game
        from selfplay.network import build_network, NetworkConfig
        from selfplay.evaluators import NetworkEvaluator
        from selfplay.errors import ConfigError
        g = make_game("tictactoe")
        net = build_network(g, NetworkConfig.tiny())
        try:
            NetworkEvaluator(net, game=g, backend="openvino")
        except ConfigError as exc:
            print("REFUSED:", exc)
        lines = []
        ev = NetworkEvaluator(net, game=g, backend="auto", batch_hint=4, say=lines.append)
        print("AUTO:", ev.backend)
        print("NOTICES:", lines)
    """)
    env = {"PLYFOUNDRY_CACHE_DIR": str(tmp_path), "PATH": "/usr/bin:/bin"}
    import os
    env["PYTHONPATH"] = os.pathsep.join(p for p in sys.path if p)
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env, timeout=120)
    assert out.returncode == 0, out.stderr
    assert "REFUSED: inference backend 'openvino' is not usable here" in out.stdout
    assert "pip install openvino" in out.stdout
    auto = [l for l in out.stdout.splitlines() if l.startswith("AUTO:")][0]
    assert "openvino" not in auto
    assert "inference backend openvino not used" in out.stdout


def test_unknown_backend_and_precision_are_refused():
    with pytest.raises(ConfigError, match="inference backend 'tensorflow'"):
        NetworkEvaluator(NET, backend="tensorflow")
    with pytest.raises(ConfigError, match="precision"):
        NetworkEvaluator(NET, precision="float8")


# ---- selfplay snapshot export ------------------------------------------------------------------

def _go_run(tmp_path):
    from selfplay.config import dump_config, with_overrides, load_preset
    from selfplay.rundir import RunDir
    from selfplay.snapshots import SnapshotStore

    run = tmp_path / "run"
    RunDir.create(run)
    cfg = with_overrides(load_preset("go9"), {"game.options": {"size": 5}, "network.blocks": 1,
                                              "network.channels": 16, "network.value_hidden": 16})
    (run / "run.toml").write_text(dump_config(cfg))
    game = make_game("go", size=5)
    store = SnapshotStore(RunDir.open(run))
    nets = [build_network(game, cfg.network, seed=s) for s in (1, 2)]
    for net in nets:
        store.publish(net)
    return run, game, nets


def test_snapshot_export_writes_a_model_onnx_runtime_runs(tmp_path, capsys):
    """Reference: ONNX Runtime on the written file; torch float32 on the snapshot's weights."""
    ort = pytest.importorskip("onnxruntime")
    from selfplay.cli import main

    run, game, nets = _go_run(tmp_path)
    out = tmp_path / "v1.onnx"
    assert main(["snapshot", "export", str(run), "--version", "1", "--out", str(out)]) == 0
    assert "snapshot 1" in capsys.readouterr().out
    meta = read_model_metadata(out.read_bytes())
    assert meta["plyfoundry.snapshot_version"] == "1" and meta["plyfoundry.game"] == "go"
    planes = np.random.default_rng(0).random((5, *game.input_shape), dtype=np.float32).round()
    logits, values = ort.InferenceSession(str(out), providers=["CPUExecutionProvider"]).run(None, {"planes": planes})
    with torch.inference_mode():
        ref_logits, ref_values = nets[0](torch.from_numpy(planes))
    assert np.abs(logits - ref_logits.numpy()).max() < 1e-4 and np.abs(values - ref_values.numpy()).max() < 1e-4
    latest = tmp_path / "latest.onnx"
    assert main(["snapshot", "export", str(run), "--out", str(latest)]) == 0
    assert read_model_metadata(latest.read_bytes())["plyfoundry.snapshot_version"] == "2"


def test_snapshot_export_refuses_bad_requests(tmp_path, capsys):
    from selfplay.cli import main

    run, _, _ = _go_run(tmp_path)
    out = tmp_path / "x.onnx"
    assert main(["snapshot", "export", str(run), "--version", "9", "--out", str(out)]) == 2
    assert "no snapshot version 9 (it has 1..2" in capsys.readouterr().err
    assert main(["snapshot", "export", str(run), "--version", "first", "--out", str(out)]) == 2
    assert "'first' is not a snapshot number" in capsys.readouterr().err
    assert main(["snapshot", "export", str(tmp_path / "nowhere"), "--out", str(out)]) == 2
    assert "does not exist" in capsys.readouterr().err
    out.write_text("keep me")
    assert main(["snapshot", "export", str(run), "--out", str(out)]) == 2
    assert "--overwrite" in capsys.readouterr().err and out.read_text() == "keep me"
    assert not out.with_name(".x.onnx.tmp").exists()


@pytest.mark.skipif("openvino" not in AVAILABLE, reason="openvino is not installed")
def test_signals_are_handled_after_an_openvino_compile():
    """OpenVINO leaves the compiling thread a minimal alternate signal stack; a Python signal
    handler must still run there (a SIGCHLD handler killed the test process before the fix)."""
    import signal

    from selfplay.inference.altstack import ALTSTACK_BYTES, current_altstack

    compiled = build_backend("openvino", NET, precision="bfloat16")
    compiled(real_positions(4)[0])
    now = current_altstack()
    assert now is not None and (now[0] & 2 or now[1] >= ALTSTACK_BYTES)
    got = []
    previous = signal.signal(signal.SIGUSR1, lambda *a: got.append(1))
    try:
        for _ in range(5):
            signal.raise_signal(signal.SIGUSR1)
            compiled(real_positions(2)[0])
    finally:
        signal.signal(signal.SIGUSR1, previous)
    assert got == [1] * 5


@pytest.mark.skipif("openvino" not in AVAILABLE, reason="openvino is not installed")
def test_openvino_is_imported_without_its_network_usage_reports():
    """Importing openvino would send a usage event over the network (its conversion tools'
    reporting, on unless a consent file says no); a run sends nothing beyond its machines."""
    script = textwrap.dedent("""
        import sys
        from selfplay.inference import backend_available, build_backend
        from selfplay.games.registry import make_game
        from selfplay.network import NetworkConfig, build_network
        assert backend_available("openvino") is None
        g = make_game("tictactoe")
        build_backend("openvino", build_network(g, NetworkConfig.tiny()), 1, "float32")
        from openvino.tools.ovc import telemetry_utils
        print("REPORTER", sys.modules.get("openvino_telemetry"), telemetry_utils.tm.__name__)
    """)
    import os
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in sys.path if p)}
    env.pop("CI", None)  # the reporting is also off under CI=true; test without that
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env, timeout=120)
    assert out.returncode == 0, out.stderr
    assert "REPORTER None openvino.tools.ovc.telemetry_stub" in out.stdout
