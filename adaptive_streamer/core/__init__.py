# SPDX-License-Identifier: Apache-2.0
"""ROS-free core: limits, segments, the limit stage, references, observations, policies,
the watchdog and the decision cycle. Numbers and decisions live here; nodes only convert."""
