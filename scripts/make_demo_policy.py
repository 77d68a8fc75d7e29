#!/usr/bin/env python3
# SPDX-License-Identifier: Apache-2.0
"""Build and check the demo's policy cards and the learned edge-following model.

Writes into ``config/demo/`` (invented data for the demo):

* ``policy_reference_only.yaml`` — kind ``tracker``: follow the nominal reference, no
  adaptation (the comparison baseline).
* ``policy_feedback.yaml`` — kind ``linear_feedback``: the tracker plus a gain matrix from
  the line sensor's ``edge_offset`` and ``edge_angle`` to joint accelerations.
* ``policy_edge.yaml`` + ``policy_edge.onnx`` — kind ``onnx``: a small network (a linear
  path plus 16 tanh units) cloned from a teacher controller on closed-loop runs.

Design of the feedback law
--------------------------
Lateral direction in joint space. Moving the nozzle along the nominal edge normal ``n``
(table plane) without moving it otherwise (no height, along-edge or orientation change)
takes the joint direction ``c = J(q_mid)^-1 [n; 0; 0; 0]`` [rad per m], ``J`` the arm's
geometric Jacobian (`ArmKinematics.jacobian`, Spong et al. 2006, sec. 4.6) at the middle
of the nominal pass. Along the pass the lateral component of ``J c`` stays between 0.91
and 1 (printed below): the loop gain varies by less than 10%, so one constant matrix
suffices.

Lateral loop. With the tracker gains ``kp, kd`` acting on the joint deviation from the
reference and the feedback ``u += -g c f`` (``f`` the measured offset [m]), the lateral
deviation ``x`` [m] obeys ``x'' + kd x' + kp x = -g f(t - tau)``, ``f = x + e`` with ``e``
the nominal path's error. The loop ``L(s) = g e^{-s tau} / (s^2 + kd s + kp)`` must keep
a phase margin with the total delay ``tau`` (decision one period ahead plus the half
period of the acceleration ramp, sensor latency and sample hold, driver delay and lag —
estimated below from the settings). The steady-state residual of a constant error is
``kp / (kp + g)``, so ``kp`` is small (it only pulls non-lateral drift back to the
reference) and ``g`` is set for about 40 degrees of phase margin.

Edge angle. Travelling at speed ``V`` along an edge at angle ``theta`` to the travel
axis, the offset changes at ``-V sin(theta)``; the damping ``kd`` would resist the lateral
velocity that follows it, so the feed-forward ``u += kd V theta c`` cancels that lag. The
linear card uses the cruise speed for ``V``; the teacher of the learned model uses the
nominal nozzle speed ``|J(q_ref) v_ref|`` from the reference velocity at each decision,
which a constant matrix cannot express.

Learned model. Behaviour cloning: the teacher (tracker + offset feedback + speed-scheduled
angle feed-forward) runs in closed loop (`run_closed_loop`) on training seeds 100-105;
every input it saw is kept, plus copies with the planned state perturbed (so the student
also learns the teacher's reaction to states the teacher never visits: without them the
joints the teacher never moves get no restoring gain and drift), with the feedback
invalid, and with the angle redrawn over +-2 degrees, each labelled by the teacher. The
model is ``obs W0 + b0 + tanh(sel W1 + b1) W2 + b2`` with ``sel`` = the reference velocity
one period ahead (the joints the reference moves) and the edge angle: ``W0, b0`` by ridge
least squares on the teacher's linear term, then the tanh part on what remains of the
teacher's action by L-BFGS (scipy.optimize.minimize) from a seeded start. The graph is
built with onnx.helper, checked with onnxruntime against numpy and
onnx.reference.ReferenceEvaluator. The fit is deterministic for a given BLAS thread
count (other thread counts change the rounding, not the fit error).

Checks (exit status 1 if one fails): the fit error; closed-loop runs on seeds 0-9
(never used for training) of the reference-only, feedback and learned policies — lateral
error RMS/max over the pass per seed and the medians, limit usage, planned deviation and
trips. Targets: median adapted RMS below 0.5 of the reference-only RMS, no limit
violation, no watchdog trip.

    python scripts/make_demo_policy.py [--out DIR] [--seeds N] [--skip-check]
"""
from __future__ import annotations

import argparse
import math
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from scipy.optimize import brentq, minimize

from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.observation import ObservationBlock, ObservationLayout
from adaptive_streamer.core.policies import build_policy, load_card, parse_card
from adaptive_streamer.core.policies.base import Policy, PolicyInputs, RunningConfig
from adaptive_streamer.core.reference_files import load_reference_file as load_reference
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.sim.arm import DEMO_ARM
from adaptive_streamer.sim.closed_loop import (EDGE_FEATURES, CellSettings,
                                                         ClosedLoopResult, run_closed_loop)
from adaptive_streamer.sim.config import Scenario, load_scenario

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "config" / "demo"

KP = 1.0            # 1/s^2, tracker stiffness (pulls non-lateral drift back)
KD = 10.0           # 1/s, tracker damping (lateral and joint-space)
G_OFFSET = 40.0     # 1/s^2, lateral acceleration per metre of edge offset
HIDDEN = 16         # tanh units of the learned model
NEGLIGIBLE = 1e-5   # relative size below which a gain-matrix entry is written as 0
RIDGE = 1e-9        # ridge weight of the linear path, relative to the mean input power
TRAIN_SEEDS = tuple(range(100, 106))
FIT_SEED = 20240    # initial weights and augmentation draws
ANGLE_SPAN = math.radians(2.0)
STATE_NOISE = (2e-3, 1e-2, 5e-2)   # rad, rad/s, rad/s^2: perturbation of the planned state
OFFSET_SCALE = 0.005  # m, observation scale of edge_offset
ANGLE_SCALE = 0.02    # rad, observation scale of edge_angle
REF_SCALE = 0.01      # rad, observation scale of reference_position
OBSERVATION = [
    "joint_velocity", "joint_acceleration",
    {"block": "reference_position", "horizon": 2, "scale": REF_SCALE},
    {"block": "reference_velocity", "horizon": 2},
    {"block": "reference_acceleration", "horizon": 2},
    {"block": "feedback", "features": list(EDGE_FEATURES),
     "scale": [OFFSET_SCALE, ANGLE_SCALE]},
]


def observation_blocks() -> list[ObservationBlock]:
    """`OBSERVATION` as observation blocks (the layout the card declares)."""
    blocks = []
    for b in OBSERVATION:
        if isinstance(b, str):
            blocks.append(ObservationBlock(b))
            continue
        scale = b.get("scale", 1.0)
        blocks.append(ObservationBlock(
            b["block"], horizon=b.get("horizon", 0),
            scale=tuple(scale) if isinstance(scale, list) else (scale,),
            features=tuple(b.get("features", ())),
            offset=(0.0,) * len(b.get("features", ())) or (0.0,)))
    return blocks


# ---------------------------------------------------------------------------- design
def lateral_direction(scenario: Scenario, q_mid: np.ndarray) -> np.ndarray:
    """Joint direction [rad/m] moving the nozzle along the nominal edge normal only."""
    n = np.r_[scenario.nominal_panel.nominal_normal, 0.0]
    return np.linalg.solve(DEMO_ARM.jacobian(q_mid), np.r_[n, 0.0, 0.0, 0.0])


def loop_delay(settings: CellSettings, scenario: Scenario) -> float:
    """Estimated delay [s] from a nozzle displacement to the acceleration it causes."""
    T, s, p = settings.decision_period, scenario.sensor, settings.plant
    decision = T + T / 2                      # decided a period ahead, reached linearly
    sensing = s.latency + 0.5 / s.rate + 0.5 / settings.driver_rate
    driver = (p.delay_ticks + 1) / settings.driver_rate + 2 * p.damping / p.natural_frequency
    return decision + sensing + driver


def loop_margins(kp: float, kd: float, g: float, tau: float) -> tuple[float, float, float]:
    """Crossover [rad/s], phase margin [deg] and delay margin [s] of
    ``L(s) = g e^{-s tau} / (s^2 + kd s + kp)`` (Nyquist criterion on the open loop; the
    delay margin is the extra delay that brings the phase margin to zero)."""
    def gain(w: float) -> float:
        return g / abs(complex(kp - w * w, kd * w)) - 1.0
    wc = brentq(gain, 1e-6, 1e3)
    phase = -math.atan2(kd * wc, kp - wc * wc) - wc * tau
    pm = math.pi + phase
    return wc, math.degrees(pm), pm / wc


def feedback_matrix(c: np.ndarray, cruise_speed: float) -> np.ndarray:
    """Gain matrix (n, 2): columns edge_offset [rad/s^2 per m], edge_angle [per rad];
    entries below `NEGLIGIBLE` of their column's largest are set to 0 (round-off of the
    Jacobian solve on joints that do not take part)."""
    m = np.column_stack([-G_OFFSET * c, KD * cruise_speed * c])
    m[np.abs(m) < NEGLIGIBLE * np.abs(m).max(axis=0)] = 0.0
    return m


# ---------------------------------------------------------------------------- cards
def _matrix_yaml(m: np.ndarray, joints: tuple[str, ...]) -> str:
    rows = [f"    - [{', '.join(f'{x:.6g}' for x in row)}]   # {j}" for row, j in zip(m, joints)]
    return "\n".join(rows)


def _description(text: str) -> str:
    return "description: |\n" + "\n".join(f"  {line}".rstrip() for line in text.splitlines())


def card_header(title: str) -> str:
    """First lines of every card file."""
    return (f"# {title}\n# Written by scripts/make_demo_policy.py (invented demo data); "
            "format: adaptive_streamer/core/policies/card.py.\n")


def reference_only_card(joints: tuple[str, ...], period: float) -> str:
    """The tracker card (reference only)."""
    return (card_header("Demo baseline: follow the nominal reference, no adaptation.")
            + "policy_card: 1\nname: demo_reference_only\n"
            + _description("Reference tracking only (default critically damped gains): the "
                           "bead follows the\nnominal edge, so it carries the panel's "
                           "placement error.") + "\n"
            + f"kind: tracker\njoints: [{', '.join(joints)}]\ndecision_period: {period:g}\n"
            + "limits: limits.yaml\n")


def feedback_card(joints: tuple[str, ...], period: float, m: np.ndarray, c: np.ndarray,
                  speed: float, tau: float, margins: tuple[float, float, float]) -> str:
    """The linear_feedback card."""
    wc, pm, dm = margins
    shown = np.where(np.abs(c) < NEGLIGIBLE * np.abs(c).max(), 0.0, c)
    text = (f"Tracker (kp {KP:g} 1/s^2, kd {KD:g} 1/s) plus edge feedback along the joint "
            "direction\n"
            f"c = J(q_mid)^-1 [n; 0] = [{', '.join(f'{x:.4g}' for x in shown)}] rad/m,\n"
            "which moves the nozzle along the nominal edge normal n only (J: arm Jacobian "
            "at the\nmiddle of the pass).\n"
            f"edge_offset column: -g c with g = {G_OFFSET:g} 1/s^2 (lateral loop: crossover "
            f"{wc:.2f} rad/s,\nphase margin {pm:.0f} deg, delay margin {1e3 * dm:.0f} ms "
            f"beyond the estimated {1e3 * tau:.0f} ms loop delay;\nresidual of a constant "
            f"offset kp/(kp+g) = {KP / (KP + G_OFFSET):.3f}).\n"
            f"edge_angle column: kd V c with V = {1e3 * speed:g} mm/s (the cruise speed): "
            "the lateral velocity\nthat keeps the nozzle on an edge at an angle to the "
            "travel axis.\nFeedback filter: none (filtering adds delay; the loop itself "
            "averages the noise).")
    return (card_header("Demo adaptation: tracker + linear edge feedback.")
            + "policy_card: 1\nname: demo_feedback\n" + _description(text) + "\n"
            + f"kind: linear_feedback\njoints: [{', '.join(joints)}]\n"
            + f"decision_period: {period:g}\nlimits: limits.yaml\n"
            + f"gains: {{kp: {KP:g}, kd: {KD:g}, feedforward: 1.0}}\n"
            + "feedback_gain:\n"
            + f"  features: [{', '.join(EDGE_FEATURES)}]\n"
            + "  matrix:   # rows: joints; columns: edge_offset [rad/s^2 per m], "
              "edge_angle [rad/s^2 per rad]\n"
            + _matrix_yaml(m, joints) + "\n")


def edge_card(joints: tuple[str, ...], period: float, fit: dict[str, float]) -> str:
    """The onnx card of the learned model."""
    obs = []
    for b in OBSERVATION:
        if isinstance(b, str):
            obs.append(f"  - {b}")
        else:
            items = ", ".join(f"{k}: {v}" if not isinstance(v, list)
                              else f"{k}: [{', '.join(str(x) for x in v)}]"
                              for k, v in b.items())
            obs.append(f"  - {{{items}}}")
    text = (f"Learned edge follower: obs W0 + b0 + tanh(sel W1 + b1) W2 + b2 ({HIDDEN} tanh "
            "units;\nsel = reference velocity one period ahead and the edge angle), cloned "
            "from a teacher:\nthe feedback card's tracker and edge_offset gain, with the "
            "edge-angle feed-forward\nscheduled by the nominal nozzle speed |J(q_ref) v_ref| "
            "instead of the cruise speed.\n"
            f"Training: closed-loop teacher runs on seeds {TRAIN_SEEDS[0]}-{TRAIN_SEEDS[-1]} "
            f"({fit['samples']:.0f} samples with augmentation);\nfit RMS "
            f"{fit['rms']:.2e} rad/s^2, max {fit['max']:.2e} rad/s^2 (teacher outputs up to "
            f"{fit['scale']:.2g}).\nAction: absolute joint acceleration [rad/s^2], clipped "
            "into the admissible interval.")
    return (card_header("Demo adaptation: learned edge follower (ONNX).")
            + "policy_card: 1\nname: demo_edge_onnx\n" + _description(text) + "\n"
            + f"kind: onnx\nmodel: policy_edge.onnx\njoints: [{', '.join(joints)}]\n"
            + f"decision_period: {period:g}\nlimits: limits.yaml\n"
            + "observation:\n" + "\n".join(obs) + "\n"
            + "action: acceleration\n"
            + "onnx: {input: obs, output: action, intra_op_threads: 1}\n")


# ---------------------------------------------------------------------------- teacher
class ScheduledTeacher:
    """Tracker + edge_offset feedback (a linear_feedback policy) + ``kd V theta c`` with
    ``V = |J(q_ref[1]) v_ref[1]|`` the nominal nozzle speed one period ahead."""

    action_meaning = "acceleration"
    needs_feedback = EDGE_FEATURES

    def __init__(self, base: Policy, c: np.ndarray) -> None:
        self.card = base.card
        self._base, self._c = base, c

    def reset(self) -> None:
        """Stateless."""

    def parts(self, inputs: PolicyInputs) -> tuple[np.ndarray, np.ndarray]:
        """The two terms of the action: the linear_feedback part and the feed-forward."""
        u = self._base.act(inputs)
        fb = inputs.feedback
        zero = np.zeros_like(u)
        if fb is None:
            return u, zero
        k = fb.names.index("edge_angle")
        if not fb.valid[k]:
            return u, zero
        q, v = inputs.ref_positions[1], inputs.ref_velocities[1]
        speed = float(np.linalg.norm((DEMO_ARM.jacobian(q) @ v)[:3]))
        return u, KD * speed * fb.values[k] * self._c

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """Teacher acceleration (n,)."""
        u, ff = self.parts(inputs)
        return u + ff


class Recorder:
    """Runs a policy and keeps every input it was given."""

    def __init__(self, policy: Policy) -> None:
        self.card, self.action_meaning = policy.card, policy.action_meaning
        self.needs_feedback = policy.needs_feedback
        self._policy = policy
        self.inputs: list[PolicyInputs] = []

    def reset(self) -> None:
        """Forget nothing (the recording spans runs)."""

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """The wrapped policy's action; the inputs are kept."""
        self.inputs.append(inputs)
        return self._policy.act(inputs)


def augmented(inputs: list[PolicyInputs], rng: np.random.Generator) -> list[PolicyInputs]:
    """The recorded inputs, plus copies with the planned state perturbed (Gaussian,
    `STATE_NOISE`: the student must learn the teacher's reaction to states the teacher
    itself never visits), with the feedback invalid, and with the edge angle redrawn
    uniformly in +-ANGLE_SPAN."""
    out = list(inputs)
    for x in inputs:
        p, v, a = (s + rng.normal(0.0, sd, s.shape) for s, sd in zip(x.state, STATE_NOISE))
        out.append(replace(x, state=MotionState(p, v, a)))
        fb = x.feedback
        if fb is None:
            continue
        k = fb.names.index("edge_angle")
        values = fb.values.copy()
        values[k] = rng.uniform(-ANGLE_SPAN, ANGLE_SPAN)
        out.append(replace(x, feedback=FeatureVector(fb.names, values, fb.valid.copy(),
                                                     fb.stamp)))
        if rng.random() < 0.25:
            nan = np.full(len(fb.names), np.nan)
            out.append(replace(x, feedback=FeatureVector(fb.names, nan,
                                                         np.zeros(len(fb.names), bool), None)))
    return out


# ---------------------------------------------------------------------------- model
def fit_model(obs: np.ndarray, linear: np.ndarray, feedforward: np.ndarray, sel: np.ndarray,
              rng: np.random.Generator) -> dict[str, np.ndarray]:
    """The linear path on the teacher's linear term (ridge least squares), then the tanh
    part (L-BFGS) on what the linear path leaves of the whole action."""
    x1 = np.column_stack([obs, np.ones(len(obs))])
    gram = x1.T @ x1
    ridge = RIDGE * np.trace(gram) / len(gram) * np.eye(len(gram))
    ridge[-1, -1] = 0.0                       # the bias is not penalised
    coef = np.linalg.solve(gram + ridge, x1.T @ linear)
    w0, b0 = coef[:-1], coef[-1]
    residual = linear + feedforward - x1 @ coef
    xs = obs[:, sel]
    mu, sd = xs.mean(axis=0), xs.std(axis=0)
    z = (xs - mu) / sd
    n_in, n_out = z.shape[1], residual.shape[1]
    shapes = [(n_in, HIDDEN), (HIDDEN,), (HIDDEN, n_out), (n_out,)]
    sizes = [int(np.prod(s)) for s in shapes]

    def unpack(theta: np.ndarray) -> list[np.ndarray]:
        parts, at = [], 0
        for shape, size in zip(shapes, sizes):
            parts.append(theta[at:at + size].reshape(shape))
            at += size
        return parts

    def loss(theta: np.ndarray) -> tuple[float, np.ndarray]:
        w1, b1, w2, b2 = unpack(theta)
        h = np.tanh(z @ w1 + b1)
        err = h @ w2 + b2 - residual
        m = len(z)
        dy = 2.0 * err / m
        dh = (dy @ w2.T) * (1.0 - h * h)
        grad = [z.T @ dh, dh.sum(axis=0), h.T @ dy, dy.sum(axis=0)]
        return float(np.sum(err * err) / m), np.concatenate([g.ravel() for g in grad])

    theta0 = np.concatenate([rng.normal(0.0, 1.0 / math.sqrt(n_in), sizes[0]),
                             np.zeros(sizes[1]),
                             rng.normal(0.0, 1e-3, sizes[2]), np.zeros(sizes[3])])
    res = minimize(loss, theta0, jac=True, method="L-BFGS-B",
                   options={"maxiter": 4000, "maxfun": 8000, "gtol": 1e-14, "ftol": 1e-16})
    w1, b1, w2, b2 = unpack(res.x)
    # fold the input standardisation into the first layer
    return {"W0": w0, "b0": b0, "W1": w1 / sd[:, None], "b1": b1 - (mu / sd) @ w1,
            "W2": w2, "b2": b2}


def model_numpy(params: dict[str, np.ndarray], obs: np.ndarray, sel: np.ndarray) -> np.ndarray:
    """The model in float64 numpy (obs (N, size) -> (N, n))."""
    h = np.tanh(obs[:, sel] @ params["W1"] + params["b1"])
    return obs @ params["W0"] + params["b0"] + h @ params["W2"] + params["b2"]


def build_onnx(params: dict[str, np.ndarray], size: int, sel: np.ndarray, n: int
               ) -> onnx.ModelProto:
    """The graph ``action = obs W0 + b0 + tanh(Gather(obs, sel) W1 + b1) W2 + b2``."""
    f32 = {k: numpy_helper.from_array(np.asarray(v, np.float32), k) for k, v in params.items()}
    inits = list(f32.values()) + [numpy_helper.from_array(sel.astype(np.int64), "sel")]
    nodes = [
        helper.make_node("MatMul", ["obs", "W0"], ["lin_m"]),
        helper.make_node("Add", ["lin_m", "b0"], ["lin"]),
        helper.make_node("Gather", ["obs", "sel"], ["picked"], axis=1),
        helper.make_node("MatMul", ["picked", "W1"], ["h_m"]),
        helper.make_node("Add", ["h_m", "b1"], ["h_z"]),
        helper.make_node("Tanh", ["h_z"], ["h"]),
        helper.make_node("MatMul", ["h", "W2"], ["r_m"]),
        helper.make_node("Add", ["r_m", "b2"], ["res"]),
        helper.make_node("Add", ["lin", "res"], ["action"]),
    ]
    graph = helper.make_graph(
        nodes, "demo_edge_policy",
        [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, size])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, n])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)],
                              producer_name="adaptive_streamer scripts/make_demo_policy.py")
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model


def check_onnx(path: Path, obs: np.ndarray, expected: np.ndarray) -> float:
    """Largest |onnxruntime - expected| and |ReferenceEvaluator - onnxruntime| over ``obs``."""
    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    sess = ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])
    ref = ReferenceEvaluator(str(path))
    worst = 0.0
    for row, want in zip(obs.astype(np.float32), expected):
        got = sess.run(None, {"obs": row[None]})[0][0]
        alt = ref.run(None, {"obs": row[None]})[0][0]
        worst = max(worst, float(np.max(np.abs(got - want))), float(np.max(np.abs(got - alt))))
    return worst


# ---------------------------------------------------------------------------- checks
def closed_loop_table(title: str, policy: Path | str, seeds: range, baseline: dict[int, float]
                      | None) -> tuple[dict[int, ClosedLoopResult], bool]:
    """Run one policy on ``seeds``, print per-seed and median figures; True if within targets."""
    print(f"\n{title} ({policy if isinstance(policy, str) else policy.name})")
    print("  seed  offset[mm] angle[deg]  RMS[mm]  max[mm]" + ("  RMS/ref" if baseline else "")
          + "  trips")
    results, ok = {}, True
    for s in seeds:
        r = run_closed_loop(policy, s)
        results[s] = r
        sm = r.summary
        ratio = f"  {sm.lateral_rms / baseline[s]:7.3f}" if baseline else ""
        print(f"  {s:4d}  {1e3 * r.panel.offset:+9.2f}  {math.degrees(r.panel.angle):+9.2f}"
              f"  {1e3 * sm.lateral_rms:7.3f}  {1e3 * sm.lateral_max:7.3f}{ratio}"
              f"  {','.join(sm.trips) or '-'}")
        ok &= not sm.trips and sm.limit_usage.violations == 0
    rms = np.array([results[s].summary.lateral_rms for s in seeds])
    mx = np.array([results[s].summary.lateral_max for s in seeds])
    line = f"  median RMS {1e3 * np.median(rms):.3f} mm, median max {1e3 * np.median(mx):.3f} mm"
    if baseline:
        ratios = rms / np.array([baseline[s] for s in seeds])
        line += (f"; RMS / reference-only: median {np.median(ratios):.3f}, "
                 f"ratio of medians {np.median(rms) / np.median(list(baseline.values())):.3f}")
        ok &= bool(np.median(ratios) < 0.5)
    print(line)
    usage = np.array([[r.summary.limit_usage.velocity, r.summary.limit_usage.acceleration,
                       r.summary.limit_usage.jerk] for r in results.values()]).max(axis=0)
    print("  peak limit usage [% of limit] v " + " ".join(f"{100 * x:5.1f}" for x in usage[0])
          + " | a " + " ".join(f"{100 * x:5.1f}" for x in usage[1])
          + " | j " + " ".join(f"{100 * x:5.1f}" for x in usage[2]))
    dj = max(r.summary.deviation_joint_max for r in results.values())
    dn = max(r.summary.deviation_norm_max for r in results.values())
    fe = max(r.summary.following_error_max for r in results.values())
    viol = sum(r.summary.limit_usage.violations for r in results.values())
    print(f"  limit violations {viol}; planned deviation max {dj:.4f} rad (joint), "
          f"{dn:.4f} rad (norm); following error max {fe:.4f} rad")
    return results, ok


def main(argv: list[str] | None = None) -> int:
    """Entry point; see the module docstring."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=DEMO,
                    help="folder of the cards and model (it must hold limits.yaml, which the "
                    "cards name)")
    ap.add_argument("--seeds", type=int, default=10, help="closed-loop check seeds 0..N-1")
    ap.add_argument("--skip-check", action="store_true", help="build only")
    args = ap.parse_args(argv)
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)
    scenario = load_scenario(DEMO / "scenario.yaml")
    limits = JointLimits.from_file(DEMO / "limits.yaml")
    reference = load_reference(DEMO / "reference.csv", limits=limits)
    settings = CellSettings()
    period, joints = settings.decision_period, limits.names
    t0 = time.perf_counter()

    # --- design
    q_mid = reference.sample(np.array([reference.duration / 2]))[0][0]
    c = lateral_direction(scenario, q_mid)
    n3 = np.r_[scenario.nominal_panel.nominal_normal, 0.0]
    along = reference.sample(np.linspace(0.0, reference.duration, 41))[0]
    lateral_gain = (DEMO_ARM.jacobian(along) @ c)[:, :3] @ n3
    tau = loop_delay(settings, scenario)
    margins = loop_margins(KP, KD, G_OFFSET, tau)
    speed = scenario.nominal_pass.cruise_speed
    print("lateral joint direction c [rad/m]: " + " ".join(f"{x:+.4f}" for x in c))
    print(f"  lateral component of J c along the pass: {lateral_gain.min():.3f} .. "
          f"{lateral_gain.max():.3f} (1 = exact)")
    print(f"loop delay estimate {1e3 * tau:.0f} ms; kp {KP:g}, kd {KD:g}, g {G_OFFSET:g}: "
          f"crossover {margins[0]:.2f} rad/s, phase margin {margins[1]:.0f} deg, delay "
          f"margin {1e3 * margins[2]:.0f} ms, constant-offset residual "
          f"{KP / (KP + G_OFFSET):.3f}")
    for g in (20.0, 60.0, 80.0):
        wc, pm, dm = loop_margins(KP, KD, g, tau)
        print(f"  (for comparison g {g:g}: crossover {wc:.2f} rad/s, phase margin {pm:.0f} deg,"
              f" residual {KP / (KP + g):.3f})")
    m = feedback_matrix(c, speed)
    (out / "policy_reference_only.yaml").write_text(reference_only_card(joints, period))
    fb_path = out / "policy_feedback.yaml"
    fb_path.write_text(feedback_card(joints, period, m, c, speed, tau, margins))
    running = RunningConfig(joints, period, limits, settings.horizon, EDGE_FEATURES)
    for path in (out / "policy_reference_only.yaml", fb_path):
        build_policy(load_card(path), running)
    print(f"wrote {out / 'policy_reference_only.yaml'} and {fb_path}")

    # --- behaviour cloning
    base = parse_card({"policy_card": 1, "name": "teacher", "kind": "linear_feedback",
                       "joints": list(joints), "decision_period": period,
                       "limits": limits.to_dict(),
                       "gains": {"kp": KP, "kd": KD, "feedforward": 1.0},
                       "feedback_gain": {"features": list(EDGE_FEATURES),
                                         "matrix": np.column_stack([m[:, 0], 0 * m[:, 1]])
                                         .tolist()}}, "teacher", out)
    teacher = ScheduledTeacher(build_policy(base, running), c)
    recorder = Recorder(teacher)
    for s in TRAIN_SEEDS:
        run_closed_loop(recorder, s)
    rng = np.random.default_rng(FIT_SEED)
    samples = augmented(recorder.inputs, rng)
    layout = ObservationLayout(observation_blocks(), limits)
    obs = np.array([layout.build(x) for x in samples], np.float64)
    lin_target, ff_target = (np.array(x) for x in zip(*(teacher.parts(x) for x in samples)))
    target = lin_target + ff_target
    blocks = {b.kind: s for b, s in zip(layout.blocks, layout.slices)}
    rv = blocks["reference_velocity"]
    fbs = blocks["feedback"]
    sel = np.r_[np.arange(rv.start + len(joints), rv.stop), fbs.start + 1]
    sel = sel[obs[:, sel].std(axis=0) > 1e-6]   # a joint the reference never moves adds nothing
    params = fit_model(obs, lin_target, ff_target, sel, rng)
    pred = model_numpy(params, obs, sel)
    err = pred - target
    fit = {"rms": float(np.sqrt(np.mean(err ** 2))), "max": float(np.abs(err).max()),
           "scale": float(np.abs(target).max()), "samples": float(len(samples))}
    lin_only = obs @ params["W0"] + params["b0"] - lin_target
    print(f"\nbehaviour cloning: {len(recorder.inputs)} teacher decisions on seeds "
          f"{TRAIN_SEEDS[0]}-{TRAIN_SEEDS[-1]}, {len(samples)} samples with augmentation")
    print(f"  fit error RMS {fit['rms']:.3e}, max {fit['max']:.3e} rad/s^2; linear path vs "
          f"the linear term: max {np.abs(lin_only).max():.3e}; feed-forward term up to "
          f"{np.abs(ff_target).max():.3g}; teacher |u| up to {fit['scale']:.3g}")
    model = build_onnx(params, layout.size, sel, len(joints))
    model_path = out / "policy_edge.onnx"
    onnx.save(model, str(model_path))
    (out / "policy_edge.yaml").write_text(edge_card(joints, period, fit))
    build_policy(load_card(out / "policy_edge.yaml"), running)
    worst = check_onnx(model_path, obs[::7], pred[::7])
    print(f"wrote {model_path} ({model_path.stat().st_size} bytes) and "
          f"{out / 'policy_edge.yaml'}; onnxruntime vs numpy/ReferenceEvaluator max "
          f"{worst:.2e}")
    ok = worst < 1e-4 and fit["max"] < 0.02 * fit["scale"]
    print(f"build took {time.perf_counter() - t0:.1f} s")
    if args.skip_check:
        return 0 if ok else 1

    # --- closed-loop figures
    seeds = range(args.seeds)
    ref_runs, ok_ref = closed_loop_table("reference only", out / "policy_reference_only.yaml",
                                         seeds, None)
    baseline = {s: r.summary.lateral_rms for s, r in ref_runs.items()}
    _, ok_fb = closed_loop_table("linear feedback", fb_path, seeds, baseline)
    _, ok_edge = closed_loop_table("learned (onnx)", out / "policy_edge.yaml", seeds, baseline)
    print(f"\ntotal {time.perf_counter() - t0:.1f} s")
    if not (ok and ok_ref and ok_fb and ok_edge):
        print("error: a check failed (fit, trips, limit violations or the error target)",
              file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
