# SPDX-License-Identifier: Apache-2.0
"""Limits from robot descriptions shaped like real ones (invented robots in test/data/urdf).

Joint semantics checked here (URDF specification, wiki.ros.org/urdf/XML/joint, from
memory): the joints of a robot are the ``<joint>`` elements directly under ``<robot>``;
``<transmission>`` and ``ros2_control`` blocks only refer to joints by name; a ``fixed``
joint does not move; a ``continuous`` joint turns without position limits (``<limit>``
gives only velocity and effort); a ``prismatic`` joint moves along its axis with limits in
m and m/s; a joint with ``<mimic joint=...>`` follows another joint and is not commanded.
The expected values are read from the files here with ``xml.etree`` and ``yaml``, not with
the loader under test.
"""
from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
import yaml

from adaptive_streamer.core.adapter_setup import build_session
from adaptive_streamer.core.limits import JointLimits, LimitsError

DATA = Path(__file__).parent / "data" / "urdf"
TERN = DATA / "tern_arm_gripper.urdf"
TERN_DYN = DATA / "tern_arm_gripper.limits.yaml"
RAIL = DATA / "tern_rail.urdf"


def expected(urdf: Path, dyn: Path, names: list[str] | None = None) -> dict[str, dict]:
    """Per joint, what the URDF and the limits YAML say, read independently of the loader:
    the direct <joint> children of <robot> that move and mimic nothing; the YAML may only
    tighten (position range narrower, velocity lower)."""
    root = ET.parse(urdf).getroot()
    extra = yaml.safe_load(dyn.read_text())["joints"]
    out = {}
    for joint in root.findall("joint"):
        name, kind = joint.get("name"), joint.get("type")
        if kind == "fixed" or joint.find("mimic") is not None:
            continue
        if (names is None and name not in extra) or (names is not None and name not in names):
            continue
        lim, more = joint.find("limit"), extra[name]
        cont = kind == "continuous"
        lo = -math.inf if cont else float(lim.get("lower"))
        hi = math.inf if cont else float(lim.get("upper"))
        out[name] = {"min": lo, "max": hi, "continuous": cont,
                     "velocity": min(float(lim.get("velocity")), more.get("velocity", math.inf)),
                     "acceleration": more["acceleration"], "jerk": more["jerk"]}
    return out


def test_the_description_has_joint_references_outside_the_joints():
    # the point of the file: <joint> elements that are not joints (a loader walking every
    # <joint> element met one without a type)
    root = ET.parse(TERN).getroot()
    direct = root.findall("joint")
    assert len(list(root.iter("joint"))) > len(direct)
    assert all(j.get("type") for j in direct)
    assert root.find("transmission") is not None and root.find("ros2_control") is not None


def test_arm_limits_from_the_description_and_its_limits_yaml():
    lim = JointLimits.from_file(TERN)          # the limits YAML beside it (same stem)
    want = expected(TERN, TERN_DYN)
    assert list(lim.names) == list(want)       # URDF order
    for i, name in enumerate(lim.names):
        w = want[name]
        assert lim.position_min[i] == w["min"] and lim.position_max[i] == w["max"], name
        assert lim.velocity_max[i] == w["velocity"], name
        assert lim.acceleration_max[i] == w["acceleration"] and lim.jerk_max[i] == w["jerk"]
        assert bool(lim.continuous[i]) == w["continuous"], name
    roll = lim.index("tern_flange_roll")       # the continuous last axis: no position range
    assert lim.continuous[roll] and not lim.has_position_limits[roll]
    assert lim.velocity_max[lim.index("tern_arm_pitch")] == 1.2   # tightened by the YAML


def test_left_out_joints_are_reported_in_one_line():
    lim = JointLimits.from_file(TERN)
    note = lim.left_out
    assert "\n" not in note and str(TERN) in note
    assert "'tern_finger_a'" in note            # movable, but not named in the limits YAML
    assert "'tern_finger_b'" in note and "mimic" in note
    assert "tern_mount" not in note             # fixed joints are not mentioned
    assert JointLimits.from_file(RAIL).left_out == ""


def test_explicit_selection_selects_and_orders():
    dyn = yaml.safe_load(TERN_DYN.read_text())
    dyn["joints"]["tern_finger_a"] = {"acceleration": 0.5, "jerk": 5.0}
    pick = ["tern_finger_a", "tern_flange_roll", "tern_base_yaw"]
    lim = JointLimits.from_urdf_string(TERN.read_text(), dyn, joints=pick)
    assert list(lim.names) == pick
    # the prismatic finger keeps its metres: the URDF's [0, 0.035] m and 0.08 m/s
    root = ET.parse(TERN).getroot()
    finger = next(j for j in root.findall("joint") if j.get("name") == "tern_finger_a")
    assert finger.get("type") == "prismatic"
    assert lim.position_min[0] == float(finger.find("limit").get("lower"))
    assert lim.position_max[0] == float(finger.find("limit").get("upper"))
    assert lim.velocity_max[0] == float(finger.find("limit").get("velocity"))
    assert "not in the joint selection" in lim.left_out
    for name in ("tern_arm_pitch", "tern_wrist_roll"):
        assert f"'{name}'" in lim.left_out


@pytest.mark.parametrize("name, words", [
    ("tern_elbow", "has no movable joint 'tern_elbow'; movable joints: "),
    ("tern_tool_mount", "has no movable joint 'tern_tool_mount'"),    # fixed
    ("tern_finger_b", "'tern_finger_b' is a mimic joint"),
])
def test_a_selected_joint_the_description_cannot_command_is_refused(name, words):
    with pytest.raises(LimitsError, match=words) as info:
        JointLimits.from_file(TERN, joints=["tern_base_yaw", name])
    movable = [j.get("name") for j in ET.parse(TERN).getroot().findall("joint")
               if j.get("type") != "fixed" and j.find("mimic") is None]
    assert str(movable) in str(info.value)   # the description's movable joints are listed


def test_a_selected_joint_without_acceleration_and_jerk_is_refused():
    with pytest.raises(LimitsError, match="joint 'tern_finger_a' .* needs acceleration and jerk"):
        JointLimits.from_file(TERN, joints=["tern_base_yaw", "tern_finger_a"])


def test_prismatic_rail_and_revolute_turret():
    lim = JointLimits.from_file(RAIL)
    want = expected(RAIL, DATA / "tern_rail.limits.yaml")
    assert list(lim.names) == ["tern_rail_slide", "tern_turret_yaw"] == list(want)
    assert lim.position_min.tolist() == [want[n]["min"] for n in lim.names]
    assert lim.position_max.tolist() == [want[n]["max"] for n in lim.names]
    assert lim.velocity_max.tolist() == [want[n]["velocity"] for n in lim.names]
    assert not lim.continuous.any()


def test_a_joint_of_unknown_type_under_robot_is_still_refused():
    text = RAIL.read_text().replace('type="revolute"', 'type="revolving"')
    with pytest.raises(LimitsError, match="joint 'tern_turret_yaw' has unknown type 'revolving'"):
        JointLimits.from_urdf_string(text, DATA / "tern_rail.limits.yaml", source="rail")


def test_the_adapter_setup_takes_robot_description_and_the_joints_parameter():
    params = {"limits_file": "", "limits_dynamics": str(TERN_DYN), "policy": "hold",
              "joints": ["tern_wrist_pitch", "tern_base_yaw"]}
    setup = build_session(params, robot_description=TERN.read_text())
    assert setup.joints == ("tern_wrist_pitch", "tern_base_yaw")
    assert "not in the joint selection" in setup.limits_note
    setup = build_session({**params, "joints": [""]}, robot_description=TERN.read_text())
    assert list(setup.joints) == list(expected(TERN, TERN_DYN))
    assert "tern_finger_a" in setup.limits_note and "robot_description" in setup.limits_note
    np.testing.assert_array_equal(setup.session.limits.jerk_max,
                                  [v["jerk"] for v in expected(TERN, TERN_DYN).values()])


@pytest.mark.parametrize("joint, words", [
    ('<joint name="tern_rail_slide" type="fixed"><parent link="world"/>'
     '<child link="tern_rail_bed"/></joint>', "joint 'tern_rail_slide' is defined twice"),
    ('<joint type="fixed"><parent link="world"/><child link="tern_rail_bed"/></joint>',
     "a <joint> .* has no name"),
])
def test_a_malformed_joint_list_is_refused(joint, words):
    # joint names are unique within a robot (URDF specification, from memory)
    text = RAIL.read_text().replace("</robot>", joint + "</robot>")
    with pytest.raises(LimitsError, match=words):
        JointLimits.from_urdf_string(text, DATA / "tern_rail.limits.yaml", source="rail")
