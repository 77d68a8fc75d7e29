# SPDX-License-Identifier: Apache-2.0
"""trajectory_msgs/JointTrajectory <-> core arrays.

- `fill_trajectory` writes stamp, names and points into a (reused) message in place; the
  point objects are kept when the count is unchanged, so a per-tick publisher allocates
  little. `window_to_msg` and `samples_to_msg` are the typed front ends.
- `msg_to_window` parses a window message into a core `Window` (a named tuple
  ``(stamp, times, positions, velocities, accelerations, names)``; ``times`` are the
  points' ``time_from_start`` in seconds), optionally reordered to given joint names.

Window messages: ``header.stamp`` is the time points[0] applies; ``points[i].time_from_start``
is the offset of point i from the stamp; positions, velocities and accelerations are all
filled, efforts empty.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from adaptive_streamer.core.playback import Window
from adaptive_streamer.core.reference import Samples

from .stamps import sec_to_stamp, stamp_to_sec


class TrajectoryMessageError(ValueError):
    """A JointTrajectory message does not have the expected shape or joints."""


def fill_trajectory(msg: JointTrajectory, stamp: float, names: Sequence[str], times: np.ndarray,
                    positions: np.ndarray, velocities: np.ndarray,
                    accelerations: np.ndarray) -> JointTrajectory:
    """Fill ``msg`` in place: header.stamp, joint_names, one point per row (offsets ``times``)."""
    sec_to_stamp(stamp, msg.header.stamp)
    if list(msg.joint_names) != list(names):
        msg.joint_names = list(names)
    count = len(times)
    if len(msg.points) != count:
        msg.points = [JointTrajectoryPoint() for _ in range(count)]
    p, v, a = positions.tolist(), velocities.tolist(), accelerations.tolist()
    for k, pt in enumerate(msg.points):
        pt.positions = p[k]
        pt.velocities = v[k]
        pt.accelerations = a[k]
        sec_to_stamp(float(times[k]), pt.time_from_start)  # Duration: same sec/nanosec fields
    return msg


def window_to_msg(window: Window, msg: JointTrajectory | None = None) -> JointTrajectory:
    """A core `Window` as a JointTrajectory (filled into ``msg`` when given)."""
    return fill_trajectory(msg if msg is not None else JointTrajectory(), window.stamp,
                           window.names, window.times, window.positions, window.velocities,
                           window.accelerations)


def samples_to_msg(samples: Samples, stamp: float) -> JointTrajectory:
    """Resampled reference (times from 0 at override 1) as a JointTrajectory."""
    return fill_trajectory(JointTrajectory(), stamp, samples.names, samples.times,
                           samples.positions, samples.velocities, samples.accelerations)


def msg_to_window(msg: JointTrajectory, names: Sequence[str] | None = None) -> Window:
    """Parse a window message; with ``names``, columns follow that order (all must be present).

    Every point must carry one position, velocity and acceleration per joint.
    """
    joints = list(msg.joint_names)
    n, count = len(joints), len(msg.points)
    if n == 0 or count == 0:
        raise TrajectoryMessageError(f"trajectory has {n} joint names and {count} points; "
                                     "expected at least one of each")
    arrays = {f: np.empty((count, n)) for f in ("positions", "velocities", "accelerations")}
    times = np.empty(count)
    for k, pt in enumerate(msg.points):
        for field, out in arrays.items():
            values = getattr(pt, field)
            if len(values) != n:
                raise TrajectoryMessageError(f"point {k} has {len(values)} {field}; expected {n} "
                                             f"(joints {joints})")
            out[k] = values
        times[k] = pt.time_from_start.sec + pt.time_from_start.nanosec * 1e-9
    order = tuple(joints)
    if names is not None:
        missing = [j for j in names if j not in joints]
        if missing:
            raise TrajectoryMessageError(f"joint '{missing[0]}' is not in the trajectory "
                                         f"(joints {joints})")
        idx = [joints.index(j) for j in names]
        arrays = {f: a[:, idx] for f, a in arrays.items()}
        order = tuple(names)
    return Window(stamp_to_sec(msg.header.stamp), times, arrays["positions"],
                  arrays["velocities"], arrays["accelerations"], order)
