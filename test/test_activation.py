# SPDX-License-Identifier: Apache-2.0
"""The activate transition's checks (adaptive_streamer.core.activation, ROS-free): with a
policy that reads feedback, activation waits for fresh feedback, and the refusal names the
features; a policy without feedback features activates without any."""
import numpy as np

from adaptive_streamer.core.activation import check_activation
from adaptive_streamer.core.limits import JointLimits

LIMITS = JointLimits(["a", "b"], [-1.0, -1.0], [1.0, 1.0], [1.0, 1.0], [5.0, 5.0],
                     [50.0, 50.0])
NOW = 100.0


def check(**feedback):
    return check_activation(NOW, LIMITS.names, LIMITS, NOW - 0.01, np.zeros(2), np.zeros(2),
                            0.25, NOW - 0.01, 0.25, 0.02, **feedback)


def test_a_policy_without_feedback_features_needs_no_feedback():
    assert check().ok
    assert check(features=(), feedback_received=None, feedback_timeout=0.5).ok


def test_a_policy_reading_feedback_waits_for_fresh_feedback():
    features = ("edge_offset", "edge_angle")
    for received in (None, NOW - 0.6):
        c = check(features=features, feedback_received=received, feedback_timeout=0.5)
        assert not c.ok
        assert "no fresh feedback (none within 500 ms)" in c.refusal, c.refusal
        assert "['edge_offset', 'edge_angle']" in c.refusal, c.refusal
    assert check(features=features, feedback_received=NOW - 0.4, feedback_timeout=0.5).ok
