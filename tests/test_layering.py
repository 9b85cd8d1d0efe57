"""The layering is enforced, not just intended: `selfplay` never imports Ray. In a subprocess
whose `import ray` fails, every module of the library imports, `selfplay run --in-process`
makes a run, and the in-process run's fast tests pass."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

#: makes every later `import ray` (or ray.anything) fail as if Ray were not installed
BLOCK_RAY = r"""
import importlib.abc, sys
class _NoRay(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name == "ray" or name.startswith("ray."):
            raise ModuleNotFoundError(f"No module named {name!r} (blocked by the layering test)", name=name)
        return None
sys.meta_path.insert(0, _NoRay())
for _m in [m for m in sys.modules if m == "ray" or m.startswith("ray.")]:
    del sys.modules[_m]
"""


def _python(code: str, tmp_path: Path, timeout: float = 600) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    return subprocess.run([sys.executable, "-c", BLOCK_RAY + code], capture_output=True, text=True,
                          timeout=timeout, cwd=tmp_path, env=env)


def test_the_library_imports_without_ray(tmp_path):
    proc = _python("""
import importlib, pkgutil, selfplay
names = [m.name for m in pkgutil.walk_packages(selfplay.__path__, "selfplay.")]
for name in names:
    importlib.import_module(name)
assert "ray" not in sys.modules
try:
    import ray
except ModuleNotFoundError:
    print("blocked", len(names))
""", tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert proc.stdout.startswith("blocked") and int(proc.stdout.split()[1]) > 50


def test_selfplay_run_in_process_without_ray(tmp_path):
    sys.path.insert(0, str(ROOT / "tests"))
    from cluster_support import tiny_config
    from selfplay.config import dump_config

    (tmp_path / "tiny.toml").write_text(dump_config(tiny_config(run__workers=1)))
    proc = _python(f"""
from selfplay.cli import main
code = main(["run", "--config", "tiny.toml", "--out", "run", "--games", "10", "--in-process"])
assert "ray" not in sys.modules
sys.exit(code)
""", tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "stopped: games reached" in proc.stderr
    # without --in-process the command says how to go on without Ray
    proc = _python("""
from selfplay.cli import main
sys.exit(main(["run", "--config", "tiny.toml", "--out", "run2", "--games", "10"]))
""", tmp_path)
    assert proc.returncode == 2 and "--in-process" in proc.stderr
    assert not (tmp_path / "run2").exists()  # nothing left behind


@pytest.mark.slow
def test_fast_in_process_tests_pass_without_ray(tmp_path):
    proc = _python(f"""
import pytest
sys.exit(pytest.main(["-q", "-m", "not slow", "-p", "no:cacheprovider", "--rootdir", {str(ROOT)!r},
                      {str(ROOT / "tests" / "test_loop_learns.py")!r},
                      {str(ROOT / "tests" / "test_cluster_launcher.py")!r},
                      {str(ROOT / "tests" / "test_metrics_schema.py")!r}]))
""", tmp_path, timeout=900)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-2000:]
