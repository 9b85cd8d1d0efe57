"""The cluster deploy files (cluster/deploy/) turn on Ray's token authentication and name only
options that Ray's own `ray start` offers (its --help is the reference)."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

DEPLOY = Path(__file__).resolve().parent.parent / "cluster" / "deploy"
RAY = shutil.which("ray") or str(Path(sys.executable).parent / "ray")


def _ray_start_options() -> set[str]:
    if not os.path.exists(RAY):
        pytest.skip("the `ray` command is not installed next to this Python")
    out = subprocess.run([RAY, "start", "--help"], capture_output=True, text=True, timeout=120).stdout
    return set(re.findall(r"--[a-z][a-z0-9-]*[a-z0-9]", out))


def _start_commands() -> list[str]:
    cfg = yaml.safe_load((DEPLOY / "cluster.yaml").read_text())
    return list(cfg["head_start_ray_commands"]) + list(cfg["worker_start_ray_commands"])


def test_every_ray_start_option_of_the_deploy_files_exists_in_ray():
    known = _ray_start_options()  # Ray's CLI, the outside reference
    used = set()
    for cmd in _start_commands():
        if " start " in cmd:
            used |= set(re.findall(r"--[a-z][a-z0-9-]*[a-z0-9]", cmd))
    script = (DEPLOY / "start_node.sh").read_text()
    for line in script.splitlines():
        if re.search(r"\bray start\b|port_args=|--[a-z-]+-port=", line) and not line.lstrip().startswith("#"):
            used |= set(re.findall(r"--[a-z][a-z0-9-]*[a-z0-9]", line))
    assert used, "no ray start options found"
    assert used <= known, sorted(used - known)


def test_cluster_yaml_starts_every_node_with_token_authentication_and_ships_the_token():
    cfg = yaml.safe_load((DEPLOY / "cluster.yaml").read_text())
    starts = [c for c in _start_commands() if " start " in c]
    assert len(starts) == 2 and all(c.startswith("RAY_AUTH_MODE=token ") for c in starts)
    assert cfg["file_mounts"]["~/.ray/auth_token"] == "~/.ray/auth_token"  # Ray's default token path
    head = next(c for c in starts if "--head" in c)
    assert "--dashboard-host=127.0.0.1" in head


def test_start_node_refuses_a_worker_without_a_token(tmp_path):
    env = {k: v for k, v in os.environ.items() if not k.startswith("RAY_AUTH_TOKEN")}
    env["HOME"] = str(tmp_path)  # no ~/.ray/auth_token here
    res = subprocess.run(["bash", str(DEPLOY / "start_node.sh"), "worker", "10.0.0.1"], capture_output=True,
                         text=True, env=env, timeout=60)
    assert res.returncode == 2
    assert "no Ray token here" in res.stderr and "auth_token" in res.stderr
