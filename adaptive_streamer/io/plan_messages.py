# SPDX-License-Identifier: Apache-2.0
"""Plan messages (the plan-ahead output) as serialised ``trajectory_msgs/JointTrajectory``.

The adapter sends one plan per decision; building the rclpy message point by point costs
more than the plan itself, so plans are written straight into CDR bytes, which an rclpy
publisher sends as they are. Per knot count a template message is serialised once with
``rosbags`` (joint names, ``time_from_start`` = i * period, zero values); a plan is the
template with its header stamp and its positions, velocities and accelerations written in
at the places `adaptive_streamer.io.fast_cdr.Layouts` finds for them (effort empty). The
bytes equal what rclpy serialises for the same message (the test suite checks it).
"""
from __future__ import annotations

import struct
from typing import Sequence

import numpy as np

from ..core.plan_ahead import PlanKnots
from .bag_io import encode, typestore
from .fast_cdr import Layout, Layouts
from .messages import JOINT_TRAJECTORY

_STAMP = struct.Struct("<iI")


class PlanEncoder:
    """CDR bytes of plan messages for ``joint_names`` (the driver's order)."""

    def __init__(self, joint_names: Sequence[str]) -> None:
        self.joint_names = list(joint_names)
        self._layouts = Layouts(JOINT_TRAJECTORY)
        self._templates: dict[tuple[int, int], tuple[bytes, Layout]] = {}

    def _template(self, m: int, period_ns: int) -> tuple[bytes, Layout]:
        key = (m, period_ns)
        if key not in self._templates:
            types = typestore().types
            n, zeros = len(self.joint_names), np.zeros(len(self.joint_names))
            points = [types["trajectory_msgs/msg/JointTrajectoryPoint"](
                positions=zeros, velocities=zeros, accelerations=zeros, effort=np.empty(0),
                time_from_start=types["builtin_interfaces/msg/Duration"](
                    sec=(i * period_ns) // 1_000_000_000,
                    nanosec=(i * period_ns) % 1_000_000_000)) for i in range(m)]
            header = types["std_msgs/msg/Header"](
                stamp=types["builtin_interfaces/msg/Time"](sec=0, nanosec=0), frame_id="")
            raw = encode(types[JOINT_TRAJECTORY](header=header, joint_names=self.joint_names,
                                                 points=points), JOINT_TRAJECTORY)
            lay = self._layouts.layout(raw)
            assert all(lay.floats[f].shape == (m, n)
                       for f in ("positions", "velocities", "accelerations"))
            self._templates[key] = (raw, lay)
        return self._templates[key]

    def encode(self, knots: PlanKnots, index: np.ndarray) -> bytes:
        """The plan message of ``knots`` with the joints taken in the order ``index``."""
        raw, lay = self._template(len(knots.positions), knots.period_ns)
        buf = bytearray(raw)
        view = np.frombuffer(buf, "<f8", count=(len(buf) - 4) // 8, offset=4)
        view[lay.floats["positions"]] = knots.positions[:, index]
        view[lay.floats["velocities"]] = knots.velocities[:, index]
        view[lay.floats["accelerations"]] = knots.accelerations[:, index]
        _STAMP.pack_into(buf, 4, *divmod(knots.stamp_ns, 1_000_000_000))
        return bytes(buf)
