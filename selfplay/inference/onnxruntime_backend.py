"""ONNX Runtime's CPU execution provider running the ONNX export (float32).

Session options: ``intra_op_num_threads`` = the worker's threads, one inter-op thread, sequential
execution, full graph optimisation.
"""

from __future__ import annotations

import numpy as np

from selfplay.inference.onnx_export import INPUT_NAME, export_onnx_bytes
from selfplay.network import PolicyValueNet


class OnnxRuntimeCompiled:
    """One network version in an ONNX Runtime inference session."""

    backend = "onnxruntime"

    def __init__(self, net: PolicyValueNet, threads: int, precision: str) -> None:
        import onnxruntime as ort

        self.precision = precision  # float32 (resolve_precision refuses anything else)
        options = ort.SessionOptions()
        options.intra_op_num_threads = int(threads)
        options.inter_op_num_threads = 1
        options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        options.log_severity_level = 3  # errors only: a healthy start prints nothing
        self.session = ort.InferenceSession(export_onnx_bytes(net), options, providers=["CPUExecutionProvider"])

    def __call__(self, planes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        logits, values = self.session.run(None, {INPUT_NAME: np.ascontiguousarray(planes, dtype=np.float32)})
        return np.asarray(logits, dtype=np.float32), np.asarray(values, dtype=np.float32).reshape(-1)


def compile(net: PolicyValueNet, threads: int, precision: str,  # noqa: A001
            batch: int | None = None) -> OnnxRuntimeCompiled:
    return OnnxRuntimeCompiled(net, threads, precision)
