"""The backend interface and the registry of backends.

A backend *compiles* a :class:`selfplay.network.PolicyValueNet` into a :class:`CompiledNetwork`:
a callable on float32 planes ``(N, C, H, W)`` that returns raw policy logits float32 ``(N, A)``
and values float32 ``(N,)`` in [-1, 1] from the side to move's view. A compiled network is
immutable: new weights (a new snapshot) mean a new compile, which the evaluator does off the
hot path (:class:`selfplay.evaluators.NetworkEvaluator`).
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Protocol

import numpy as np

from selfplay.errors import ConfigError

if TYPE_CHECKING:
    from selfplay.network import PolicyValueNet

#: backend name -> (module, the Python package it needs, the pip line that installs it)
_BACKENDS: dict[str, tuple[str, str, str]] = {
    "torch": ("selfplay.inference.torch_backend", "torch", "pip install 'torch>=2.4,<2.14'"),
    "openvino": ("selfplay.inference.openvino_backend", "openvino", "pip install openvino onnx"),
    "onnxruntime": ("selfplay.inference.onnxruntime_backend", "onnxruntime", "pip install onnxruntime onnx"),
}
#: every backend this build knows, in the order ``auto`` tries them
BACKEND_NAMES: tuple[str, ...] = tuple(_BACKENDS)
#: settings of ``[worker] inference``
INFERENCE_CHOICES: tuple[str, ...] = ("auto", *BACKEND_NAMES)
#: forward-pass precisions; "auto" = bfloat16 where the CPU has bfloat16 matrix units
PRECISIONS = ("auto", "float32", "bfloat16")


class BackendUnavailable(ConfigError):
    """A backend was asked for by name but its package does not import here."""


class CompiledNetwork(Protocol):
    """One network's weights compiled for one backend, thread count and precision."""

    backend: str
    precision: str

    def __call__(self, planes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """float32 planes (N, C, H, W) -> (logits float32 (N, A), values float32 (N,))."""


class InferenceBackend(Protocol):
    """What a backend module provides: ``compile(net, threads, precision, batch) ->
    CompiledNetwork``; ``batch`` (None: not known) is the batch size the caller will mostly send,
    which a backend may prepare for (OpenVINO compiles a fixed-shape copy for it)."""

    def compile(self, net: PolicyValueNet, threads: int, precision: str,
                batch: int | None = None) -> CompiledNetwork: ...


def import_openvino() -> object:
    """``import openvino`` with its usage reporting switched off.

    Importing openvino imports its model-conversion tools, which send a usage event over the
    network unless a consent file in the user's home says no. A run must send nothing beyond
    its own machines, so the optional reporting module is marked absent in this process before
    openvino is imported; openvino then uses its built-in no-op stand-in."""
    import sys

    if "openvino" not in sys.modules:
        sys.modules.setdefault("openvino_telemetry", None)  # type: ignore[arg-type]
        sys.modules.setdefault("openvino_telemetry.backend", None)  # type: ignore[arg-type]
    return importlib.import_module("openvino")


def _import_package(name: str) -> str | None:
    """None if the backend's package imports, else the reason it does not (one line)."""
    package = _BACKENDS[name][1]
    try:
        if package == "openvino":
            import_openvino()
        else:
            importlib.import_module(package)
    except Exception as exc:  # noqa: BLE001 - a broken install fails in many ways; report it
        return f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}".strip()
    if name != "torch":
        try:
            importlib.import_module("onnx")  # the ONNX export needs it
        except Exception as exc:  # noqa: BLE001
            return f"the ONNX export needs the onnx package ({type(exc).__name__})"
    return None


def backend_available(name: str) -> str | None:
    """None if backend ``name`` can run here, else why not (one line)."""
    if name not in _BACKENDS:
        return f"unknown inference backend {name!r} (one of {', '.join(BACKEND_NAMES)})"
    return _import_package(name)


def _module(name: str) -> InferenceBackend:
    if name not in _BACKENDS:
        raise ConfigError(f"inference backend {name!r} is not one of {', '.join(INFERENCE_CHOICES)}")
    problem = backend_available(name)
    if problem:
        raise BackendUnavailable(
            f"inference backend {name!r} is not usable here ({problem}); install it with "
            f"`{_BACKENDS[name][2]}` or set [worker] inference = \"auto\"")
    return importlib.import_module(_BACKENDS[name][0])  # type: ignore[return-value]


def resolve_precision(backend: str, precision: str, channels: int) -> str:
    """The precision a backend runs at for a tower of ``channels``: "auto" means bfloat16 on
    CPUs with bfloat16 matrix units (AMX) and float32 elsewhere (ONNX Runtime: always float32;
    torch: float32 for towers narrower than 32 channels, where its conversions cost more than
    the matrix units save — measured here)."""
    if precision not in PRECISIONS:
        raise ConfigError(f"inference precision {precision!r} is not one of {', '.join(PRECISIONS)}")
    if backend == "onnxruntime":
        if precision == "bfloat16":
            raise ConfigError("inference backend 'onnxruntime' runs float32 only; use precision "
                              "'auto' or 'float32', or backend 'openvino' for bfloat16")
        return "float32"
    if precision != "auto":
        return precision
    from selfplay.network import cpu_has_bf16_matrix_units

    if not cpu_has_bf16_matrix_units():
        return "float32"
    if backend == "torch" and channels < 32:
        return "float32"
    return "bfloat16"


def build_backend(name: str, net: PolicyValueNet, threads: int = 1, precision: str = "auto",
                  batch: int | None = None) -> CompiledNetwork:
    """Compile ``net`` on backend ``name`` (not "auto": see :mod:`selfplay.inference.choose`);
    ``batch``: the batch size calls will mostly have, if known."""
    module = _module(name)
    return module.compile(net, threads, resolve_precision(name, precision, net.config.channels), batch)
