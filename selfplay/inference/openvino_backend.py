"""OpenVINO: the ONNX export compiled for this CPU.

Settings (OpenVINO's documented CPU properties): ``INFERENCE_NUM_THREADS`` = the worker's threads,
``INFERENCE_PRECISION_HINT`` = bf16 on CPUs with bfloat16 matrix units (else f32),
``PERFORMANCE_HINT`` = LATENCY (one request at a time, as the search issues them), and
``ENABLE_CPU_PINNING`` off: with several worker processes on one machine, pinned threads of
different processes were measured to land on the same cores (docs/inference.md).

Steady batch. OpenVINO prepares its kernels for the input shape of each call anew whenever the
shape differs from the previous call's: a search whose batches vary between 60 and 64 leaves
ran about 7 % slower per evaluation than at a constant 64. Given the batch size the caller will
mostly send (``batch``), a second, fixed-shape copy of the network is compiled for it, and
every call of at least :data:`STEADY_FILL` of that size is padded to it (the padding rows are
computed and dropped; rows are independent). Other calls use the dynamic-shape model.
"""

from __future__ import annotations

import numpy as np

from selfplay.inference.altstack import ensure_roomy_altstack
from selfplay.inference.base import import_openvino
from selfplay.inference.onnx_export import export_onnx_bytes
from selfplay.network import PolicyValueNet

#: smallest share of the steady batch a call may fill and still be padded to it (below this the
#: padding would cost more than a shape change)
STEADY_FILL = 0.9


class OpenVinoCompiled:
    """One network version compiled by OpenVINO; one infer request reused for every call, and
    with ``batch`` a fixed-shape copy for calls of about that size (see the module docstring)."""

    backend = "openvino"

    def __init__(self, net: PolicyValueNet, threads: int, precision: str, pin_threads: bool = False,
                 batch: int | None = None) -> None:
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
        self.steady_batch = int(batch) if batch is not None and batch > 1 else 0
        if self.steady_batch:
            fixed = model.clone()  # the same graph, given a fixed input shape
            shape = list(fixed.inputs[0].get_partial_shape().get_min_shape())
            fixed.reshape([self.steady_batch, *shape[1:]])
            self.steady_request = core.compile_model(fixed, "CPU", config).create_infer_request()
            self._padded = np.zeros((self.steady_batch, *shape[1:]), dtype=np.float32)
            self._steady_from = max(1, int(np.ceil(STEADY_FILL * self.steady_batch)))

    def __call__(self, planes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        x = np.ascontiguousarray(planes, dtype=np.float32)
        n = x.shape[0]
        request = self.request
        if self.steady_batch and self._steady_from <= n <= self.steady_batch:
            request = self.steady_request
            if n < self.steady_batch:  # rows past n keep earlier calls' planes: computed, dropped
                self._padded[:n] = x
                x = self._padded
        request.set_input_tensor(self._tensor(x, shared_memory=True))
        request.infer()
        # the request reuses its output buffers: copy before the next call
        logits = np.array(request.get_output_tensor(0).data[:n], dtype=np.float32)
        values = np.array(request.get_output_tensor(1).data[:n], dtype=np.float32).reshape(-1)
        return logits, values


def compile(net: PolicyValueNet, threads: int, precision: str,  # noqa: A001
            batch: int | None = None) -> OpenVinoCompiled:
    return OpenVinoCompiled(net, threads, precision, batch=batch)
