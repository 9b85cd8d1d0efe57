"""The network as an ONNX model (the open Open Neural Network Exchange format).

The exported graph is the folded float32 network (:func:`selfplay.network.fold_for_inference`,
the same function as the trained net in eval mode) with a dynamic batch dimension:

- input ``planes``: float32 ``(N, C, H, W)``, the game's input planes;
- output ``policy_logits``: float32 ``(N, A)``, one raw logit per action (softmax over the legal
  actions gives the prior; illegal actions must be masked by the caller);
- output ``value``: float32 ``(N,)``, in [-1, 1] from the side to move's view.

The model's metadata (``metadata_props``) says what another engine needs to use it without this
project's code: the game and its options, the input shape and the layout of the planes, the
action numbering and each action's name, the snapshot version. docs/inference.md documents it.
"""

from __future__ import annotations

import inspect
import io
import json
import warnings
from typing import Any

import torch

from selfplay.games.base import Game
from selfplay.network import PolicyValueNet, fold_for_inference

#: ONNX operator set the export targets (supported by OpenVINO 2024+ and ONNX Runtime 1.16+)
OPSET = 17
INPUT_NAME = "planes"
OUTPUT_NAMES = ("policy_logits", "value")


def export_onnx_bytes(net: PolicyValueNet) -> bytes:
    """The folded float32 network as a serialised ONNX model without metadata (the fast path the
    OpenVINO and ONNX Runtime backends compile from)."""
    folded = fold_for_inference(net, channels_last=False, dtype=torch.float32)
    example = torch.zeros(1, *net.input_shape, dtype=torch.float32)
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the TorchScript exporter announces its deprecation
        torch.onnx.export(
            folded, (example,), buf, input_names=[INPUT_NAME], output_names=list(OUTPUT_NAMES),
            dynamic_axes={INPUT_NAME: {0: "batch"}, OUTPUT_NAMES[0]: {0: "batch"}, OUTPUT_NAMES[1]: {0: "batch"}},
            opset_version=OPSET, dynamo=False, do_constant_folding=True,
        )
    return buf.getvalue()


def model_metadata(net: PolicyValueNet, game: Game, version: int | None = None,
                   extra: dict[str, Any] | None = None) -> dict[str, str]:
    """The key/value strings written into an exported model's ``metadata_props``."""
    layout = inspect.getdoc(type(game).planes_from_compact) or ""
    meta = {
        "plyfoundry.format": "1",
        "plyfoundry.game": game.name,
        "plyfoundry.game_options": json.dumps(game.options(), sort_keys=True),
        "plyfoundry.input_shape": json.dumps(list(net.input_shape)),
        "plyfoundry.input_layout": " ".join(layout.split()),
        "plyfoundry.history_length": str(game.history_length),
        "plyfoundry.num_actions": str(net.num_actions),
        "plyfoundry.action_names": json.dumps([game.action_to_text(a) for a in range(game.num_actions)]),
        "plyfoundry.action_numbering": "board points row-major from the top-left corner (row 0 is "
                                       "the top row); extra actions such as Go's pass follow the points",
        "plyfoundry.outputs": "policy_logits: raw logits (N, A), mask illegal actions before softmax; "
                              "value: (N,) in [-1, 1] from the side to move's view",
        "plyfoundry.network": json.dumps(net.config.model_dump(), sort_keys=True),
    }
    if version is not None:
        meta["plyfoundry.snapshot_version"] = str(int(version))
    for k, v in (extra or {}).items():
        meta[f"plyfoundry.{k}"] = v if isinstance(v, str) else json.dumps(v, sort_keys=True)
    return meta


def export_onnx_model(net: PolicyValueNet, game: Game, version: int | None = None,
                      extra: dict[str, Any] | None = None) -> bytes:
    """The network as a self-describing ONNX model: :func:`export_onnx_bytes` plus
    :func:`model_metadata` in its ``metadata_props``, checked by ``onnx.checker``."""
    import onnx

    problem = net.fits(game)
    if problem:
        raise ValueError(problem)
    model = onnx.load_from_string(export_onnx_bytes(net))
    model.producer_name = "plyfoundry"
    for key, value in model_metadata(net, game, version, extra).items():
        entry = model.metadata_props.add()
        entry.key, entry.value = key, value
    onnx.checker.check_model(model)
    return model.SerializeToString()


def read_model_metadata(data: bytes) -> dict[str, str]:
    """The ``metadata_props`` of a serialised ONNX model as a dict."""
    import onnx

    model = onnx.load_from_string(data)
    return {p.key: p.value for p in model.metadata_props}
