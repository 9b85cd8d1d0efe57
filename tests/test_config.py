"""The run configuration: presets, full TOML dumps with comments, and clear errors for bad input."""

from __future__ import annotations

import tomllib

import pytest
from pydantic import BaseModel

from selfplay.cli import main
from selfplay.config import (
    RunConfig,
    config_from_dict,
    config_from_toml,
    dump_config,
    identity_differences,
    load_config,
    load_preset,
    preset_names,
    with_overrides,
)
from selfplay.errors import ConfigError


def _field_paths(model: BaseModel, prefix: str = "") -> list[str]:
    out = []
    for name in type(model).model_fields:
        value = getattr(model, name)
        if isinstance(value, BaseModel):
            out.extend(_field_paths(value, f"{prefix}{name}."))
        else:
            out.append(prefix + name)
    return out


def test_shipped_presets():
    assert {"tictactoe", "fourinrow", "go9"} <= set(preset_names())
    assert load_preset("tictactoe").game.name == "mnk"
    assert load_preset("fourinrow").game.name == "fourinrow"
    go = load_preset("go9")
    assert go.game.name == "go" and go.game.options["size"] == 9
    # the cluster preset uses the reference 6 x 64 tower (DESIGN.md "Speed")
    assert (go.network.blocks, go.network.channels) == (6, 64)


@pytest.mark.parametrize("name", ["tictactoe", "fourinrow", "go9"])
def test_dump_is_complete_and_reads_back(name):
    config = load_preset(name)
    text = dump_config(config)
    # The dump is TOML v1.0.0 as Python's standard tomllib parses it (an outside parser).
    data = tomllib.loads(text)
    assert config_from_dict(data) == config
    # every field is written out, or marked unset (TOML has no null)
    lines = text.splitlines()
    for path in _field_paths(config):
        section, _, leaf = path.rpartition(".")
        assert f"[{section}]" in lines, section
        assert any(ln.startswith(f"{leaf} = ") or ln.startswith(f"# {leaf} = (unset)") for ln in lines), path
    # game options of the game's own defaults are filled in
    assert config.game.options == config_from_toml(text).game.options


def test_dump_carries_descriptions_and_defaults():
    text = dump_config(RunConfig())
    assert "# threads of each worker's forward pass (one per CPU it is given) (default 1)" in text
    assert "threads = 1" in text
    bare = dump_config(RunConfig(), comments=False)
    assert not any(line.startswith("# ") and "default" in line for line in bare.splitlines())
    assert config_from_toml(bare) == RunConfig()


def test_bad_value_names_field_value_and_reason():
    with pytest.raises(ConfigError) as err:
        config_from_toml("[worker]\ngames_in_parallel = 0\n", origin="my.toml")
    msg = str(err.value)
    assert msg.startswith("my.toml: ")
    assert "worker.games_in_parallel = 0" in msg and "greater than or equal to 1" in msg


def test_wrong_type_and_unknown_fields():
    with pytest.raises(ConfigError, match=r'run.seed = "abc".*integer'):
        config_from_toml('[run]\nseed = "abc"\n')
    with pytest.raises(ConfigError, match=r"unknown field\(s\) worker.thread\b"):
        config_from_toml("[worker]\nthread = 2\n")
    with pytest.raises(ConfigError, match=r"unknown field\(s\) gmae"):
        config_from_toml("[gmae]\nname = 'go'\n")


def test_bad_game_and_options():
    with pytest.raises(ConfigError, match=r"game.*unknown game 'chess'"):
        config_from_toml("[game]\nname = 'chess'\n")
    with pytest.raises(ConfigError, match=r"unknown option\(s\) size for game 'mnk'"):
        config_from_toml("[game]\nname = 'mnk'\noptions = { size = 5 }\n")


def test_sections_of_other_modules_are_validated_here_too():
    with pytest.raises(ConfigError, match=r"search.simulations = 0"):
        config_from_toml("[search]\nsimulations = 0\n")
    with pytest.raises(ConfigError, match=r"config: learner.learning_rate ?= ?0: .*greater than 0"):
        config_from_toml("[learner]\nlearning_rate = 0\n")


def test_a_rule_across_fields_names_the_section():
    with pytest.raises(ConfigError, match=r"^config: search: reduced_simulations=40 must not exceed simulations=20$"):
        config_from_toml("[search]\nsimulations = 20\nreduced_simulations = 40\n")


def test_not_toml_and_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="not valid TOML"):
        config_from_toml("[run\n")
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "nope.toml")


def test_unknown_preset_lists_the_real_ones():
    with pytest.raises(ConfigError, match=r"no preset named 'chess'; presets: .*tictactoe"):
        load_preset("chess")
    with pytest.raises(ConfigError, match="not valid"):
        load_preset("../config")


def test_overrides_are_validated():
    config = with_overrides(RunConfig(), {"run.games": 7, "run.learner": False})
    assert config.run.games == 7 and config.run.learner is False
    with pytest.raises(ConfigError, match=r"run.games = -1"):
        with_overrides(RunConfig(), {"run.games": -1})


def test_identity_ignores_the_run_section():
    a = load_preset("tictactoe")
    b = with_overrides(a, {"run.games": 5, "run.workers": 1})
    assert identity_differences(a, b) == []
    c = with_overrides(a, {"search.simulations": 20})
    assert identity_differences(a, c) == ["search.simulations"]
    assert "game.name" in identity_differences(a, load_preset("fourinrow"))


def test_config_show_and_check_commands(tmp_path, capsys):
    assert main(["config", "show", "tictactoe"]) == 0
    out = capsys.readouterr().out
    assert config_from_toml(out) == load_preset("tictactoe")
    assert out.startswith("# selfplay run config from preset 'tictactoe'")

    assert main(["config", "show"]) == 0
    assert "fourinrow" in capsys.readouterr().out

    path = tmp_path / "c.toml"
    assert main(["config", "show", "fourinrow", "--out", str(path)]) == 0
    capsys.readouterr()
    assert main(["config", "check", str(path)]) == 0
    assert "ok" in capsys.readouterr().out
    # --out replaces a file only with --overwrite (the one overwrite rule)
    path.write_text("# mine\n")
    assert main(["config", "show", "fourinrow", "--out", str(path)]) == 2
    assert "exists; pass --overwrite" in capsys.readouterr().err
    assert path.read_text() == "# mine\n"
    assert main(["config", "show", "fourinrow", "--out", str(path), "--overwrite"]) == 0
    assert "fourinrow" in path.read_text()

    bad = tmp_path / "bad.toml"
    bad.write_text("[run]\nminutes = -3\n")
    assert main(["config", "check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "run.minutes = -3" in err and "greater than or equal to 0" in err

    assert main(["config", "show", "nosuch"]) == 2
    assert "no preset named 'nosuch'" in capsys.readouterr().err
