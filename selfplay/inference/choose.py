"""``auto``: pick the fastest inference backend for this network, batch size and CPU.

A short calibration compiles the network on every backend that imports here and times its
forward pass at the batch size the worker will feed it (alternating rounds, median per backend),
then keeps the fastest. The choice is remembered per machine in a small JSON cache
(``$PLYFOUNDRY_CACHE_DIR`` or ``~/.cache/plyfoundry/inference-choices.json``), keyed by the CPU
model, the network's shape, the batch size, the threads, the precision asked for and the
backends' versions, so a worker that starts later pays only for its one compile.
"""

from __future__ import annotations

import json
import os
import platform
import statistics
import time
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Callable

import numpy as np

from selfplay.inference.base import BACKEND_NAMES, CompiledNetwork, backend_available, build_backend

if TYPE_CHECKING:
    from selfplay.network import PolicyValueNet

#: the cache is a few hundred bytes per entry; a larger file is not ours and is ignored
MAX_CACHE_BYTES = 1 << 20
#: seconds each backend is timed per round, and rounds (alternating backends)
CALIBRATION_SECONDS = 0.25
CALIBRATION_ROUNDS = 2


@dataclass
class BackendChoice:
    """What ``auto`` chose and why.

    backend, precision: the chosen backend and the precision it runs at; compiled: the chosen
    backend's compiled network (ready to use); evals_per_second: each calibrated backend's
    measured forward speed at ``batch`` (evaluations/s, empty when the cache answered);
    from_cache: True when the per-machine cache made the choice; notices: one line per
    backend that could not be used (not installed, failed to compile)."""

    backend: str
    precision: str
    batch: int
    compiled: CompiledNetwork
    evals_per_second: dict[str, float] = field(default_factory=dict)
    from_cache: bool = False
    notices: list[str] = field(default_factory=list)

    @property
    def bound_evals_per_second(self) -> float | None:
        """The chosen backend's measured evaluations/s at ``batch`` (None when cached)."""
        return self.evals_per_second.get(self.backend)

    def describe(self) -> str:
        """One line for the run's log."""
        how = "remembered for this machine" if self.from_cache else (
            "calibrated: " + ", ".join(f"{k} {v:,.0f}/s" for k, v in sorted(
                self.evals_per_second.items(), key=lambda kv: -kv[1])))
        return f"inference: {self.backend} ({self.precision}) at batch {self.batch} — {how}"


def cache_path() -> Path:
    root = os.environ.get("PLYFOUNDRY_CACHE_DIR")
    base = Path(root) if root else Path.home() / ".cache" / "plyfoundry"
    return base / "inference-choices.json"


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _version(package: str) -> str:
    try:
        return metadata.version(package)
    except metadata.PackageNotFoundError:
        return "-"


def cache_key(net: PolicyValueNet, batch: int, threads: int, precision: str) -> str:
    shape = {"input": list(net.input_shape), "actions": net.num_actions, **net.config.model_dump()}
    versions = {p: _version(p) for p in ("torch", "openvino", "onnxruntime")}
    return json.dumps({"cpu": _cpu_model(), "cores": os.cpu_count(), "net": shape, "batch": int(batch),
                       "threads": int(threads), "precision": precision, "versions": versions}, sort_keys=True)


def _read_cache(path: Path) -> dict[str, dict[str, str]]:
    """The cache's entries; an unreadable, oversized or malformed file counts as empty."""
    try:
        if path.stat().st_size > MAX_CACHE_BYTES:
            return {}
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(data, dict):
        return {}
    return {k: v for k, v in data.items() if isinstance(v, dict) and v.get("backend") in BACKEND_NAMES}


def _write_cache(path: Path, key: str, entry: dict[str, str]) -> None:
    """Add one entry (temp file + rename; a cache that cannot be written is only a lost shortcut)."""
    try:
        entries = _read_cache(path)
        entries[key] = entry
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
        tmp.write_text(json.dumps(entries, indent=1, sort_keys=True), encoding="utf-8")
        os.replace(tmp, path)
    except OSError:
        pass


def time_forward(compiled: CompiledNetwork, planes: np.ndarray, seconds: float) -> float:
    """Evaluations/s of ``compiled`` on ``planes`` over about ``seconds`` (after one warm-up call)."""
    compiled(planes)
    n = 0
    t0 = time.perf_counter()
    while True:
        compiled(planes)
        n += planes.shape[0]
        elapsed = time.perf_counter() - t0
        if elapsed >= seconds:
            return n / elapsed


def probe_planes(net: PolicyValueNet, batch: int, seed: int = 0) -> np.ndarray:
    """float32 (batch, C, H, W) random 0/1 planes: input for timing a network."""
    return np.random.default_rng(seed).random((batch, *net.input_shape), dtype=np.float32).round()


def choose_backend(net: PolicyValueNet, batch: int, threads: int = 1, precision: str = "auto",
                   candidates: tuple[str, ...] = BACKEND_NAMES, use_cache: bool = True,
                   seconds: float = CALIBRATION_SECONDS, rounds: int = CALIBRATION_ROUNDS,
                   say: Callable[[str], None] | None = None) -> BackendChoice:
    """Compile ``net`` on each usable backend among ``candidates``, time each at ``batch`` and
    return the fastest (or the cached choice for this machine). torch is always a candidate of
    last resort, so a choice is always made."""
    batch = max(1, int(batch))
    tell = say or (lambda line: None)
    notices: list[str] = []
    usable = []
    for name in candidates:
        problem = backend_available(name)
        if problem:
            notices.append(f"inference backend {name} not used: {problem}")
        else:
            usable.append(name)
    if "torch" not in usable:
        usable.append("torch")
    path = cache_path()
    key = cache_key(net, batch, threads, precision)
    if use_cache:
        entry = _read_cache(path).get(key)
        if entry and entry["backend"] in usable:
            try:
                compiled = build_backend(entry["backend"], net, threads, precision, batch)
                choice = BackendChoice(entry["backend"], compiled.precision, batch, compiled,
                                       from_cache=True, notices=notices)
                for line in notices:
                    tell(line)
                return choice
            except Exception as exc:  # noqa: BLE001 - fall through to a fresh calibration
                notices.append(f"cached inference backend {entry['backend']} failed to compile: {exc}")
    compiled_by: dict[str, CompiledNetwork] = {}
    for name in usable:
        try:
            compiled_by[name] = build_backend(name, net, threads, precision, batch)
        except Exception as exc:  # noqa: BLE001 - any failure of a runtime leaves the others
            notices.append(f"inference backend {name} failed to compile this network: "
                           f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}")
    planes = probe_planes(net, batch)
    samples: dict[str, list[float]] = {name: [] for name in compiled_by}
    for _ in range(max(1, rounds)):
        for name, compiled in compiled_by.items():
            samples[name].append(time_forward(compiled, planes, seconds))
    speeds = {name: float(statistics.median(v)) for name, v in samples.items()}
    best = max(speeds, key=speeds.__getitem__)
    if use_cache:
        _write_cache(path, key, {"backend": best, "evals_per_second": f"{speeds[best]:.0f}",
                                 "measured_at": time.strftime("%Y-%m-%dT%H:%M:%S")})
    for line in notices:
        tell(line)
    return BackendChoice(best, compiled_by[best].precision, batch, compiled_by[best], speeds, False, notices)
