# SPDX-License-Identifier: Apache-2.0
"""Observation layout: every block's values against hand-computed examples, buffer reuse,
feedback lookup by name, and errors."""
import math

import numpy as np
import pytest

from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.observation import (ObservationBlock, ObservationError,
                                                ObservationLayout)
from adaptive_streamer.core.policies.base import PolicyInputs
from adaptive_streamer.core.segment import MotionState

# j1: range [-1, 3] (centre 1, half range 2); j2: [-2, 2]; j3: continuous (wraps)
LIMITS = JointLimits(["j1", "j2", "j3"], [-1.0, -2.0, -math.inf], [3.0, 2.0, math.inf],
                     [2.0, 4.0, 1.0], [10.0, 5.0, 4.0], [100.0, 50.0, 40.0],
                     continuous=[False, False, True])
FEATURES = FeatureVector(("edge_angle", "other", "edge_offset"), np.array([0.01, 5.0, 0.006]),
                         np.array([True, True, True]), 3.0)


def inputs(feedback=FEATURES, **changes) -> PolicyInputs:
    """A fixed example state and reference (numbers chosen for easy hand computation)."""
    base = dict(
        time=2.0,
        state=MotionState(np.array([2.0, -1.0, 3.5]), np.array([1.0, -2.0, 0.5]),
                          np.array([5.0, 2.5, -1.0])),
        ref_positions=np.array([[2.01, -1.02, 3.6], [2.03, -0.98, 3.4], [9.0, 9.0, 9.0]]),
        ref_velocities=np.array([[0.4, 2.0, -0.1], [0.6, 1.0, 0.3], [9.0, 9.0, 9.0]]),
        ref_accelerations=np.array([[1.0, -1.0, 2.0], [-5.0, 0.5, 0.0], [9.0, 9.0, 9.0]]),
        feedback=feedback,
        previous_action=np.array([0.25, -1.0, 0.5]),
    )
    base.update(changes)
    return PolicyInputs(**base)


def build(*blocks: ObservationBlock, limits=LIMITS, **changes) -> np.ndarray:
    return ObservationLayout(blocks, limits).build(inputs(**changes))


def test_joint_position_normalises_by_range_and_wraps_continuous_joints():
    out = build(ObservationBlock("joint_position"))
    # hand-computed: (2 - 1) / 2, (-1 - 0) / 2, and 3.5 rad wrapped to 3.5 - 2 pi, over pi
    np.testing.assert_allclose(out, [0.5, -0.5, (3.5 - 2 * math.pi) / math.pi], rtol=1e-6)
    assert out.dtype == np.float32


def test_joint_position_of_an_unlimited_non_continuous_joint_is_raw():
    lim = JointLimits(["a"], [-math.inf], [math.inf], [1.0], [1.0], [1.0])
    layout = ObservationLayout([ObservationBlock("joint_position")], lim)
    one = inputs(state=MotionState(np.array([7.25]), np.zeros(1), np.zeros(1)),
                 previous_action=np.zeros(1))
    assert layout.build(one).tolist() == [7.25]
    with pytest.raises(ObservationError, match=r"inputs do not fit the observation layout for "
                                               r"1 joints: got \[\(3,\), \(3,\), \(3,\), \(1,\)\]"):
        layout.build(inputs(previous_action=np.zeros(1)))


def test_joint_velocity_and_acceleration_divide_by_their_limits():
    out = build(ObservationBlock("joint_velocity"), ObservationBlock("joint_acceleration"))
    # hand-computed: v / (2, 4, 1) and a / (10, 5, 4)
    np.testing.assert_allclose(out, [0.5, -0.5, 0.5, 0.5, 0.5, -0.25], rtol=1e-6)


def test_reference_position_is_relative_to_the_position_point_major():
    out = build(ObservationBlock("reference_position", horizon=2, scale=(0.1, 0.2, 0.5)))
    # hand-computed: (ref_p[i] - p) / scale for rows 0 and 1, all joints of row 0 first
    np.testing.assert_allclose(out, [0.1, -0.1, 0.2, 0.3, 0.1, -0.2], rtol=1e-5, atol=1e-6)


def test_reference_position_scalar_scale_applies_to_every_joint():
    out = build(ObservationBlock("reference_position", horizon=1, scale=(0.01,)))
    np.testing.assert_allclose(out, [1.0, -2.0, 10.0], rtol=1e-5)


def test_reference_velocity_and_acceleration_divide_by_the_limits():
    out = build(ObservationBlock("reference_velocity", horizon=2),
                ObservationBlock("reference_acceleration", horizon=1))
    # hand-computed: ref_v[0:2] / (2, 4, 1), then ref_a[0] / (10, 5, 4)
    np.testing.assert_allclose(out, [0.2, 0.5, -0.1, 0.3, 0.25, 0.3, 0.1, -0.2, 0.5], rtol=1e-6)


def test_feedback_is_looked_up_by_name_scaled_offset_and_flagged():
    block = ObservationBlock("feedback", features=("edge_offset", "edge_angle"),
                             scale=(0.005, 0.02), offset=(0.001, 0.0))
    out = build(block)
    # hand-computed: (0.006 - 0.001) / 0.005 = 1, 0.01 / 0.02 = 0.5, both flags 1
    np.testing.assert_allclose(out, [1.0, 0.5, 1.0, 1.0], rtol=1e-6)


def test_nan_or_missing_feedback_gives_zero_with_flag_zero():
    block = ObservationBlock("feedback", features=("edge_offset", "edge_angle", "absent"))
    stale = FeatureVector(("edge_offset", "edge_angle"), np.array([0.25, np.nan]),
                          np.array([True, False]), 3.0)
    out = build(block, feedback=stale)
    assert out.tolist() == [0.25, 0.0, 0.0, 1.0, 0.0, 0.0]
    assert build(block, feedback=None).tolist() == [0.0] * 6


def test_invalid_feedback_is_zero_even_with_a_finite_value():
    block = ObservationBlock("feedback", features=("edge_offset",))
    fv = FeatureVector(("edge_offset",), np.array([0.5]), np.array([False]), 3.0)
    assert build(block, feedback=fv).tolist() == [0.0, 0.0]


def test_previous_action_is_copied():
    assert build(ObservationBlock("previous_action")).tolist() == [0.25, -1.0, 0.5]


def test_blocks_concatenate_in_order_with_slices_and_description():
    blocks = [ObservationBlock("joint_velocity"), ObservationBlock("reference_position", 2),
              ObservationBlock("feedback", features=("edge_offset",)),
              ObservationBlock("previous_action")]
    layout = ObservationLayout(blocks, LIMITS)
    assert layout.size == 3 + 6 + 2 + 3
    assert layout.slices == (slice(0, 3), slice(3, 9), slice(9, 11), slice(11, 14))
    assert layout.horizon == 2 and layout.features == ("edge_offset",)
    assert layout.describe() == ("joint_velocity [0:3], reference_position(h=2) [3:9], "
                                 "feedback[edge_offset] [9:11], previous_action [11:14]")
    out = layout.build(inputs())
    for block, s in zip(blocks, layout.slices):
        np.testing.assert_array_equal(out[s], build(block))


def test_build_reuses_the_given_buffer_and_is_deterministic():
    layout = ObservationLayout([ObservationBlock("joint_position"),
                                ObservationBlock("feedback", features=("edge_offset",))], LIMITS)
    buf = np.full((1, layout.size), 7.0, np.float32)
    assert layout.build(inputs(), out=buf) is buf
    first = buf.copy()
    other = inputs(state=MotionState(np.zeros(3), np.zeros(3), np.zeros(3)), feedback=None)
    layout.build(other, out=buf)
    assert buf.tolist() == [[-0.5, 0.0, 0.0, 0.0, 0.0]]
    layout.build(inputs(), out=buf)
    np.testing.assert_array_equal(buf, first)


@pytest.mark.parametrize("blocks, message", [
    ([], "an observation needs at least one block"),
    ([ObservationBlock("joint_jerk")], "observation block 0 (joint_jerk): unknown block"),
    ([ObservationBlock("reference_velocity", horizon=0)], "horizon must be an integer >= 1"),
    ([ObservationBlock("feedback")], "features must be a non-empty list"),
    ([ObservationBlock("reference_position", 1, scale=(1.0, 2.0))], "expected 1 or 3 finite"),
    ([ObservationBlock("reference_position", 1, scale=(-1.0,))], "scale must be positive"),
    ([ObservationBlock("feedback", features=("x",), scale=(0.0,))], "scale must be non-zero"),
])
def test_bad_layouts_are_refused(blocks, message):
    with pytest.raises(ObservationError, match=message.replace("(", r"\(").replace(")", r"\)")):
        ObservationLayout(blocks, LIMITS)


def test_too_few_reference_points_and_bad_buffers_are_refused():
    layout = ObservationLayout([ObservationBlock("reference_velocity", horizon=4)], LIMITS)
    with pytest.raises(ObservationError, match="reads 4 reference points, got 3"):
        layout.build(inputs())
    with pytest.raises(ObservationError, match="float32 with 9 entries, got float64"):
        ObservationLayout([ObservationBlock("reference_velocity", horizon=3)], LIMITS).build(
            inputs(), out=np.zeros(9))
