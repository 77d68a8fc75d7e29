# SPDX-License-Identifier: Apache-2.0
"""A learned policy in an ONNX file, run with onnxruntime on the CPU.

The session uses only the ``CPUExecutionProvider``, ``intra_op_num_threads`` from the card
(default 1), one inter-op thread and sequential execution. At load the model's input is
checked against the card's observation layout (float32, shape ``(size,)`` or ``(1, size)``,
a dynamic first dimension counting as 1) and its output against the joints (float32,
``(n,)`` or ``(1, n)``), with errors showing expected vs found; then the model is warmed up.

Each call builds the observation into one float32 buffer that is bound to the session's
input once (`onnxruntime.IOBinding` over the buffer's memory), and the output is bound to a
preallocated buffer, so a decision costs the observation build plus one bound run.
"""
from __future__ import annotations

import numpy as np
import onnxruntime as ort

from .base import PolicyError, PolicyInputs
from .card import OnnxOptions, PolicyCard

WARMUP_RUNS = 5
_FLOAT = "tensor(float)"
_DTYPES = {"tensor(float)": "float32", "tensor(double)": "float64", "tensor(float16)": "float16",
           "tensor(int64)": "int64", "tensor(int32)": "int32"}


def _dtype(ort_type: str) -> str:
    """numpy name of an onnxruntime tensor type (the type string itself when unknown)."""
    return _DTYPES.get(ort_type, ort_type)


def _shape(dims: list) -> str:
    """``[1, 42]``-style text of a tensor's dimensions."""
    return "[" + ", ".join(str(d) if isinstance(d, int) else f"{d or '?'}" for d in dims) + "]"


def describe_model(session: ort.InferenceSession) -> str:
    """A session's signature, e.g. ``inputs: obs float32 [1, 42]; outputs: action float32 [1, 7]``
    (dynamic dimensions by name, or ``?``)."""
    def side(args: list) -> str:
        return ", ".join(f"{a.name} {_dtype(a.type)} {_shape(a.shape)}" for a in args)
    return f"inputs: {side(session.get_inputs())}; outputs: {side(session.get_outputs())}"


def _dim_ok(dim: int | str | None, want: int) -> bool:
    """A dynamic dimension (a name or None) accepts any size."""
    return not isinstance(dim, int) or dim == want


def _fits(dims: list, size: int) -> tuple[int, ...] | None:
    """The shape to use when a tensor with ``dims`` can be ``(size,)`` or ``(1, size)``."""
    if len(dims) == 1 and _dim_ok(dims[0], size):
        return (size,)
    if len(dims) == 2 and _dim_ok(dims[0], 1) and _dim_ok(dims[1], size):
        return (1, size)
    return None


class OnnxPolicy:
    """Runs the card's ONNX model on the card's observation; action meaning from the card."""

    def __init__(self, card: PolicyCard, warmup_runs: int = WARMUP_RUNS) -> None:
        if card.model is None:
            raise PolicyError(f"{card.source}: kind '{card.kind}' has no model")
        self.card = card
        self.action_meaning = card.action
        self.layout = card.observation_layout()
        self.needs_feedback = self.layout.features
        options = card.onnx or OnnxOptions()
        so = ort.SessionOptions()
        so.intra_op_num_threads = options.intra_op_threads
        so.inter_op_num_threads = 1
        so.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        so.log_severity_level = 3
        where = f"{card.source}: model '{card.model}'"
        try:
            session = ort.InferenceSession(str(card.model), so, providers=["CPUExecutionProvider"])
        except Exception as exc:  # onnxruntime raises its own exception types on bad files
            raise PolicyError(f"{where}: onnxruntime cannot load it: {exc}") from None
        self._session = session
        signature = describe_model(session)
        inp = self._pick(session.get_inputs(), options.input, "input", where, signature)
        if len(session.get_inputs()) > 1:
            raise PolicyError(f"{where}: a policy model must have exactly one input (the "
                              f"observation); found {signature}")
        out = self._pick(session.get_outputs(), options.output, "output", where, signature)
        size, n = self.layout.size, len(card.joints)
        feed_shape = _fits(list(inp.shape), size)
        if inp.type != _FLOAT or feed_shape is None:
            raise PolicyError(
                f"{where}: input '{inp.name}': expected float32 of shape [{size}] or [1, {size}] "
                f"for the observation ({self.layout.describe()}); found {_dtype(inp.type)} "
                f"{_shape(inp.shape)}")
        expected_out = (f"expected float32 of shape [{n}] or [1, {n}] (one action per joint "
                        f"{list(card.joints)})")
        if out.type != _FLOAT or _fits(list(out.shape), n) is None:
            raise PolicyError(f"{where}: output '{out.name}': {expected_out}; found "
                              f"{_dtype(out.type)} {_shape(out.shape)}")
        self._obs = np.zeros(feed_shape, np.float32)
        try:
            first = session.run([out.name], {inp.name: self._obs})[0]
        except Exception as exc:  # a model that loads but cannot run on this input
            raise PolicyError(f"{where}: inference on a zero observation failed: {exc}") from None
        if first.dtype != np.float32 or first.shape not in ((n,), (1, n)):
            raise PolicyError(f"{where}: output '{out.name}': {expected_out}; found "
                              f"{first.dtype} {list(first.shape)} when run")
        self._out = np.zeros(first.shape, np.float32)
        self._binding = session.io_binding()
        self._binding.bind_ortvalue_input(inp.name, ort.OrtValue.ortvalue_from_numpy(self._obs))
        self._binding.bind_ortvalue_output(out.name, ort.OrtValue.ortvalue_from_numpy(self._out))
        self.input_name, self.output_name = inp.name, out.name
        for _ in range(warmup_runs):
            session.run_with_iobinding(self._binding)

    @staticmethod
    def _pick(args: list, name: str | None, what: str, where: str, signature: str):
        if name is None:
            if len(args) != 1:
                raise PolicyError(f"{where}: the model has {len(args)} {what}s; name the one to "
                                  f"use in the card (onnx.{what}); found {signature}")
            return args[0]
        for arg in args:
            if arg.name == name:
                return arg
        raise PolicyError(f"{where}: no {what} named '{name}' (card onnx.{what}); found "
                          f"{signature}")

    def reset(self) -> None:
        """Nothing to forget: the model is stateless (memory comes from previous_action)."""

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """Build the observation, run the model once, return its output as float64 (n,)."""
        self.layout.build(inputs, out=self._obs)
        self._session.run_with_iobinding(self._binding)
        return self._out.reshape(-1).astype(np.float64)
