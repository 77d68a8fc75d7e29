# SPDX-License-Identifier: Apache-2.0
"""The demo's effective configuration: params file, policy card, limits, seed, output, notes.

``--output`` picks the pair the adapter and the simulated driver use (`OUTPUT_PAIRS`):
``stream``, the params file's position output streamed at the stream rate to the driver's
``position`` interface; ``plan``, the adapter's plan-ahead output (``outputs: [plan]``,
``plan.type: plan`` on ``driver/plan``) to the driver's ``plan`` interface. In both the
driver publishes ``driver/followed`` (the noise-free motion it follows).
"""
from __future__ import annotations

import argparse
import copy
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from ..io.param_specs import ParamsCheckError, check_node_params, check_params_file
from ..core.feasibility import FeasibilityError, ensure_feasible
from ..core.limits import JointLimits, LimitsError
from ..core.policies import PolicyError, load_card
from ..core.reference import ReferenceTrajectory
from ..io.reference_bags import ReferenceFileError, load_reference
from ..sim.config import load_scenario
from ..io.policy_kinds import POLICY_KINDS
from ..share import KIND_CARDS, demo_file, expand

REFERENCE_ONLY_CARD = "policy_reference_only.yaml"
SLOW_DOWN_FRACTION = 0.8
PLAN_OUTPUT = {"type": "plan", "topic": "driver/plan"}


@dataclass(frozen=True)
class OutputPair:
    """What the adapter sends (its ``outputs`` list, each with its own parameters) and the
    simulated driver's ``command_interface`` that takes it."""

    adapter_outputs: dict[str, dict[str, str]] | None   # None: the params file's own
    command_interface: str


OUTPUT_PAIRS = {"stream": OutputPair(None, "position"),
                "plan": OutputPair({"plan": PLAN_OUTPUT}, "plan")}


class DemoError(RuntimeError):
    """The demo cannot run as asked (the message says why)."""


@dataclass
class DemoConfig:
    """Everything a demo run needs, resolved."""

    params: dict[str, Any]            # node name -> ros__parameters
    policy_card: Path
    policy_label: str
    limits_file: Path
    limits: JointLimits
    seed: int
    reference_duration: float         # seconds, after any slow-down
    reference: ReferenceTrajectory    # the pass as the reference server will play it
    stream_rate: float
    decision_period: float
    output: str = "stream"            # key of OUTPUT_PAIRS
    notes: list[str] = field(default_factory=list)

    def write_params(self, path: Path) -> Path:
        """Write the effective params file."""
        path.write_text(yaml.safe_dump({k: {"ros__parameters": v} for k, v in self.params.items()},
                                       sort_keys=False))
        return path


def _card_for(policy: str | None, limits_given: bool, notes: list[str]) -> tuple[Path, str]:
    """Resolve --policy (card path or kind) to a card file."""
    if policy is None:
        kind = "onnx"
        if limits_given:
            kind = "linear_feedback"
            notes.append("the ONNX policy was trained for config/demo/limits.yaml, so with "
                         "--limits the demo runs the linear_feedback policy")
        return demo_file(KIND_CARDS[kind]), kind
    if policy in KIND_CARDS:
        return demo_file(KIND_CARDS[policy]), policy
    if policy == "hold":
        return Path(), "hold"
    path = Path(policy)
    if not path.is_file():
        raise DemoError(f"--policy '{policy}': no such card file, and not one of the kinds "
                        f"{list(POLICY_KINDS)}")
    return path.resolve(), path.name


def _retarget(card: Path, kind: str, limits_file: Path, joints: tuple[str, ...],
              period: float, workdir: Path) -> Path:
    """A copy of ``card`` made for ``limits_file`` (or a built-in hold card)."""
    if kind == "hold":
        data: dict[str, Any] = {"policy_card": 1, "name": "hold (demo)", "kind": "hold",
                                "joints": list(joints), "decision_period": period}
    else:
        data = yaml.safe_load(card.read_text())
        if data.get("kind") == "onnx":
            raise DemoError(f"policy card {card} is an ONNX policy trained for its own limits; "
                            "it cannot run with --limits (choose --policy linear_feedback or "
                            "tracker, or retrain the model for those limits)")
        if "model" in data:
            data["model"] = str((card.parent / data["model"]).resolve())
    data["limits"] = str(limits_file)
    out = workdir / f"card_{kind}.yaml"
    out.write_text(yaml.safe_dump(data, sort_keys=False))
    return out


def _yaml_key_line(path: Path, key: str) -> int | None:
    """The line (1-based) of the top-level ``key`` of the YAML file ``path`` (None: not a
    YAML mapping that has it)."""
    try:
        node = yaml.compose(path.read_text())
    except (OSError, yaml.YAMLError):
        return None
    if not isinstance(node, yaml.MappingNode):
        return None
    return next((k.start_mark.line + 1 for k, _ in node.value
                 if isinstance(k, yaml.ScalarNode) and k.value == key), None)


def _check_joints(limits_file: Path, limits: JointLimits, joints: tuple[str, ...]) -> None:
    """`DemoError` naming ``limits_file`` (and the line of its ``joints:``) when it lacks a
    joint of the demo's arm."""
    absent = [j for j in joints if j not in limits.names]
    if absent:
        line = _yaml_key_line(limits_file, "joints")
        where = f"{limits_file}:{line}" if line is not None else str(limits_file)
        raise DemoError(f"{where}: joints: no limits for {absent} of the demo arm's joints "
                        f"{list(joints)} (the file gives {list(limits.names)})")


def _select_output(params: dict[str, Any], output: str) -> None:
    """Set the adapter's outputs and the driver's interface for ``--output`` (in place)."""
    if output not in OUTPUT_PAIRS:
        raise DemoError(f"--output '{output}': expected one of {sorted(OUTPUT_PAIRS)}")
    pair = OUTPUT_PAIRS[output]
    adapter, driver = params["adapter"], params["sim_driver"]
    if pair.adapter_outputs is not None:
        for name in adapter.get("outputs", []):
            adapter.pop(name, None)
        adapter["outputs"] = list(pair.adapter_outputs)
        adapter.update(copy.deepcopy(pair.adapter_outputs))
    driver["command_interface"] = pair.command_interface
    driver["publish_followed"] = True


def build_config(args: argparse.Namespace, workdir: Path) -> DemoConfig:
    """Resolve the demo options into a `DemoConfig` (files written into ``workdir``)."""
    notes: list[str] = []
    params_path = demo_file("params.yaml")
    try:
        check_params_file(params_path)
    except ParamsCheckError as exc:
        raise DemoError(str(exc)) from None
    data = yaml.safe_load(expand(params_path.read_text()))
    params = {k: copy.deepcopy(v["ros__parameters"]) for k, v in data.items()}
    adapter, ref = params["adapter"], params["reference_server"]
    period = float(adapter.get("decision_period", 0.05))
    rate = float(adapter.get("stream_rate", 250.0))
    limits_file = Path(args.limits).resolve() if args.limits else Path(adapter["limits_file"])
    try:
        limits = JointLimits.from_file(limits_file)
    except LimitsError as exc:
        raise DemoError(str(exc)) from None
    joints = tuple(params["sim_driver"]["joints"])
    if args.limits:
        _check_joints(limits_file, limits, joints)
    card, label = _card_for(args.policy, args.limits is not None, notes)
    made = args.limits is not None or label == "hold"
    if made:
        card = _retarget(card, label, limits_file, joints, period, workdir)
    try:
        load_card(card)
    except PolicyError as exc:
        if not made:
            raise DemoError(str(exc)) from None
        # the card is the demo's own, made in its temporary folder: name what the user gave
        raise DemoError(str(exc).replace(str(card), f"the demo's {label} card for "
                                         f"{limits_file}")) from None
    adapter["policy"] = str(card)
    adapter["limits_file"] = str(limits_file)
    ref["limits_file"] = str(limits_file)
    try:
        reference = load_reference(ref["reference_file"], limits=limits)
        played, factor, report = ensure_feasible(reference, limits, slow_down=True,
                                                 fraction=SLOW_DOWN_FRACTION)
    except (ReferenceFileError, FeasibilityError, LimitsError) as exc:
        raise DemoError(f"the demo reference does not fit the limits of {limits_file}: "
                        f"{exc}") from None
    if factor > 1.0:
        ref["slow_down"] = True
        ref["limit_fraction"] = SLOW_DOWN_FRACTION
        notes.append(f"the reference needs {100 * report.peak_ratio:.0f}% of the limits in "
                     f"{limits_file.name}; it is slowed down {factor:.2f}x to stay within "
                     f"{100 * SLOW_DOWN_FRACTION:.0f}% of them")
    scenario = load_scenario(params["edge_sensor"]["scenario"])
    seed = int(args.seed) if args.seed is not None else int(params["edge_sensor"].get("seed", scenario.seed))
    params["edge_sensor"]["seed"] = seed
    params["sim_driver"]["seed"] = seed
    _select_output(params, args.output)
    lock = scenario.lock_on
    if lock is not None and lock.feature in load_card(card).feedback_features:
        ref.update({"start_condition": "lock_on", "lock_on.feature": lock.feature,
                    "lock_on.tolerance": lock.tolerance, "lock_on.hold": lock.hold,
                    "lock_on.timeout": lock.timeout, "lock_on.max_age": lock.max_age})
    problems = [p for kind, values in params.items()
                for p in check_node_params(kind, values, "the demo's effective params")]
    if problems:
        raise DemoError("\n".join(problems))
    return DemoConfig(params, card, label, limits_file, limits, seed,
                      played.duration, played, rate, period, args.output, notes)

