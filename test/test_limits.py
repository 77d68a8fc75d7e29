# SPDX-License-Identifier: Apache-2.0
"""JointLimits: validation messages, the own YAML, URDF with a limits YAML beside it, subsets."""
import math

import numpy as np
import pytest

from adaptive_streamer.core.limits import JointLimits, LimitsError

URDF = """<robot name="invented_cell">
  <link name="base"/><link name="l1"/><link name="l2"/><link name="tool"/>
  <joint name="j1" type="revolute"><parent link="base"/><child link="l1"/>
    <limit lower="-2.5" upper="2.0" velocity="1.5" effort="10"/></joint>
  <joint name="j2" type="continuous"><parent link="l1"/><child link="l2"/>
    <limit velocity="3.0" effort="5"/></joint>
  <joint name="fixed_tool" type="fixed"><parent link="l2"/><child link="tool"/></joint>
</robot>
"""
DYNAMICS = """joints:
  j1: {acceleration: 6.0, jerk: 60.0, velocity: 1.2}
  j2: {acceleration: 9.0, jerk: 90.0}
"""


def make(**over):
    values = dict(names=["a", "b"], position_min=[-1.0, -2.0], position_max=[1.0, 2.0],
                  velocity_max=[2.0, 2.0], acceleration_max=[8.0, 8.0], jerk_max=[80.0, 80.0])
    values.update(over)
    return JointLimits(**values)


@pytest.mark.parametrize("over, words", [
    ({"names": ["a", "a"]}, "joint 'a' is listed twice"),
    ({"position_min": [1.5, -2.0]}, "joint 'a': position_min 1.5 must be below position_max 1"),
    ({"velocity_max": [2.0, -1.0]}, "joint 'b': velocity_max must be finite and positive"),
    ({"jerk_max": [math.nan, 80.0]}, "joint 'a': jerk_max must be finite and positive"),
    ({"acceleration_max": [8.0, math.inf]}, "joint 'b': acceleration_max must be finite"),
    ({"position_min": [math.nan, -2.0]}, "joint 'a': position limit is NaN"),
    ({"position_max": [math.inf, 2.0]}, "joint 'a': position limits must both be finite"),
    ({"velocity_max": [2.0]}, "velocity_max: expected 2 values"),
])
def test_invalid_values_are_refused_naming_joint_and_field(over, words):
    with pytest.raises(LimitsError, match=words.replace("(", r"\(")):
        make(**over)


def test_joint_without_position_limits_and_subset_reorder():
    lim = make(position_min=[-1.0, -math.inf], position_max=[1.0, math.inf])
    assert list(lim.has_position_limits) == [True, False]
    sub = lim.subset(["b", "a"])
    assert sub.names == ("b", "a") and sub.velocity_max[1] == 2.0
    with pytest.raises(LimitsError, match="unknown joint 'c'"):
        lim.subset(["c"])
    assert np.allclose(lim.scaled(0.5).jerk_max, [40.0, 40.0])
    with pytest.raises(LimitsError, match="limit_scale must be in"):
        lim.scaled(1.5)


def test_own_yaml_round_trip(tmp_path):
    path = tmp_path / "limits.yaml"
    path.write_text("joints:\n  j1: {position: [-2.9, 2.9], velocity: 2.0, acceleration: 8.0, "
                    "jerk: 80.0}\n  j7: {position: null, continuous: true, velocity: 3.0, "
                    "acceleration: 10.0, jerk: 100.0}\n")
    lim = JointLimits.from_file(path)
    assert lim.names == ("j1", "j7") and lim.continuous.tolist() == [False, True]
    again = JointLimits.from_mapping(lim.to_dict())
    assert again.same_as(lim)


@pytest.mark.parametrize("text, words", [
    ("joints: {}\n", "expected a top-level 'joints:' mapping"),
    ("joints:\n  j1: {position: [0, 1], velocity: 1, acceleration: 1}\n", "missing 'jerk'"),
    ("joints:\n  j1: {position: [0, 1], velocity: x, acceleration: 1, jerk: 1}\n",
     "velocity must be a number"),
    ("joints:\n  j1: {position: [0, 1], velocty: 1, acceleration: 1, jerk: 1}\n",
     "unknown field"),
    ("joints: [\n", "not valid YAML"),
])
def test_bad_yaml_is_refused_naming_the_file(tmp_path, text, words):
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    with pytest.raises(LimitsError, match=words) as info:
        JointLimits.from_file(path)
    assert str(path) in str(info.value)


def test_urdf_limits_with_dynamics_beside_it(tmp_path):
    # URDF <limit lower upper velocity> (ROS URDF convention; a continuous joint has no
    # position limits: common practice)
    (tmp_path / "cell.urdf").write_text(URDF)
    (tmp_path / "cell.limits.yaml").write_text(DYNAMICS)
    lim = JointLimits.from_file(tmp_path / "cell.urdf")
    assert lim.names == ("j1", "j2")
    assert lim.position_min[0] == -2.5 and lim.position_max[0] == 2.0
    assert lim.velocity_max[0] == 1.2   # the YAML may only tighten the URDF's 1.5
    assert math.isinf(lim.position_max[1]) and lim.continuous[1]
    assert lim.jerk_max.tolist() == [60.0, 90.0]


def test_urdf_without_dynamics_is_refused_clearly(tmp_path):
    (tmp_path / "cell.urdf").write_text(URDF)
    with pytest.raises(LimitsError, match="a URDF has no acceleration/jerk limits"):
        JointLimits.from_file(tmp_path / "cell.urdf")
    (tmp_path / "cell.limits.yaml").write_text("joints:\n  j1: {acceleration: 6, jerk: 60}\n")
    # a joint the limits YAML does not name is left out (and said so) ...
    lim = JointLimits.from_file(tmp_path / "cell.urdf")
    assert lim.names == ("j1",) and "['j2']" in lim.left_out
    # ... unless it is selected explicitly: then its acceleration and jerk are required
    with pytest.raises(LimitsError, match="joint 'j2' .* is missing"):
        JointLimits.from_file(tmp_path / "cell.urdf", joints=["j1", "j2"])
