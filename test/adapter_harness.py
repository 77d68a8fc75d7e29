# SPDX-License-Identifier: Apache-2.0
"""Shared helpers for the adapter and watchdog tests over real rclpy/DDS.

* Files written to a test folder: a short periodic reference CSV for the demo arm, policy
  cards, and ONNX models built with onnx.helper (a tracking law, optionally with a fault
  input, optionally slow).
* `check_stream`: the independent check of every streamed setpoint (finite differences on
  the nominal stamps against the streamed velocities/accelerations and the limits).
* `Cell`: reference_server + sim_driver and a relay of ``joint_states`` and
  ``reference/window`` (faults injected: block, offset, truncate) in their own process
  (test/cell_process.py); the adapter and a probe node that records what goes out, sets the
  relay's faults, publishes feedback and calls services in this one.
"""
from __future__ import annotations

import gc
import json
import math
import queue
import signal
import subprocess
import sys
import threading
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import onnx
import onnxruntime as ort
import yaml
from diagnostic_msgs.msg import DiagnosticArray
from lifecycle_msgs.msg import Transition
from lifecycle_msgs.srv import ChangeState, GetState
from onnx import TensorProto, helper, numpy_helper
from rcl_interfaces.msg import Log
from rcl_interfaces.msg import Parameter as ParameterMsg
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from rclpy.parameter import Parameter
from rclpy.parameter_client import AsyncParameterClient
from sensor_msgs.msg import JointState
from std_msgs.msg import Bool, Float64MultiArray
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.bringup import child_command
from adaptive_streamer.core.decision_record import decode
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.policies.card import default_natural_frequency
from adaptive_streamer.nodes.adapter import AdapterNode
from adaptive_streamer.nodes.threads import make_executor
from adaptive_streamer.nodes.common import reliable_qos

REPO = Path(__file__).resolve().parents[1]
LIMITS_FILE = REPO / "config" / "demo" / "limits.yaml"
LIMITS = JointLimits.from_file(LIMITS_FILE)
JOINTS = list(LIMITS.names)
N = len(JOINTS)
PERIOD = 0.05          # decision period (common practice)
RATE = 250.0           # stream rate [Hz] (drivers take 125-1000 Hz; common practice)
P0 = np.array([-0.312, 0.725, 0.340, 0.0, 0.506, -1.883])   # demo arm start pose [rad]
AMPLITUDE = np.array([0.30, -0.20, 0.25, 0.40, -0.30, 0.50])  # reference swing [rad]
LAP = 3.0              # reference lap [s]; peak joint speed = pi * AMPLITUDE / LAP


# ---------------------------------------------------------------------------- files
def write_reference(folder: Path, lap: float = LAP, amplitude: np.ndarray = AMPLITUDE,
                    p0: np.ndarray = P0) -> Path:
    """A periodic reference ``p0 + amplitude (1 - cos(2 pi t / lap)) / 2`` as CSV (10 ms rows)."""
    t = np.arange(0.0, lap + 1e-9, 0.01)
    p = p0 + np.outer(0.5 * (1.0 - np.cos(2.0 * np.pi * t / lap)), amplitude)
    path = folder / "reference.csv"
    lines = ["time," + ",".join(JOINTS)]
    lines += [f"{ti:.4f}," + ",".join(f"{x:.12f}" for x in row) for ti, row in zip(t, p)]
    path.write_text("\n".join(lines) + "\n")
    return path


def write_card(folder: Path, name: str, kind: str, **fields: Any) -> Path:
    """A policy card for the demo arm (limits = the demo limits file)."""
    card = {"policy_card": 1, "name": name, "kind": kind, "joints": JOINTS,
            "decision_period": PERIOD, "limits": str(LIMITS_FILE), **fields}
    path = folder / f"{name}.card.yaml"
    path.write_text(yaml.safe_dump(card, sort_keys=False))
    return path


def write_limits(folder: Path, name: str, limits: JointLimits) -> Path:
    """A limits YAML file in the project's own format."""
    path = folder / f"{name}.yaml"
    path.write_text(yaml.safe_dump(limits.to_dict(), sort_keys=False))
    return path


TRACKING_OBSERVATION = [
    "joint_velocity", "joint_acceleration",
    {"block": "reference_position", "horizon": 2},
    {"block": "reference_velocity", "horizon": 2},
    {"block": "reference_acceleration", "horizon": 2},
]


def tracking_matrix(limits: JointLimits = LIMITS, period: float = PERIOD) -> np.ndarray:
    """Weights (obs, n) of the tracker's closed-form law on `TRACKING_OBSERVATION`.

    The law (adaptive_streamer.core.policies.tracker, default critically damped gains) is
    u = (a_ref1 + kp (p_ref1 - p - T v - T^2 a / 3) + kd (v_ref1 - v - T a / 2))
        / (1 + kp T^2 / 6 + kd T / 2),
    written on the normalised blocks (v / V, a / A, p_ref - p, v_ref / V, a_ref / A).
    """
    n, T = len(limits), period
    w = default_natural_frequency(T)
    kp, kd = w * w, 2.0 * w
    inv = 1.0 / (1.0 + kp * T * T / 6.0 + kd * T / 2.0)
    V, A = limits.velocity_max, limits.acceleration_max
    W = np.zeros((8 * n, n))
    for i in range(n):
        W[i, i] = inv * (-kp * T - kd) * V[i]                      # v / V
        W[n + i, i] = inv * (-kp * T * T / 3.0 - kd * T / 2.0) * A[i]  # a / A
        W[3 * n + i, i] = inv * kp                                 # p_ref[1] - p
        W[5 * n + i, i] = inv * kd * V[i]                          # v_ref[1] / V
        W[7 * n + i, i] = inv * A[i]                               # a_ref[1] / A
    return W


def write_tracking_onnx(folder: Path, name: str, fault_input: bool = False,
                        slow_seconds: float = 0.0) -> Path:
    """An ONNX card whose model computes the tracking law (`tracking_matrix`).

    ``fault_input``: the observation ends with a feedback block for the feature ``fault``
    (value, validity flag); the model adds ``1 / sqrt(1 - f) - 1`` (0 at f = 0, +inf at
    f = 1, NaN at f = 2) and then returns ``n + k`` values, ``k = clip(floor(f - 2), 0, 2)``
    (f = 3: one value too many; f = 4: a reshape onnxruntime must refuse -> an exception).
    ``slow_seconds`` > 0 (with ``fault_input``): a loop of tanh layers is added (a negligible
    1e-30 of its mean goes into the output) that runs only while ``fault`` >= 5, with the
    trip count calibrated here so that one such run takes about ``slow_seconds``: the card
    loads (and passes its probe run) fast, and the test makes it slow by the feedback.
    """
    assert fault_input or slow_seconds == 0.0, "the slow loop is gated by the fault input"
    n = N
    W = tracking_matrix()
    observation = list(TRACKING_OBSERVATION)
    size = W.shape[0]
    if fault_input:
        observation.append({"block": "feedback", "features": ["fault"]})
        W = np.vstack([W, np.zeros((2, n))])
        size += 2
    nodes = [helper.make_node("MatMul", ["obs", "W"], ["u"])]
    inits = [numpy_helper.from_array(W.astype(np.float32), "W")]
    last = "u"
    out_shape: list[Any] = [1, n]
    if slow_seconds > 0.0:
        last = _add_slow_loop(nodes, inits, size, last)
    if fault_input:
        # the fault value; with the slow loop, SLOW_FAULT and above count as 0 here (slow only)
        gated = ([helper.make_node("Sub", ["c1", "gc"], ["ng"]),
                  helper.make_node("Mul", ["f_raw", "ng"], ["f"])] if slow_seconds > 0.0
                 else [helper.make_node("Identity", ["f_raw"], ["f"])])
        nodes += [
            helper.make_node("Slice", ["obs", "f_at", "f_end", "one_axis"], ["f_raw"]),
            *gated,
            helper.make_node("Sub", ["c1", "f"], ["omf"]),
            helper.make_node("Sqrt", ["omf"], ["sq"]),
            helper.make_node("Reciprocal", ["sq"], ["rs"]),
            helper.make_node("Sub", ["rs", "c1"], ["e"]),
            helper.make_node("Add", [last, "e"], ["y"]),
            helper.make_node("Reshape", ["y", "flat"], ["yf"]),
            helper.make_node("Concat", ["yf", "pad"], ["z"], axis=0),
            helper.make_node("Sub", ["f", "c2"], ["fm2"]),
            helper.make_node("Floor", ["fm2"], ["fl"]),
            helper.make_node("Clip", ["fl", "c0", "c2"], ["kf"]),
            helper.make_node("Reshape", ["kf", "flat"], ["kf1"]),
            helper.make_node("Cast", ["kf1"], ["k"], to=TensorProto.INT64),
            helper.make_node("Add", ["nn", "k"], ["end"]),
            helper.make_node("Slice", ["z", "zero1", "end"], ["s"]),
            helper.make_node("Reshape", ["s", "end"], ["action"]),
        ]
        inits += [numpy_helper.from_array(np.array([size - 2], np.int64), "f_at"),
                  numpy_helper.from_array(np.array([size - 1], np.int64), "f_end"),
                  numpy_helper.from_array(np.array([1], np.int64), "one_axis"),
                  numpy_helper.from_array(np.array(1.0, np.float32), "c1"),
                  numpy_helper.from_array(np.array(2.0, np.float32), "c2"),
                  numpy_helper.from_array(np.array(0.0, np.float32), "c0"),
                  numpy_helper.from_array(np.array([-1], np.int64), "flat"),
                  numpy_helper.from_array(np.zeros(1, np.float32), "pad"),
                  numpy_helper.from_array(np.array([n], np.int64), "nn"),
                  numpy_helper.from_array(np.array([0], np.int64), "zero1")]
        out_shape = ["m"]
    else:
        nodes.append(helper.make_node("Identity", [last], ["action"]))
    graph = helper.make_graph(
        nodes, name, [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, size])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, out_shape)], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)
    path = folder / f"{name}.onnx"
    if slow_seconds > 0.0:
        _calibrate_slow(model, path, size, slow_seconds)
    else:
        onnx.save(model, str(path))
    return write_card(folder, name, "onnx", model=path.name, observation=observation,
                      action="acceleration", onnx={"input": "obs", "output": "action"})


_SLOW_WIDTH = 512
SLOW_FAULT = 5.0   # the fault feature's value that makes the slow card slow


def _add_slow_loop(nodes: list, inits: list, size: int, last: str) -> str:
    """Append ``h = tanh(h @ B)`` repeated ``trips`` times while the fault feature (the
    observation's last-but-one value) is at least `SLOW_FAULT`, none otherwise; returns the
    output name."""
    nodes += [helper.make_node("Slice", ["obs", "gate_at", "gate_end", "gate_axis"], ["gf"]),
              helper.make_node("Sub", ["gf", "gate_off"], ["gm"]),
              helper.make_node("Floor", ["gm"], ["gfl"]),
              helper.make_node("Clip", ["gfl", "gate_lo", "gate_hi"], ["gc"]),
              helper.make_node("Cast", ["gc"], ["gi"], to=TensorProto.INT64),
              helper.make_node("Reshape", ["gi", "gate_scalar"], ["gs"]),
              helper.make_node("Mul", ["trips", "gs"], ["trips_on"])]
    inits += [numpy_helper.from_array(np.array([size - 2], np.int64), "gate_at"),
              numpy_helper.from_array(np.array([size - 1], np.int64), "gate_end"),
              numpy_helper.from_array(np.array([1], np.int64), "gate_axis"),
              numpy_helper.from_array(np.array(SLOW_FAULT - 1.0, np.float32), "gate_off"),
              numpy_helper.from_array(np.array(0.0, np.float32), "gate_lo"),
              numpy_helper.from_array(np.array(1.0, np.float32), "gate_hi"),
              numpy_helper.from_array(np.zeros(0, np.int64), "gate_scalar")]
    rng = np.random.default_rng(1)
    m = _SLOW_WIDTH
    body = helper.make_graph(
        [helper.make_node("MatMul", ["h_in", "B"], ["hb"]),
         helper.make_node("Tanh", ["hb"], ["h_out"]),
         helper.make_node("Identity", ["cond_in"], ["cond_out"])],
        "slow_body",
        [helper.make_tensor_value_info("iter", TensorProto.INT64, []),
         helper.make_tensor_value_info("cond_in", TensorProto.BOOL, []),
         helper.make_tensor_value_info("h_in", TensorProto.FLOAT, [1, m])],
        [helper.make_tensor_value_info("cond_out", TensorProto.BOOL, []),
         helper.make_tensor_value_info("h_out", TensorProto.FLOAT, [1, m])])
    nodes += [helper.make_node("MatMul", ["obs", "Win"], ["h0"]),
              helper.make_node("Loop", ["trips_on", "cond", "h0"], ["h_end"], body=body),
              helper.make_node("ReduceMean", ["h_end"], ["hm"], keepdims=1),
              helper.make_node("Mul", ["hm", "tiny"], ["ht"]),
              helper.make_node("Add", [last, "ht"], ["u_slow"])]
    inits += [numpy_helper.from_array((0.1 * rng.standard_normal((size, m))).astype(np.float32),
                                      "Win"),
              numpy_helper.from_array((rng.standard_normal((m, m)) / math.sqrt(m))
                                      .astype(np.float32), "B"),
              numpy_helper.from_array(np.array(16, np.int64), "trips"),
              numpy_helper.from_array(np.array(True), "cond"),
              numpy_helper.from_array(np.array(1e-30, np.float32), "tiny")]
    return "u_slow"


def _calibrate_slow(model: onnx.ModelProto, path: Path, size: int, seconds: float) -> None:
    """Set the loop's trip count so that one run takes about ``seconds``; save to ``path``."""
    trips = next(t for t in model.graph.initializer if t.name == "trips")

    def run_time(k: int) -> float:
        trips.CopyFrom(numpy_helper.from_array(np.array(k, np.int64), "trips"))
        so = ort.SessionOptions()
        so.intra_op_num_threads = 1
        so.log_severity_level = 3
        sess = ort.InferenceSession(model.SerializeToString(), so,
                                    providers=["CPUExecutionProvider"])
        x = np.zeros((1, size), np.float32)
        x[0, size - 2] = SLOW_FAULT
        sess.run(None, {"obs": x})
        times = []
        for _ in range(3):
            t0 = time.perf_counter()
            sess.run(None, {"obs": x})
            times.append(time.perf_counter() - t0)
        return float(np.median(times))

    k = 16
    per_trip = run_time(k) / k
    k = max(1, int(round(seconds / per_trip)))
    trips.CopyFrom(numpy_helper.from_array(np.array(k, np.int64), "trips"))
    onnx.save(model, str(path))


# ---------------------------------------------------------------------------- the checker
@dataclass
class Sample:
    """One streamed setpoint as received: nominal stamp [integer ns], p, v, a, arrival
    (monotonic clock [s])."""

    stamp_ns: int
    position: np.ndarray
    velocity: np.ndarray
    acceleration: np.ndarray
    arrival: float = math.nan

    @property
    def stamp(self) -> float:
        """The stamp in seconds (float: about 0.24 us resolution at today's epoch times)."""
        return self.stamp_ns * 1e-9


@dataclass
class StreamCheck:
    """Result of `check_stream`: violations by kind (empty = fine) and figures."""

    samples: int
    skipped_ticks: int
    off_grid: int
    violations: dict[str, str] = field(default_factory=dict)
    peak_ratio: dict[str, float] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        """True when no check failed."""
        return not self.violations

    def describe(self) -> str:
        """Readable summary for assertion messages."""
        peaks = ", ".join(f"{k} {v:.3f}" for k, v in self.peak_ratio.items())
        return (f"{self.samples} samples, {self.skipped_ticks} skipped ticks, {self.off_grid} off "
                f"the tick grid, peak/limit: {peaks}; violations: {self.violations or 'none'}")


REL_TOL = 1e-6   # relative float tolerance on the limits
ABS_TOL = 1e-9


def check_stream(samples: list[Sample], limits: JointLimits = LIMITS, rate: float = RATE,
                 scale: float = 1.0) -> StreamCheck:
    """Check streamed setpoints independently of the package's own math.

    On the nominal stamps (the plan is sampled at header.stamp), for consecutive samples
    h = t1 - t0 apart:

    * limits: p within [pmin, pmax]; |v| <= V, |a| <= A; |p1 - p0| <= V h, |v1 - v0| <= A h
      and |a1 - a0| <= J h (mean value theorem: a jerk-limited motion cannot change faster);
      velocity/acceleration/jerk limits scaled by ``scale`` (the limit_scale in force);
    * consistency (streamed v, a are the derivatives of the streamed p, v): trapezoid rule
      errors, bounded with the Peano kernel of the trapezoid rule (e.g. Davis & Rabinowitz,
      Methods of Numerical Integration, 2nd ed., 1984, ch. 2; from memory):
      |p1 - p0 - h (v0 + v1) / 2| <= h^3 / 12 sup|v''| with v'' = jerk, <= h^3 J / 12;
      |v1 - v0 - h (a0 + a1) / 2| <= h^2 / 8 |jump of jerk| <= h^2 J / 4 (a is piecewise
      linear, its slope jumps by at most 2 J at a decision instant);
    * stamps strictly increasing, on the grid t0 + i / rate; skipped ticks counted (the
      consistency checks apply between neighbouring ticks only, see the code).

    Time steps come from the integer-nanosecond stamps. The adapter samples its plan at
    ROS times held as float seconds, which at today's epoch times resolve only
    ``delta = spacing(t)`` (about 0.24 us): a sample may be evaluated up to an ulp off its
    segment's start, so every bound gets the slack of a time error of 2 delta (e.g. J 2 delta
    on an acceleration step; 6e-5 of J h at 4 ms ticks).
    """
    samples = list(samples)  # a snapshot: the probe may still be appending
    out = StreamCheck(len(samples), 0, 0)
    if not samples:
        out.violations["empty"] = "no samples"
        return out
    ns = np.array([s.stamp_ns for s in samples], dtype=np.int64)
    t = (ns - ns[0]) * 1e-9  # exact to the nanosecond
    P = np.array([s.position for s in samples])
    V = np.array([s.velocity for s in samples])
    A = np.array([s.acceleration for s in samples])
    vmax, amax = limits.velocity_max * scale, limits.acceleration_max * scale
    jmax = limits.jerk_max * scale
    relv, rela, relj = vmax * (1 + REL_TOL), amax * (1 + REL_TOL), jmax * (1 + REL_TOL)
    names = limits.names

    def fail(kind: str, bad: np.ndarray, values: np.ndarray, bound: Any) -> None:
        if bad.any():
            k, i = np.argwhere(bad)[0]
            b = bound[k, i] if np.ndim(bound) == 2 else np.broadcast_to(bound, bad.shape)[k, i]
            out.violations[kind] = (f"{int(bad.sum())} samples; first at t={ns[k] * 1e-9:.6f} joint "
                                    f"'{names[i]}': {values[k, i]:.9g} vs bound {b:.9g}")

    if not np.all(np.isfinite(P) & np.isfinite(V) & np.isfinite(A)):
        out.violations["finite"] = "non-finite values streamed"
        return out
    pmin = limits.position_min - REL_TOL * (1 + np.abs(limits.position_min))
    pmax = limits.position_max + REL_TOL * (1 + np.abs(limits.position_max))
    fail("position below minimum", P < pmin, P, pmin)
    fail("position above maximum", P > pmax, P, pmax)
    fail("velocity", np.abs(V) > relv, V, relv)
    fail("acceleration", np.abs(A) > rela, A, rela)
    out.peak_ratio = {"velocity": float(np.max(np.abs(V) / vmax)),
                      "acceleration": float(np.max(np.abs(A) / amax))}
    if len(samples) < 2:
        return out
    h = np.diff(t)
    if np.any(h <= 0):
        out.violations["stamps"] = f"stamps do not increase at index {int(np.argmax(h <= 0))}"
        return out
    ticks = t * rate
    out.off_grid = int(np.sum(np.abs(ticks - np.round(ticks)) > 1e-3))
    out.skipped_ticks = int(np.sum(np.round(h * rate) - 1))
    delta = float(np.spacing(ns[-1] * 1e-9))  # float time resolution (see above)
    h = h[:, None]
    H = h + 2.0 * delta
    dP, dV, dA = np.diff(P, axis=0), np.diff(V, axis=0), np.diff(A, axis=0)
    fail("position step (finite difference over V h)", np.abs(dP) > relv * H + ABS_TOL, dP,
         relv * H + ABS_TOL)
    fail("velocity step (finite difference over A h)", np.abs(dV) > rela * H + ABS_TOL, dV,
         rela * H + ABS_TOL)
    fail("jerk (finite difference of accelerations over J h)",
         np.abs(dA) > relj * H + ABS_TOL, dA, relj * H + ABS_TOL)
    out.peak_ratio["jerk"] = float(np.max(np.abs(dA) / (jmax * h)))
    jhw = limits.jerk_max * (1 + REL_TOL)  # the plan's jerk never exceeds the hardware J
    # consistency between neighbouring ticks only: across skipped ticks (the stream thread
    # stalled) the adapter continues from the last setpoint sent and moves its plan later
    # (re-timing) instead of jumping, so the stamps there do not measure plan time; the limit
    # steps above still hold across the gap
    near = np.round(h[:, 0] * rate) <= 1
    ep = dP - 0.5 * h * (V[1:] + V[:-1])
    bp = h ** 3 * jhw / 12.0 + 2.0 * delta * limits.velocity_max + ABS_TOL
    fail("position vs streamed velocity (trapezoid)", (np.abs(ep) > bp) & near[:, None], ep, bp)
    ev = dV - 0.5 * h * (A[1:] + A[:-1])
    bv = h ** 2 * jhw / 4.0 + 2.0 * delta * limits.acceleration_max + ABS_TOL
    fail("velocity vs streamed acceleration (trapezoid)", (np.abs(ev) > bv) & near[:, None],
         ev, bv)
    return out


def at_rest(samples: list[Sample], tol: float = 1e-5) -> bool:
    """True when the given samples all have |v| and |a| within ``tol`` (rad/s, rad/s^2)."""
    return bool(samples) and all(np.all(np.abs(s.velocity) <= tol)
                                 and np.all(np.abs(s.acceleration) <= tol) for s in samples)


# ---------------------------------------------------------------------------- the cell
class RelayFault:
    """A fault of the cell relay, read and set as an attribute of `Probe`."""

    def __set_name__(self, owner: type, name: str) -> None:
        self.name = name

    def __get__(self, probe: Any, owner: type | None = None) -> Any:
        return self if probe is None else probe._faults[self.name]

    def __set__(self, probe: Any, value: Any) -> None:
        probe._set_fault(self.name, value)


class Probe(Node):
    """Test-side node: records outputs, sets the cell relay's faults, publishes feedback, calls
    services.

    Faults (set through the relay's parameters, see test/cell_process.py; each assignment
    returns once the relay took it): ``js_block`` (drop joint states), ``js_offset`` (added
    to positions; None for none), ``ref_block``, ``ref_offset`` (added to every point's
    positions), ``ref_truncate`` (only the first point). ``last_window`` is the latest window
    the reference server sent (before the relay). Feedback: when ``feedback`` holds
    {name: value}, a named vector is published at 50 Hz; while ``feedback_live`` it also
    carries a ``sample`` counter (as a sensor's sequence number), so its values change; set
    it False to send the same values each time (a frozen copy).
    """

    js_block = RelayFault()
    js_offset = RelayFault()
    ref_block = RelayFault()
    ref_offset = RelayFault()
    ref_truncate = RelayFault()

    def __init__(self, adapter: str = "adapter") -> None:
        super().__init__("adapter_probe")
        self.adapter = adapter
        self.setpoints: list[Sample] = []
        self.shadow: list[Sample] = []
        self.driver_positions: list[tuple[float, ...]] = []
        self.decisions: list[np.ndarray] = []
        self.diagnostics: dict[str, list[tuple[float, int, str, dict[str, str]]]] = {}
        self.logs: list[tuple[str, str]] = []
        self.last_window: JointTrajectory | None = None
        self.feedback: dict[str, float] | None = None
        self.feedback_live = True
        self._feedback_sample = 0
        self._faults: dict[str, Any] = {"js_block": False, "js_offset": None,
                                        "ref_block": False, "ref_offset": 0.0,
                                        "ref_truncate": False}
        big = reliable_qos(1000)
        self.create_subscription(JointTrajectory, "setpoints",
                                 lambda m: self._sample(self.setpoints, m), big)
        self.create_subscription(JointTrajectory, "shadow/setpoints",
                                 lambda m: self._sample(self.shadow, m), big)
        self.create_subscription(Float64MultiArray, "driver/position_command",
                                 lambda m: self.driver_positions.append(tuple(m.data)), big)
        self.create_subscription(Float64MultiArray, f"{adapter}/decisions",
                                 lambda m: self.decisions.append(np.array(m.data)), big)
        self.create_subscription(DiagnosticArray, "/diagnostics", self._diag, 100)
        self.create_subscription(Log, "/rosout", self._log, 100)
        self.create_subscription(JointTrajectory, "raw/reference/window", self._window,
                                 reliable_qos(5))
        self.feedback_pub = self.create_publisher(JointState, "feedback", 10)
        self.stop_pub = self.create_publisher(Bool, "stop", reliable_qos(1))
        self.driver_pub = self.create_publisher(Float64MultiArray, "driver/position_command", 10)
        self.create_timer(0.02, self._publish_feedback)
        self.params = AsyncParameterClient(self, adapter)
        self.relay = AsyncParameterClient(self, "cell_relay")
        self._service_clients: dict[str, Any] = {}

    def _set_fault(self, name: str, value: Any) -> None:
        wire = value
        if name == "js_offset":
            wire = [0.0] if value is None else [float(x) for x in value]
        elif name == "ref_offset":
            wire = float(value)
        wait_until(self.relay.services_are_ready, "the cell relay's parameter services")
        fut = self.relay.set_parameters([Parameter(name, value=wire)])
        wait_until(fut.done, f"the cell relay to take {name}")
        assert fut.result().results[0].successful, name
        self._faults[name] = value

    # recording
    def _sample(self, store: list[Sample], msg: JointTrajectory) -> None:
        pt = msg.points[0]
        store.append(Sample(msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec,
                            np.array(pt.positions), np.array(pt.velocities),
                            np.array(pt.accelerations), time.monotonic()))

    def _diag(self, msg: DiagnosticArray) -> None:
        for st in msg.status:
            values = {kv.key: kv.value for kv in st.values}
            self.diagnostics.setdefault(st.name, []).append(
                (time.monotonic(), st.level, st.message, values))

    def _log(self, msg: Log) -> None:
        self.logs.append((msg.name, msg.msg))

    def _window(self, msg: JointTrajectory) -> None:
        self.last_window = msg

    def _publish_feedback(self) -> None:
        fb = self.feedback
        if fb is None:
            return
        msg = JointState()
        msg.header.stamp = self.get_clock().now().to_msg()
        msg.name = list(fb)
        msg.position = [float(v) for v in fb.values()]
        if self.feedback_live:
            self._feedback_sample += 1
            msg.name.append("sample")
            msg.position.append(float(self._feedback_sample))
        self.feedback_pub.publish(msg)

    def client(self, srv_type: Any, name: str) -> Any:
        """A cached service client."""
        if name not in self._service_clients:
            self._service_clients[name] = self.create_client(srv_type, name)
        return self._service_clients[name]


def spin_executor(ex: Any, owner: Any = None) -> None:
    """Spin ``ex`` until it is shut down. An exception that ends it (a callback let one
    out) is printed and kept as ``owner.spin_error``, unless ``owner`` is closing (an
    executor shut down at close may raise too)."""
    try:
        ex.spin()
    except Exception as exc:
        if not getattr(owner, "_closing", False):
            if owner is not None:
                owner.spin_error = f"{type(exc).__name__}: {exc}"
            traceback.print_exc()


def wait_until(cond: Callable[[], Any], what: str, timeout: float = 20.0,
               poll: float = 0.01) -> Any:
    """Poll ``cond`` until it returns something truthy (returned); AssertionError on timeout."""
    end = time.monotonic() + timeout
    while True:
        value = cond()
        if value:
            return value
        if time.monotonic() > end:
            raise AssertionError(f"timed out after {timeout:g} s waiting for {what}")
        time.sleep(poll)


def adapter_values(policy: Path, **params: Any) -> dict[str, Any]:
    """Adapter parameters for the test cell (tests pass watchdog.* etc. as keyword names
    with '__' for '.')."""
    base = {"limits_file": str(LIMITS_FILE), "policy": str(policy), "stream_rate": RATE,
            "decision_period": PERIOD, "watchdog.joint_states_timeout": 0.3}
    base.update({k.replace("__", "."): v for k, v in params.items()})
    return base


def adapter_overrides(policy: Path, **params: Any) -> list[Parameter]:
    """`adapter_values` as rclpy parameter overrides."""
    return [Parameter(k, value=v) for k, v in adapter_values(policy, **params).items()]


def start_adapter_process(folder: Path, params: dict[str, Any]) -> subprocess.Popen:
    """The adapter in its own process, as it runs in a cell, from a ROS 2 params file."""
    params_file = folder / "adapter_params.yaml"
    params_file.write_text(yaml.safe_dump({"adapter": {"ros__parameters": params}}))
    return subprocess.Popen(child_command(["adapter"], str(params_file)))


def start_cell_process(folder: Path, config: dict[str, Any],
                       timeout: float = 60.0) -> subprocess.Popen:
    """Start test/cell_process.py with ``config`` and wait for its ``ready``."""
    config_file = folder / "cell_process.json"
    config_file.write_text(json.dumps(config))
    proc = subprocess.Popen([sys.executable, str(Path(__file__).parent / "cell_process.py"),
                             str(config_file)], stdout=subprocess.PIPE, text=True)
    lines: queue.Queue[str] = queue.Queue()
    threading.Thread(target=lambda: [lines.put(x) for x in proc.stdout], daemon=True).start()
    try:
        first = lines.get(timeout=timeout).strip()
    except queue.Empty:
        first = ""
    if first != "ready":
        stop_process(proc)
        raise AssertionError(f"the cell process did not start (said {first!r})")
    return proc


def stop_process(proc: subprocess.Popen, timeout: float = 10.0) -> None:
    """SIGINT a child process; SIGKILL it after ``timeout``."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=timeout)


class Cell:
    """reference_server + sim_driver + the fault relay in their own process
    (test/cell_process.py, as a driver is apart from the adapter); the probe and the adapter
    in this one, each in its own executor (the adapter's from `make_executor`), so the tests
    drive it only through its ROS interface.

    The reference is ``write_reference`` played in a loop (start_mode 'service'); the sim
    driver starts at its first point, so activation hands over to the policy at once.
    """

    def __init__(self, folder: Path, policy: Path, adapter_in_process: bool = False,
                 **adapter_params: Any) -> None:
        self.folder = folder
        self.reference_file = write_reference(folder)
        self.processes: list[subprocess.Popen] = []
        self.adapter: AdapterNode | None = None
        try:
            self.processes.append(start_cell_process(folder, {
                "reference": {"reference_file": str(self.reference_file),
                              "limits_file": str(LIMITS_FILE), "end_mode": "loop",
                              "decision_period": PERIOD},
                "driver": {"joints": JOINTS, "initial_positions": P0.tolist()}}))
            params = adapter_values(policy, **adapter_params)
            if not adapter_in_process:
                self.processes.append(start_adapter_process(folder, params))
            self._start_nodes(params if adapter_in_process else None)
        except BaseException:
            for proc in self.processes:
                stop_process(proc)
            raise

    def _start_nodes(self, adapter_params: dict[str, Any] | None) -> None:
        """The probe (and, when asked, the adapter) in this process."""
        self.spin_error: str | None = None
        self.probe = Probe()
        self.cell_ex = SingleThreadedExecutor()
        self.cell_ex.add_node(self.probe)
        executors = [self.cell_ex]
        if adapter_params is not None:
            self.adapter = AdapterNode(parameter_overrides=[
                Parameter(k, value=v) for k, v in adapter_params.items()])
            self.adapter_ex = make_executor()
            self.adapter_ex.add_node(self.adapter)
            executors.append(self.adapter_ex)
        # Everything built so far (modules, nodes, models) lives as long as the test: keep it
        # out of the collector, whose full passes over it stall every thread for 0.1-0.3 s
        # and would trip the watchdog's timeouts of an adapter in this process.
        gc.collect()
        gc.freeze()
        self._executors = executors
        self._spinners = [threading.Thread(target=self._spin, args=(ex,), daemon=True)
                          for ex in executors]
        for thread in self._spinners:
            thread.start()

    def _spin(self, ex: Any) -> None:
        spin_executor(ex, self)

    def close(self) -> None:
        """Deactivate (if active), destroy every node and stop the executors and the cell
        process (these always, even when the adapter does not answer)."""
        self._closing = True
        try:
            if self.state(timeout=5.0) == "active":
                self.transition(Transition.TRANSITION_DEACTIVATE)
        except AssertionError as exc:   # no answer: the nodes go all the same
            print(f"cell close: {exc}", file=sys.stderr)
        finally:
            self._destroy()

    def _destroy(self) -> None:
        try:
            for ex in self._executors:
                ex.shutdown(timeout_sec=2.0)
            for thread in self._spinners:
                thread.join(timeout=5.0)
            for node in (self.adapter, self.probe):
                if node is not None:
                    node.destroy_node()
            gc.unfreeze()
        finally:
            for proc in reversed(self.processes):   # the adapter first, then the cell
                stop_process(proc)

    # ---------------------------------------------------------------- services
    def call(self, srv_type: Any, name: str, request: Any = None, timeout: float = 15.0,
             resend: float | None = None) -> Any:
        """Call a service from the probe and wait for the response; an idempotent request
        is sent again every ``resend`` seconds (the first answer to a new client can be
        lost while its reply topic is still being matched)."""
        cli = self.probe.client(srv_type, name)
        wait_until(cli.service_is_ready, f"service {name}", timeout)
        req = request if request is not None else srv_type.Request()
        futures = [cli.call_async(req)]
        end = time.monotonic() + timeout
        while not any(f.done() for f in futures):
            if time.monotonic() > end:
                ended = getattr(self, "spin_error", None)
                raise AssertionError(f"timed out after {timeout:g} s waiting for response "
                                     f"of {name}" + (f" (an executor of this process "
                                                     f"ended: {ended})" if ended else ""))
            if resend is not None and time.monotonic() > end - timeout + resend * len(futures):
                futures.append(cli.call_async(req))
            time.sleep(0.01)
        return next(f for f in futures if f.done()).result()

    def trigger(self, name: str) -> Trigger.Response:
        """Call a std_srvs/Trigger service (e.g. '/adapter/reset')."""
        return self.call(Trigger, name)

    def transition(self, transition_id: int, timeout: float = 20.0) -> bool:
        """Request a lifecycle transition of the adapter; True on success."""
        req = ChangeState.Request()
        req.transition.id = transition_id
        return bool(self.call(ChangeState, "/adapter/change_state", req, timeout).success)

    def state(self, timeout: float = 15.0) -> str:
        """The adapter's lifecycle state label."""
        return self.call(GetState, "/adapter/get_state", timeout=timeout,
                         resend=1.0).current_state.label

    def set_params(self, **values: Any) -> list[Any]:
        """Set adapter parameters ('__' for '.'); returns the SetParametersResult list."""
        params = self.probe.params
        wait_until(params.services_are_ready, "adapter parameter services")
        fut = params.set_parameters([Parameter(k.replace("__", "."), value=v)
                                     for k, v in values.items()])
        wait_until(fut.done, "set_parameters")
        return list(fut.result().results)

    def get_param(self, name: str) -> Any:
        """Current value of an adapter parameter."""
        params = self.probe.params
        wait_until(params.services_are_ready, "adapter parameter services")
        fut = params.get_parameters([name])
        wait_until(fut.done, "get_parameters")
        value = fut.result().values[0]
        return Parameter.from_parameter_msg(ParameterMsg(name=name, value=value)).value

    # ---------------------------------------------------------------- observations
    def diag(self, name: str = "adapter", since: float = 0.0) -> list[tuple]:
        """Diagnostics statuses of ``name`` received after monotonic time ``since``."""
        return [d for d in list(self.probe.diagnostics.get(name, [])) if d[0] > since]

    def wait_diag(self, pred: Callable[[dict[str, str]], bool], what: str,
                  name: str = "adapter", timeout: float = 10.0) -> tuple:
        """Wait for a fresh diagnostics status of ``name`` whose values satisfy ``pred``."""
        since = time.monotonic()

        def found() -> Any:
            for d in self.diag(name, since):
                if pred(d[3]):
                    return d
            return None
        return wait_until(found, what, timeout)

    def mode(self) -> str | None:
        """Mode after the latest decision record on ~/decisions (None before any)."""
        if not self.probe.decisions:
            return None
        return decode(self.probe.decisions[-1]).next_mode

    def wait_mode(self, mode: str, timeout: float = 20.0) -> None:
        """Wait until the decision records show ``mode``."""
        wait_until(lambda: self.mode() == mode, f"adapter mode '{mode}'", timeout)

    def wait_cell(self) -> None:
        """Wait until the reference server's windows and the relayed joint states arrive.
        The subscription stays until the probe goes: destroying it from this thread while
        the probe's executor waits on it ends that executor (rclpy's InvalidHandle,
        "destruction was requested"; seen on a loaded machine)."""
        seen: list[bool] = []
        self._js_seen = self.probe.create_subscription(
            JointState, "joint_states", lambda _: seen or seen.append(True), 10)
        wait_until(lambda: self.probe.last_window is not None and seen,
                   "the reference server and sim driver")

    def samples_since(self, t: float) -> list[Sample]:
        """Streamed setpoints with stamp >= ``t`` (ROS time)."""
        return [s for s in list(self.probe.setpoints) if s.stamp >= t]

    def now(self) -> float:
        """ROS time of the probe [s]."""
        return self.probe.get_clock().now().nanoseconds * 1e-9

    def wait_rest(self, hold: float = 0.2, timeout: float = 10.0) -> list[Sample]:
        """Wait until the stream has been at rest for ``hold`` seconds of stamps."""
        def resting() -> Any:
            recent = [s for s in list(self.probe.setpoints)[-int(hold * RATE * 2) - 2:]]
            if len(recent) < hold * RATE:
                return None
            window = [s for s in recent if s.stamp >= recent[-1].stamp - hold]
            return window if at_rest(window) else None
        return wait_until(resting, "the stream at rest", timeout)

    def start_following(self, timeout: float = 30.0) -> None:
        """configure + activate (asked again until the inputs are fresh), then follow."""
        self.wait_cell()
        if self.state() == "unconfigured":
            assert self.transition(Transition.TRANSITION_CONFIGURE), "configure failed"
        # activation is refused (and says why in the log) until joint states and a window
        # reached the adapter's new subscriptions: asked again, as bringup does
        wait_until(lambda: self.transition(Transition.TRANSITION_ACTIVATE),
                   "activation (fresh joint_states and a reference window)", timeout,
                   poll=0.3)
        self.wait_mode("following", timeout)

    def start_reference(self) -> None:
        """Start (or resume, when it was started before) the reference playback; nothing
        to do when it runs already."""
        res = self.trigger("/reference_server/start")
        if not res.success and "already started" in res.message:
            res = self.trigger("/reference_server/resume")
        assert res.success or "state: running" in res.message, res.message
