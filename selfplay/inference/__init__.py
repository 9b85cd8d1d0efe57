"""Inference backends: the policy-value network's forward pass on a CPU runtime.

The search asks for priors and values of a batch of leaves; the forward pass is most of a
self-play worker's time, so which runtime runs it decides positions per core. Three backends run
the same folded network (:func:`selfplay.network.fold_for_inference`):

- ``torch``: PyTorch's own CPU path (float32, or bfloat16 on CPUs with matrix units);
- ``openvino``: the network exported to ONNX and compiled by OpenVINO for this CPU (bfloat16 on
  matrix units, float32 elsewhere);
- ``onnxruntime``: the same ONNX model on ONNX Runtime's CPU execution provider (float32).

:func:`build_backend` makes one by name; :func:`selfplay.inference.choose.choose_backend` picks
the fastest available one for a network, batch size and CPU (``auto``).
"""

from __future__ import annotations

from selfplay.inference.base import (
    BACKEND_NAMES,
    BackendUnavailable,
    CompiledNetwork,
    InferenceBackend,
    backend_available,
    build_backend,
    resolve_precision,
)

__all__ = [
    "BACKEND_NAMES", "BackendUnavailable", "CompiledNetwork", "InferenceBackend", "backend_available",
    "build_backend", "resolve_precision",
]
