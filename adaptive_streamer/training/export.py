# SPDX-License-Identifier: Apache-2.0
"""From a trained model to a deployable policy: an ONNX file and its policy card.

`export_mlp` writes a multilayer perceptron given as numpy weights (``layers``: a list of
``(W, b)`` with ``W`` of shape (inputs, outputs), hidden layers followed by ``tanh`` or
``relu``, the last one linear) as an ONNX model (input ``obs`` float32 [1, size], output
``action`` float32 [1, n], opset 17); `export_onnx` takes any ONNX model file. Both write
the policy card of the environment's configuration next to it: the environment's card's
joints, decision period, limits (inline, so the card stands alone), observation blocks
and action meaning, with ``kind: onnx``. The result is checked like any card
(`adaptive-streamer check-policy`, or `load_policy`) and runs in the adapter as it ran in
the environment: the same observation layout feeds it, the same cycle maps its action.
"""
from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import onnx
import yaml
from onnx import TensorProto, helper, numpy_helper

from ..core.observation import HORIZON_BLOCKS, ObservationBlock
from ..core.policies.card import PolicyCard

ACTIVATIONS = {"tanh": "Tanh", "relu": "Relu"}


class ExportError(ValueError):
    """The weights do not fit the card (sizes), or the activation is unknown."""


def _block_entry(block: ObservationBlock) -> Any:
    if block.kind in HORIZON_BLOCKS:
        entry: dict[str, Any] = {"block": block.kind, "horizon": block.horizon}
        if block.kind == "reference_position":
            entry["scale"] = list(block.scale) if len(block.scale) > 1 else block.scale[0]
        return entry
    if block.kind == "feedback":
        return {"block": "feedback", "features": list(block.features),
                "scale": list(block.scale), "offset": list(block.offset)}
    return block.kind


def card_data(card: PolicyCard, model: str, name: str, description: str = "") -> dict[str, Any]:
    """The YAML mapping of an onnx card for ``card``'s configuration and ``model``."""
    return {
        "policy_card": 1, "name": name,
        "description": description or f"exported from the training environment ({card.source})",
        "kind": "onnx", "model": model, "joints": list(card.joints),
        "decision_period": float(card.decision_period), "limits": card.limits.to_dict(),
        "observation": [_block_entry(b) for b in card.observation],
        "action": card.action, "onnx": {"input": "obs", "output": "action",
                                        "intra_op_threads": 1},
    }


def _write_card(card: PolicyCard, out_dir: Path, name: str, model_file: str,
                description: str) -> Path:
    path = out_dir / f"{name}.yaml"
    text = "# Policy card written by adaptive_streamer.training.export.\n"
    path.write_text(text + yaml.safe_dump(card_data(card, model_file, name, description),
                                          sort_keys=False))
    return path


def mlp_model(layers: Sequence[tuple[np.ndarray, np.ndarray]], size: int, n: int,
              activation: str = "tanh") -> onnx.ModelProto:
    """The ONNX model of an MLP (float32 weights; see the module docstring)."""
    if activation not in ACTIVATIONS:
        raise ExportError(f"activation '{activation}': expected one of {list(ACTIVATIONS)}")
    if not layers:
        raise ExportError("an MLP needs at least one (W, b) layer")
    nodes, inits, x, width = [], [], "obs", size
    for k, (w, b) in enumerate(layers):
        w, b = np.asarray(w, np.float32), np.asarray(b, np.float32).reshape(-1)
        if w.ndim != 2 or w.shape[0] != width or b.shape != (w.shape[1],):
            raise ExportError(f"layer {k}: W must be ({width}, m) and b (m,), got W "
                              f"{w.shape} and b {b.shape}")
        if not (np.all(np.isfinite(w)) and np.all(np.isfinite(b))):
            raise ExportError(f"layer {k}: weights hold NaN or infinite values")
        inits += [numpy_helper.from_array(w, f"W{k}"), numpy_helper.from_array(b, f"b{k}")]
        last = k == len(layers) - 1
        z = "action" if last else f"z{k}"
        nodes += [helper.make_node("MatMul", [x, f"W{k}"], [f"m{k}"]),
                  helper.make_node("Add", [f"m{k}", f"b{k}"], [z])]
        if not last:
            nodes.append(helper.make_node(ACTIVATIONS[activation], [z], [f"h{k}"]))
            z = f"h{k}"
        x, width = z, w.shape[1]
    if width != n:
        raise ExportError(f"the last layer has {width} outputs; the card has {n} joints")
    graph = helper.make_graph(
        nodes, "mlp_policy", [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, size])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, n])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def export_mlp(layers: Sequence[tuple[np.ndarray, np.ndarray]], card: PolicyCard,
               out_dir: str | Path, name: str, activation: str = "tanh",
               description: str = "") -> Path:
    """Write ``name.onnx`` and ``name.yaml`` (the card) into ``out_dir``; the card path."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    size, n = card.observation_layout().size, len(card.joints)
    onnx.save(mlp_model(layers, size, n, activation), out / f"{name}.onnx")
    return _write_card(card, out, name, f"{name}.onnx", description)


def export_onnx(model: str | Path, card: PolicyCard, out_dir: str | Path, name: str,
                description: str = "") -> Path:
    """Copy an ONNX model (input ``obs``, output ``action``) as ``name.onnx`` into
    ``out_dir`` and write its card; the card path."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(model, out / f"{name}.onnx")
    return _write_card(card, out, name, f"{name}.onnx", description)
