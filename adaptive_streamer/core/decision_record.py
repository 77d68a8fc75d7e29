# SPDX-License-Identifier: Apache-2.0
"""Encoding of one `Decision` as a flat float64 vector (the ``~/decisions`` topic).

The adapter publishes each decision as ``std_msgs/Float64MultiArray`` whose ``data`` is
this vector and whose ``layout.dim[0].label`` is `LABEL`. Layout (``n`` joints)::

    index  field
    0      format version (1)
    1      n (number of joints)
    2      decision time t_k [s] (start of the decided segment, ROS time)
    3      stamp of the reference window used [s] (NaN: none)
    4      stamp of the feedback used [s] (NaN: none)
    5      mode the decision was made in (index into cycle.MODES)
    6      mode after it (index into cycle.MODES)
    7      verdict (0 = ok, else 1 + index into watchdog.KINDS)
    8      viable (1.0 / 0.0)
    9      policy compute time [s]
    10     planned deviation, worst joint [rad] (NaN when not checked)
    11     planned deviation, norm [rad]
    12..   seven blocks of n values: planned position, velocity, acceleration at t_k,
           raw policy action (NaN where no policy ran), lo, hi, committed acceleration u

Replay uses the two stamps to pick exactly the reference window and feedback messages the
live cycle used.
"""
from __future__ import annotations

import numpy as np

from .cycle import MODES, Decision
from .segment import MotionState
from .watchdog import KINDS

LABEL = "adaptive_streamer/decision_v1"
VERSION = 1
HEADER = 12
VERDICTS = ("ok",) + KINDS


class DecisionRecordError(ValueError):
    """A decision record is malformed or of an unknown version."""


def encode(d: Decision, out: np.ndarray | None = None) -> np.ndarray:
    """Flat vector for ``d`` (written into ``out`` when its size fits)."""
    n = d.u.shape[0]
    size = HEADER + 7 * n
    buf = out if out is not None and out.shape == (size,) else np.empty(size)
    buf[:HEADER] = (VERSION, n, d.time, d.window_stamp, d.feedback_stamp,
                    MODES.index(d.mode), MODES.index(d.next_mode or d.mode),
                    VERDICTS.index(d.verdict), 1.0 if d.viable else 0.0, d.policy_time,
                    d.deviation_max, d.deviation_norm)
    for k, block in enumerate((d.state.position, d.state.velocity, d.state.acceleration,
                               d.action, d.lo, d.hi, d.u)):
        buf[HEADER + k * n:HEADER + (k + 1) * n] = block
    return buf


def decode(data: np.ndarray) -> Decision:
    """`Decision` from a flat vector (message text is not carried)."""
    data = np.asarray(data, float)
    if data.ndim != 1 or data.shape[0] < HEADER:
        raise DecisionRecordError(f"decision record too short ({data.shape})")
    if int(data[0]) != VERSION:
        raise DecisionRecordError(f"decision record version {data[0]:g} is not {VERSION}")
    n = int(data[1])
    if data.shape[0] != HEADER + 7 * n:
        raise DecisionRecordError(f"decision record for {n} joints must hold "
                                  f"{HEADER + 7 * n} values, got {data.shape[0]}")
    blocks = [data[HEADER + k * n:HEADER + (k + 1) * n].copy() for k in range(7)]
    try:
        mode, next_mode, verdict = MODES[int(data[5])], MODES[int(data[6])], VERDICTS[int(data[7])]
    except IndexError:
        raise DecisionRecordError("decision record holds an unknown mode or verdict code") from None
    return Decision(time=float(data[2]), mode=mode,
                    state=MotionState(blocks[0], blocks[1], blocks[2]),
                    window_stamp=float(data[3]), feedback_stamp=float(data[4]),
                    action=blocks[3], lo=blocks[4], hi=blocks[5], u=blocks[6],
                    viable=bool(data[8] > 0.5), deviation_max=float(data[10]),
                    deviation_norm=float(data[11]), verdict=verdict, message="",
                    policy_time=float(data[9]), next_mode=next_mode)
