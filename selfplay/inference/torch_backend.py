"""PyTorch's CPU path: the folded network in channels-last layout under ``torch.inference_mode``."""

from __future__ import annotations

import numpy as np
import torch

from selfplay.network import PolicyValueNet, fold_for_inference, subnormals_flushed


class TorchCompiled:
    """The folded copy of one network version; float32 or bfloat16 (outputs always float32)."""

    backend = "torch"

    def __init__(self, net: PolicyValueNet, threads: int, precision: str) -> None:
        self.precision = precision
        self.dtype = torch.bfloat16 if precision == "bfloat16" else torch.float32
        torch.set_num_threads(threads)  # process-wide: workers sharing a machine keep to their share
        self.module = fold_for_inference(net, channels_last=True, dtype=self.dtype)

    def input_tensor(self, planes: np.ndarray) -> torch.Tensor:
        """float32 planes (N, C, H, W) laid out channels-last in one copy, in the net's dtype."""
        planes = np.asarray(planes, dtype=np.float32)
        x = torch.from_numpy(np.ascontiguousarray(planes.transpose(0, 2, 3, 1))).permute(0, 3, 1, 2)
        return x.to(self.dtype) if self.dtype != torch.float32 else x

    def __call__(self, planes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        with subnormals_flushed(), torch.inference_mode():  # see selfplay.network.subnormals_flushed
            logits, values = self.module(self.input_tensor(planes))
            return logits.float().numpy(), values.float().numpy()


def compile(net: PolicyValueNet, threads: int, precision: str,  # noqa: A001 - the backend verb
            batch: int | None = None) -> TorchCompiled:
    return TorchCompiled(net, threads, precision)
