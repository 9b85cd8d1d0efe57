"""OpenVINO: the ONNX export compiled for this CPU.

Settings (OpenVINO's documented CPU properties): ``INFERENCE_NUM_THREADS`` = the worker's threads,
``INFERENCE_PRECISION_HINT`` = bf16 on CPUs with bfloat16 matrix units (else f32),
``PERFORMANCE_HINT`` = LATENCY (one request at a time, as the search issues them), and
``ENABLE_CPU_PINNING`` off: with several worker processes on one machine, pinned threads of
different processes were measured to land on the same cores (docs/inference.md).
"""

from __future__ import annotations

import numpy as np

from selfplay.inference.altstack import ensure_roomy_altstack
from selfplay.inference.base import import_openvino
from selfplay.inference.onnx_export import export_onnx_bytes
from selfplay.network import PolicyValueNet


class OpenVinoCompiled:
    """One network version compiled by OpenVINO; one infer request reused for every call."""

    backend = "openvino"

    def __init__(self, net: PolicyValueNet, threads: int, precision: str, pin_threads: bool = False) -> None:
        ov = import_openvino()

        self.precision = precision
        core = ov.Core()
        model = core.read_model(model=export_onnx_bytes(net))
        config = {
            "INFERENCE_NUM_THREADS": int(threads),
            "INFERENCE_PRECISION_HINT": "bf16" if precision == "bfloat16" else "f32",
            "PERFORMANCE_HINT": "LATENCY",
            "ENABLE_CPU_PINNING": bool(pin_threads),
        }
        self.compiled = core.compile_model(model, "CPU", config)
        ensure_roomy_altstack()  # see selfplay.inference.altstack
        self.request = self.compiled.create_infer_request()
        self._tensor = ov.Tensor  # type: ignore[attr-defined]

    def __call__(self, planes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        x = np.ascontiguousarray(planes, dtype=np.float32)
        self.request.set_input_tensor(self._tensor(x, shared_memory=True))
        self.request.infer()
        # the request reuses its output buffers: copy before the next call
        logits = np.array(self.request.get_output_tensor(0).data, dtype=np.float32)
        values = np.array(self.request.get_output_tensor(1).data, dtype=np.float32).reshape(-1)
        return logits, values


def compile(net: PolicyValueNet, threads: int, precision: str) -> OpenVinoCompiled:  # noqa: A001
    return OpenVinoCompiled(net, threads, precision)
