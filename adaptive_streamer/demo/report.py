# SPDX-License-Identifier: Apache-2.0
"""The demo's report folder: PNG plots and a short Markdown/HTML summary linking them."""
from __future__ import annotations

import html
import json
import math
from dataclasses import asdict
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from ..core.limits import JointLimits  # noqa: E402
from .summary import DemoSummary, Series, format_summary  # noqa: E402

QUANTITIES = (("position", "rad"), ("velocity", "rad/s"), ("acceleration", "rad/s²"),
              ("jerk", "rad/s³"))


def _joint_grid(limits: JointLimits, title: str):
    n = len(limits)
    cols = min(3, n)
    rows = math.ceil(n / cols)
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols, 2.6 * rows), squeeze=False,
                             sharex=True)
    fig.suptitle(title)
    return fig, axes.ravel()


def plot_joints(series: Series, limits: JointLimits, out: Path, t0: float) -> list[Path]:
    """One figure per quantity: every joint's commanded value against its limits."""
    t = series.sp_t - t0
    jerk = (np.diff(series.sp_a, axis=0) / np.diff(series.sp_t)[:, None]
            if series.sp_t.size > 1 else np.zeros((0, len(limits))))
    values = {"position": (t, series.sp_p), "velocity": (t, series.sp_v),
              "acceleration": (t, series.sp_a), "jerk": (t[1:], jerk)}
    bounds = {"velocity": limits.velocity_max, "acceleration": limits.acceleration_max,
              "jerk": limits.jerk_max}
    paths = []
    for name, unit in QUANTITIES:
        fig, axes = _joint_grid(limits, f"commanded {name} against its limits")
        tt, y = values[name]
        for i, ax in enumerate(axes[:len(limits)]):
            ax.plot(tt, y[:, i], lw=0.8)
            if name == "position":
                for b in (limits.position_min[i], limits.position_max[i]):
                    if np.isfinite(b):
                        ax.axhline(b, color="r", ls="--", lw=0.8)
            else:
                ax.axhline(bounds[name][i], color="r", ls="--", lw=0.8)
                ax.axhline(-bounds[name][i], color="r", ls="--", lw=0.8)
            ax.set_title(limits.names[i], fontsize=9)
            ax.set_ylabel(unit, fontsize=8)
        for ax in axes[len(limits):]:
            ax.axis("off")
        axes[-1].set_xlabel("time from the pass start [s]")
        fig.tight_layout()
        path = out / f"{name}.png"
        fig.savefig(path, dpi=90)
        plt.close(fig)
        paths.append(path)
    return paths


def plot_deviation(series: Series, thresholds: tuple[float, float], out: Path, t0: float) -> Path:
    """Planned deviation from the reference against the watchdog thresholds."""
    ds = [d for d in series.decisions if np.isfinite(d.deviation_max)]
    fig, ax = plt.subplots(figsize=(8, 3.2))
    if ds:
        t = np.array([d.time for d in ds]) - t0
        ax.plot(t, [d.deviation_max * 1e3 for d in ds], label="worst joint")
        ax.plot(t, [d.deviation_norm * 1e3 for d in ds], label="norm")
    ax.axhline(thresholds[0] * 1e3, color="r", ls="--", lw=0.8, label="deviation_joint")
    ax.axhline(thresholds[1] * 1e3, color="m", ls="--", lw=0.8, label="deviation_norm")
    ax.set_xlabel("time from the pass start [s]")
    ax.set_ylabel("planned deviation [mrad]")
    ax.legend(fontsize=8)
    ax.set_title("planned deviation from the reference (watchdog check)")
    fig.tight_layout()
    path = out / "deviation.png"
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def plot_lateral(t_adapted: np.ndarray, e_adapted: np.ndarray, t_ref: np.ndarray,
                 e_ref: np.ndarray, out: Path) -> Path:
    """Lateral placement error with and without adaptation."""
    fig, ax = plt.subplots(figsize=(8, 3.2))
    ax.plot(t_ref, e_ref * 1e3, label="reference only", color="0.5")
    ax.plot(t_adapted, e_adapted * 1e3, label="adapted", color="C0")
    ax.axhline(0.0, color="k", lw=0.5)
    ax.set_xlabel("time from the pass start [s]")
    ax.set_ylabel("lateral error [mm]")
    ax.legend(fontsize=8)
    ax.set_title("bead placement: lateral error from the real edge")
    fig.tight_layout()
    path = out / "lateral_error.png"
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def plot_timing(series: Series, rate: float, out: Path) -> Path:
    """Histograms of the policy compute time and of the stream's arrival period."""
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(9, 3.2))
    pt = np.array([d.policy_time for d in series.decisions if d.mode == "following"]) * 1e3
    if pt.size:
        a1.hist(pt, bins=40)
    a1.set_xlabel("policy compute per decision [ms]")
    a1.set_ylabel("decisions")
    if series.sp_arrival.size > 2:
        a2.hist(np.diff(series.sp_arrival) * 1e3, bins=60)
    a2.axvline(1e3 / rate, color="r", ls="--", lw=0.8, label="nominal")
    a2.set_xlabel("setpoint arrival period [ms]")
    a2.set_ylabel("ticks")
    a2.legend(fontsize=8)
    fig.suptitle("cycle timing")
    fig.tight_layout()
    path = out / "timing.png"
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def summary_json(summary: DemoSummary) -> dict:
    """The headline figures as plain data (summary.json)."""
    st = summary.stream
    outcome = summary.outcome
    return {"policy": summary.policy, "seed": summary.seed,
            "pass_window": list(summary.pass_window),
            "lateral_rms_mm": summary.adapted.rms, "lateral_max_mm": summary.adapted.max,
            "lateral_samples": summary.adapted.samples,
            "reference_only_rms_mm": summary.reference_only.rms,
            "reference_only_max_mm": summary.reference_only.max,
            "reference_only_samples": summary.reference_only.samples,
            "setpoints": st.samples, "violations": st.total_violations,
            "violations_by_kind": st.violations,
            "watchdog_events": [{"time": e.time, "kind": e.kind, "message": e.reason}
                                for e in summary.events],
            "decision_ms": summary.decision_ms, "period_ms": summary.period,
            "faults": [asdict(f) for f in summary.faults],
            "outcome": None if outcome is None else
            {"verdict": outcome.verdict.value, "line": outcome.line,
             "exit_code": outcome.exit_code}}


def write_summary(summary: DemoSummary, limits: JointLimits, plots: list[Path], out: Path,
                  cautions: str) -> tuple[Path, Path]:
    """summary.md, summary.html and summary.json next to the plots."""
    (out / "summary.json").write_text(json.dumps(summary_json(summary), indent=2, default=float))
    text = format_summary(summary, limits)
    md = ["# Demo run", "", "```", text, "```", ""]
    md += [f"![{p.stem}]({p.name})" for p in plots]
    md += ["", "## Safety", "", "```", cautions, "```", ""]
    md_path = out / "summary.md"
    md_path.write_text("\n".join(md))
    body = [f"<h1>Demo run</h1><pre>{html.escape(text)}</pre>"]
    body += [f'<h2>{html.escape(p.stem)}</h2><img src="{html.escape(p.name)}">' for p in plots]
    body.append(f"<h2>Safety</h2><pre>{html.escape(cautions)}</pre>")
    html_path = out / "summary.html"
    html_path.write_text("<!doctype html><html><head><meta charset='utf-8'><title>demo"
                         "</title></head><body>" + "".join(body) + "</body></html>")
    return md_path, html_path
