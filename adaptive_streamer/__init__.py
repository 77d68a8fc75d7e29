# SPDX-License-Identifier: Apache-2.0
"""adaptive_streamer: jerk-bounded streaming of policy-adapted joint setpoints for ROS 2."""

__version__ = "0.1.0"
