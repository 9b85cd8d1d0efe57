"""Every reader answers hostile input with one clear error and bounded memory: configs, SGF,
shards, snapshots, metric lines, the `show --out` argument.

The saved corpus (tests/corpus/, see its README) holds the cases of issue 12 as regression data;
hypothesis adds random ones."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from selfplay.cli import main as cli_main
from selfplay.config import config_from_dict, config_from_toml
from selfplay.errors import ConfigError, FormatError, SnapshotError
from selfplay.games.registry import make_game
from selfplay.games.sgf import read_sgf
from selfplay.metrics import read_metrics
from selfplay.network import NetworkConfig, build_network
from selfplay.replay.shards import scan_shard
from selfplay.snapshots import output_problems, read_weights_file, tensors_from_safetensors_bytes

CORPUS = Path(__file__).parent / "corpus"


def _expected(kind: str) -> dict[str, str]:
    return json.loads((CORPUS / kind / "expected.json").read_text())


# ---- configs --------------------------------------------------------------------------------

@pytest.mark.parametrize("name", sorted(_expected("config")))
def test_config_corpus_is_refused_with_one_line(name):
    text = (CORPUS / "config" / name).read_text()
    with pytest.raises(ConfigError) as info:
        config_from_toml(text, origin=name)
    msg = str(info.value)
    assert _expected("config")[name] in msg and "\n" not in msg and name in msg


def test_config_check_command_on_the_corpus(capsys):
    for name in ("inf_c_puct.toml", "bool_simulations.toml", "empty.toml", "deep_nesting.toml"):
        assert cli_main(["config", "check", str(CORPUS / "config" / name)]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "Traceback" not in err


_SECTION_FIELDS = {
    "search": ["c_puct", "virtual_loss", "temperature", "gumbel_c_visit", "gumbel_c_scale", "simulations",
               "dirichlet_epsilon", "full_search_share"],
    "learner": ["value_loss_weight", "lr_min", "learning_rate", "batch_size"],
    "replay": ["recency_weight", "window_positions", "shard_max_age_seconds"],
    "run": ["workers", "minutes", "games", "seed"],
    "worker": ["games_in_parallel", "snapshot_poll_seconds"],
}
_values = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.booleans(),
                    st.integers(-10**20, 10**20), st.text(max_size=8))


@settings(max_examples=150, deadline=None)
@given(st.sets(st.sampled_from(sorted(_SECTION_FIELDS)), max_size=3), st.data())
def test_random_config_values_are_refused_or_finite_and_typed(sections, data):
    doc: dict = {"game": {"name": "mnk"}}
    for section in sorted(sections):
        keys = data.draw(st.lists(st.sampled_from(_SECTION_FIELDS[section]), max_size=3, unique=True))
        doc[section] = {k: data.draw(_values) for k in keys}
    try:
        cfg = config_from_dict(doc, "fuzz")
    except ConfigError as exc:
        assert "\n" not in str(exc)
        return
    for section, fields in doc.items():
        if section == "game":
            continue
        for key, given_value in fields.items():
            got = getattr(getattr(cfg, section), key)
            assert not isinstance(given_value, bool) or isinstance(got, bool), (section, key)
            if isinstance(got, float):
                assert math.isfinite(got), (section, key, got)


@settings(max_examples=200, deadline=None)
@given(st.text(alphabet="[]{}=\"'#.,\n abc123infa-+_", max_size=300))
def test_random_toml_text_never_escapes_as_another_error(text):
    try:
        config_from_toml(text, "fuzz")
    except ConfigError as exc:
        assert "\n" not in str(exc)


# ---- SGF ------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", sorted(_expected("sgf")))
def test_sgf_corpus_is_refused_with_one_line(name):
    text = (CORPUS / "sgf" / name).read_text(encoding="latin-1")
    with pytest.raises(FormatError) as info:
        read_sgf(text)
    assert _expected("sgf")[name] in str(info.value) and "\n" not in str(info.value)


_PASSES = """
import resource, sys
from selfplay.errors import FormatError
from selfplay.games.sgf import read_sgf
text = "(;GM[1]FF[4]SZ[9]" + ";B[];W[]" * (8 * 1024 * 1024 // 8) + ")"
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
try:
    read_sgf(text)
except FormatError as exc:
    print(exc, file=sys.stderr)
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before)  # KiB above the high-water mark
"""


def test_an_8_mb_sgf_of_passes_is_refused_in_bounded_memory():
    """Issue 12: 8 MB of passes peaked at 1.1 GB. The main line is bounded while parsing.
    Measured in a fresh process: the growth of its peak resident size while reading."""
    import os
    import subprocess
    import sys
    repo = str(Path(__file__).resolve().parent.parent)
    out = subprocess.run([sys.executable, "-c", _PASSES], capture_output=True, text=True, timeout=600,
                         env={**os.environ, "PYTHONPATH": repo})
    assert out.returncode == 0, out.stderr
    assert "more than 100000 nodes" in out.stderr
    grown_kib = int(out.stdout.strip())
    assert grown_kib < 200 * 1024, f"peak grew by {grown_kib / 1024:.0f} MiB"


def test_an_sgf_with_a_long_comment_still_reads():
    text = "(;GM[1]FF[4]SZ[9]C[" + "a\\]b" * 200_000 + "];B[ee];W[cc])"
    game = read_sgf(text)
    assert game.moves == [40, 20] and game.properties["C"][0].startswith("a]b")


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet="()[];\\:BWSZKMHAPLEabcdefghist0123456789 \n", max_size=200))
def test_random_sgf_text_raises_only_format_errors(text):
    try:
        read_sgf(text)
    except FormatError as exc:
        assert "\n" not in str(exc)


# ---- shards ---------------------------------------------------------------------------------

def test_shard_corpus_keeps_every_sound_game():
    flipped = scan_shard(CORPUS / "shards" / "flipped_frame_3.plyrec")
    assert [r.game_id for _, r in flipped.records] == ["c0", "c1", "c2", "c4", "c5"]
    bad_len = scan_shard(CORPUS / "shards" / "bad_length_frame_2.plyrec")
    assert [r.game_id for _, r in bad_len.records] == ["c0", "c1", "c3", "c4", "c5"]
    assert "frame limit" in bad_len.damaged[0].reason
    torn = scan_shard(CORPUS / "shards" / "torn_tail.plyrec")
    assert [r.game_id for _, r in torn.records] == ["c0", "c1", "c2", "c3", "c4"] and torn.torn_tail_only
    four = scan_shard(CORPUS / "shards" / "fourinrow.plyrec")
    assert four.ok and {r.game for _, r in four.records} == {"fourinrow"}


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(max_size=2048))
def test_random_bytes_after_a_sound_header_never_raise(tmp_path_factory, tail):
    from selfplay.replay import codec
    for flags in (0, codec.FLAG_DEFLATE):
        path = tmp_path_factory.mktemp("r") / "x.plyrec"
        path.write_bytes(codec.encode_header(flags) + tail)
        scan = scan_shard(path)
        assert scan.records == [] or all(r.game_id for _, r in scan.records)
        assert sum(d.bytes for d in scan.damaged) <= len(tail)


# ---- snapshots ------------------------------------------------------------------------------

def test_snapshot_corpus_is_refused():
    ttt = make_game("tictactoe")
    net = build_network(ttt, NetworkConfig.tiny(), seed=1)
    huge = read_weights_file(CORPUS / "snapshots" / "tiny_ttt_3e38.safetensors")
    net.load_state_dict(huge)
    assert "overflow" in output_problems(net)
    from selfplay.snapshots import dtype_mismatches
    int8 = read_weights_file(CORPUS / "snapshots" / "tiny_ttt_int8_policy.safetensors")
    ref = {k: v.dtype for k, v in build_network(ttt, NetworkConfig.tiny()).state_dict().items()}
    assert dtype_mismatches(int8, ref) == ["tensor policy_fc.weight has dtype int8, the network's is float32"]


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=512))
def test_random_bytes_are_never_loaded_as_weights(data):
    try:
        tensors_from_safetensors_bytes(data, "fuzz")
    except SnapshotError as exc:
        assert "\n" not in str(exc)


# ---- metric lines and the command line ------------------------------------------------------

@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.binary(max_size=80), max_size=20))
def test_random_metric_lines_never_raise(tmp_path_factory, lines):
    path = tmp_path_factory.mktemp("m") / "metrics.jsonl"
    path.write_bytes(b"\n".join(lines))
    assert all(isinstance(row, dict) for row in read_metrics(path))


def test_show_out_must_be_a_png(tmp_path, capsys):
    assert cli_main(["show", str(tmp_path), "--game", "g", "--move", "0", "--out", "x.txt"]) == 2
    err = capsys.readouterr().err
    assert ".png" in err and err.count("\n") == 1 and "Traceback" not in err
