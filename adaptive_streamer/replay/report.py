# SPDX-License-Identifier: Apache-2.0
"""What a replay writes to its output folder.

    OUT/bag/            rosbag2 (MCAP): the replayed ``setpoints`` (one point per stream tick,
                        receive time = tick time) and ``<adapter>/decisions`` (records, receive
                        time = the decision time used), in the recorded namespace; with a
                        plan-ahead output also ``driver/plan`` (one message per plan the
                        replayed session sent, receive time = the decision time used)
    OUT/summary.json    the comparison (`compare.Comparison`) and the replay's facts
    OUT/report.md       the same for people
    OUT/*.png           committed accelerations, setpoint positions, limit usage, compute time
"""
from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from adaptive_streamer.core import decision_record

from ..io.bag_io import BagWriter, encode, typestore
from .compare import Comparison, Stream
from ..io.fast_cdr import Layouts
from ..io.messages import FLOAT64_ARRAY, JOINT_TRAJECTORY
from .run import ReplayResult


def stamps_of(t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Float seconds -> (sec, nanosec) arrays, rounded as ``io.stamps.sec_to_stamp`` does
    (half to even, as Python's ``round``)."""
    sec = np.floor(t)
    nsec = np.rint((t - sec) * 1e9)
    carry = nsec >= 1e9
    return ((sec + carry).astype(np.int64),
            np.where(carry, nsec - 1e9, nsec).astype(np.int64))


def filled(template: bytes, count: int, floats: dict[int, np.ndarray],
           sec: np.ndarray | None = None, nanosec: np.ndarray | None = None) -> list[bytes]:
    """``count`` copies of the message ``template`` with float64 runs replaced: byte
    offset -> (count, k) values; with a header, its stamp set from ``sec``/``nanosec``."""
    rows = np.tile(np.frombuffer(template, np.uint8), (count, 1))
    for offset, values in floats.items():
        block = np.ascontiguousarray(values, "<f8").reshape(count, -1)
        rows[:, offset:offset + 8 * block.shape[1]] = block.view(np.uint8)
    if sec is not None and nanosec is not None:
        rows[:, 4:8] = sec.astype("<i4").reshape(-1, 1).view(np.uint8)
        rows[:, 8:12] = nanosec.astype("<u4").reshape(-1, 1).view(np.uint8)
    size = len(template)
    buf = rows.tobytes()
    return [buf[k:k + size] for k in range(0, count * size, size)]


def write_bag(result: ReplayResult, stream: Stream, path: Path) -> Path:
    """The replayed setpoints and decisions as a new bag at ``path``.

    Setpoint and decision messages are one message serialised by ``rosbags`` per topic,
    then the same layout filled with every message's numbers at once."""
    types = typestore().types
    Time, Duration = types["builtin_interfaces/msg/Time"], types["builtin_interfaces/msg/Duration"]
    Header = types["std_msgs/msg/Header"]
    Traj = types[JOINT_TRAJECTORY]
    Point = types["trajectory_msgs/msg/JointTrajectoryPoint"]
    F64 = types[FLOAT64_ARRAY]
    Layout = types["std_msgs/msg/MultiArrayLayout"]
    Dim = types["std_msgs/msg/MultiArrayDimension"]
    writer = BagWriter(path, compression="zstd", chunk_size=2 ** 20, chunk_duration=0.0)
    try:
        sp = writer.add_topic(result.topics["setpoints"], JOINT_TRAJECTORY)
        dc = writer.add_topic(result.topics["decisions"], FLOAT64_ARRAY)
        joints = list(result.setup.joints)
        empty = np.empty(0)
        times: list[np.ndarray] = []
        kinds: list[np.ndarray] = []
        connections: list[Any] = []
        messages: list[bytes] = []

        def add(t_ns: np.ndarray, kind: int, conn: Any, raw: list[bytes]) -> None:
            times.append(np.asarray(t_ns, np.int64))
            kinds.append(np.full(len(raw), kind))
            connections.extend([conn] * len(raw))
            messages.extend(raw)

        if len(stream.t):
            first = Traj(header=Header(stamp=Time(sec=0, nanosec=0), frame_id=""),
                         joint_names=joints,
                         points=[Point(positions=stream.p[0], velocities=stream.v[0],
                                       accelerations=stream.a[0], effort=empty,
                                       time_from_start=Duration(sec=0, nanosec=0))])
            template = encode(first, JOINT_TRAJECTORY)
            lay = Layouts(JOINT_TRAJECTORY).layout(template)
            slots = [4 + 8 * int(lay.floats[f][0][0])
                     for f in ("positions", "velocities", "accelerations")]
            sec, nsec = stamps_of(stream.t)
            add(sec * 1_000_000_000 + nsec, 0, sp,
                filled(template, len(stream.t), dict(zip(slots, (stream.p, stream.v, stream.a))),
                       sec, nsec))
        if result.plans:
            pl = writer.add_topic(result.topics["plan"], JOINT_TRAJECTORY)
            raw = []
            for sent in result.plans:
                k = sent.knots
                sec, nsec = divmod(k.stamp_ns, 1_000_000_000)
                pts = [Point(positions=k.positions[i], velocities=k.velocities[i],
                             accelerations=k.accelerations[i], effort=empty,
                             time_from_start=Duration(sec=off // 1_000_000_000,
                                                      nanosec=off % 1_000_000_000))
                       for i, off in enumerate(k.offsets_ns)]
                msg = Traj(header=Header(stamp=Time(sec=sec, nanosec=nsec), frame_id=""),
                           joint_names=joints, points=pts)
                raw.append(encode(msg, JOINT_TRAJECTORY))
            add(np.array([int(round(p.time * 1e9)) for p in result.plans], np.int64), 2, pl,
                raw)
        if result.decisions:
            layout = Layout(dim=[Dim(label=decision_record.LABEL, size=0, stride=0)],
                            data_offset=0)
            records = np.array([decision_record.encode(d) for d in result.decisions])
            template = encode(F64(layout=layout, data=records[0]), FLOAT64_ARRAY)
            offset = Layouts(FLOAT64_ARRAY).layout(template).parsed.floats["data"][0][0]
            add(np.array([int(round(now * 1e9)) for now in result.now.tolist()], np.int64), 1,
                dc, filled(template, len(records), {offset: records}))
        if messages:
            t_ns, kind = np.concatenate(times), np.concatenate(kinds)
            for i in np.lexsort((kind, t_ns)).tolist():  # by time, then topic (stable)
                writer.write(connections[i], int(t_ns[i]), messages[i])
        writer.set_custom_data("adaptive_streamer.replay_of", str(result.bag))
        writer.set_custom_data("adaptive_streamer.replay_policy", result.policy)
    finally:
        writer.close()
    return path


def summary(result: ReplayResult, comparison: Comparison) -> dict[str, Any]:
    """JSON-ready facts of a replay and its comparison."""
    return {"bag": str(result.bag), "policy": result.policy, "mode": result.mode,
            "cycles": result.cycles, "recorded_cycles": len(result.recorded),
            "loop_seconds": result.elapsed,
            "cycles_per_second": result.cycles / result.elapsed if result.elapsed else None,
            "joints": list(result.setup.joints), "partial": result.partial,
            "approximate_cycles": result.approximate_cycles, "notes": list(result.notes),
            "deterministic": comparison.deterministic,
            "comparison": dataclasses.asdict(comparison)}


def _fmt(x: Any) -> str:
    if isinstance(x, float):
        return "inf" if math.isinf(x) else ("nan" if math.isnan(x) else f"{x:.4g}")
    return str(x)


def markdown(result: ReplayResult, c: Comparison) -> str:
    """The report text."""
    joints = list(result.setup.joints)
    lines = [f"# Replay of `{result.bag}`", "",
             f"- policy: `{result.policy}`; mode: **{result.mode}**; cycles replayed: "
             f"{result.cycles} (recorded: {len(result.recorded)})",
             f"- cycle loop: {result.elapsed:.3f} s "
             f"({result.cycles / result.elapsed if result.elapsed else math.nan:.0f} cycles/s)"]
    if result.partial:
        lines.append(f"- **partial bag**: {result.partial}")
    for note in result.notes:
        lines.append(f"- note: {note}")
    if c.compared:
        verdict = ("bit-identical to the records" if c.deterministic else
                   f"{c.identical} of {c.compared} bit-identical; largest difference "
                   f"{_fmt(c.max_difference)}; first: {c.first_difference}")
        lines += ["", f"Decisions compared: {c.compared}, {verdict}."]
    if c.u_max or c.setpoint_max:
        lines += ["", "| joint | u max diff | u RMS diff | planned pos max | planned pos RMS | "
                  "setpoint max | setpoint RMS |", "|---|---|---|---|---|---|---|"]
        for j, name in enumerate(joints):
            cells = [(c.u_max or [math.nan] * len(joints))[j],
                     (c.u_rms or [math.nan] * len(joints))[j],
                     (c.position_max or [math.nan] * len(joints))[j],
                     (c.position_rms or [math.nan] * len(joints))[j],
                     (c.setpoint_max or [math.nan] * len(joints))[j],
                     (c.setpoint_rms or [math.nan] * len(joints))[j]]
            lines.append(f"| {name} | " + " | ".join(_fmt(x) for x in cells) + " |")
    lines += ["", "Limit usage (peak fraction of the limit; position: smallest margin [rad]):", "",
              "| joint | source | velocity | acceleration | jerk | position margin |",
              "|---|---|---|---|---|---|"]
    for src, use in c.usage.items():
        for j, name in enumerate(joints):
            lines.append(f"| {name} | {src} | " + " | ".join(
                _fmt(use[k][j]) for k in ("velocity", "acceleration", "jerk", "position_margin"))
                + " |")
    for src, trips in c.trips.items():
        lines += ["", f"Watchdog trips ({src}): " + ("none" if not trips else "")]
        lines += [f"- {t['kind']} at {_fmt(t['time'])} s: {t['message']}" for t in trips]
    lines += ["", "Compute time [ms]:", ""]
    for src, pct in c.compute_ms.items():
        lines.append(f"- {src}: " + ", ".join(f"{k} {_fmt(v)}" for k, v in pct.items()))
    lines += ["", "Task (planned deviation from the reference while following, rad):", ""]
    for src, m in c.task.items():
        lines.append(f"- {src}: " + ", ".join(f"{k} {_fmt(v)}" for k, v in m.items()))
    return "\n".join(lines) + "\n"


def plots(result: ReplayResult, c: Comparison, stream: Stream, recorded: Stream | None,
          out: Path) -> list[Path]:
    """PNG plots (matplotlib, Agg backend); returns their paths."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    joints = list(result.setup.joints)
    n = len(joints)
    files = []
    t0 = result.segments[0].start if result.segments else 0.0
    fig, axes = plt.subplots(n, 1, figsize=(9, 1.6 * n + 1), sharex=True, squeeze=False)
    td = np.array([d.time for d in result.decisions]) - t0
    u = np.array([d.u for d in result.decisions]).reshape(len(td), n)
    tr = np.array([r.time for r in result.recorded]) - t0
    ur = np.array([r.u for r in result.recorded]).reshape(len(tr), n)
    for j, ax in enumerate(axes[:, 0]):
        if len(tr):
            ax.plot(tr, ur[:, j], "-", lw=2.5, alpha=0.4, label="recorded")
        ax.plot(td, u[:, j], "-", lw=1.0, label="replay")
        ax.set_ylabel(f"{joints[j]}\n[rad/s²]")
    axes[0, 0].set_title("committed acceleration u")
    axes[0, 0].legend(loc="upper right", fontsize=7)
    axes[-1, 0].set_xlabel("time [s]")
    files.append(_save(fig, out / "accelerations.png"))
    fig, axes = plt.subplots(n, 1, figsize=(9, 1.6 * n + 1), sharex=True, squeeze=False)
    for j, ax in enumerate(axes[:, 0]):
        if recorded is not None:
            ax.plot(recorded.t - t0, recorded.p[:, j], "-", lw=2.5, alpha=0.4, label="recorded")
        ax.plot(stream.t - t0, stream.p[:, j], "-", lw=1.0, label="replay")
        ax.set_ylabel(f"{joints[j]}\n[rad]")
    axes[0, 0].set_title("setpoint position")
    axes[0, 0].legend(loc="upper right", fontsize=7)
    axes[-1, 0].set_xlabel("time [s]")
    files.append(_save(fig, out / "positions.png"))
    fig, axes = plt.subplots(1, 3, figsize=(11, 3.2))
    x = np.arange(n)
    for ax, key in zip(axes, ("velocity", "acceleration", "jerk")):
        for k, (src, use) in enumerate(c.usage.items()):
            ax.bar(x + 0.4 * k - 0.2, use[key], 0.4, label=src)
        ax.set_xticks(x, joints, fontsize=7)
        ax.set_title(f"peak |{key}| / limit")
        ax.axhline(1.0, color="k", lw=0.8)
    axes[0].legend(fontsize=7)
    files.append(_save(fig, out / "limit_usage.png"))
    fig, ax = plt.subplots(figsize=(6, 3.2))
    if len(result.compute):
        ax.hist(result.compute * 1e3, bins=50, label="replay decide()")
    pol = np.array([r.policy_time for r in result.recorded]) * 1e3
    if len(pol):
        ax.hist(pol[np.isfinite(pol)], bins=50, alpha=0.6, label="recorded policy time")
    ax.set_xlabel("ms")
    ax.set_title("decision compute time")
    ax.legend(fontsize=7)
    files.append(_save(fig, out / "compute_time.png"))
    return files


def _save(fig: Any, path: Path) -> Path:
    import matplotlib.pyplot as plt
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def write_outputs(result: ReplayResult, c: Comparison, stream: Stream,
                  recorded: Stream | None, out: Path, with_plots: bool = True) -> dict[str, Any]:
    """Write the bag, summary, report and plots into ``out``; returns the summary."""
    out.mkdir(parents=True, exist_ok=True)
    bag = out / "bag"
    if bag.exists():
        raise FileExistsError(f"output bag '{bag}' exists already; choose another --out")
    write_bag(result, stream, bag)
    facts = summary(result, c)
    (out / "summary.json").write_text(json.dumps(_finite(facts), indent=2, default=_json,
                                                 allow_nan=False))
    (out / "report.md").write_text(markdown(result, c))
    if with_plots:
        facts["plots"] = [str(p) for p in plots(result, c, stream, recorded, out)]
    return facts


def _finite(x: Any) -> Any:
    """``x`` with NaN/inf floats as None (strict JSON)."""
    if isinstance(x, dict):
        return {k: _finite(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_finite(v) for v in x]
    if isinstance(x, (float, np.floating)):
        return float(x) if math.isfinite(x) else None
    return x


def _json(x: Any) -> Any:
    if isinstance(x, (np.floating, np.integer)):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    return str(x)
