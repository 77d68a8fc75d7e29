# SPDX-License-Identifier: Apache-2.0
"""Demo fault injection figures: each fault kind, with the demo's limits and with those
limits' velocity, acceleration and jerk at 60 %, through the live demo
(``adaptive-streamer demo --inject FAULT@AT --duration D --no-plots``); prints per run the
stop that followed, whether it was the expected one, and the times from the injection to
the stop and to rest (the demo's ``summary.json``, key ``faults``).

    .venv/bin/python bench/demo_faults.py [--repeat N] [--at S] [--duration S] [--faults A,B]

Times are printed, never asserted; on a loaded machine an input can go stale before the
injection (a stop nobody injected): such runs are listed as such.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import yaml

from adaptive_streamer.demo.faults import EXPECTED_STOP
from adaptive_streamer.share import demo_file


def tight_limits(folder: Path) -> Path:
    """The demo's limits with velocity, acceleration and jerk at 60 %."""
    lim = yaml.safe_load(demo_file("limits.yaml").read_text())
    for entry in lim["joints"].values():
        for key in ("velocity", "acceleration", "jerk"):
            entry[key] = round(0.6 * entry[key], 6)
    path = folder / "limits_60.yaml"
    path.write_text(yaml.safe_dump(lim))
    return path


def run(fault: str, at: float, duration: float, limits: Path | None, folder: Path) -> dict:
    """One demo run; its fault record (or why there is none)."""
    report = folder / "report"
    cmd = [sys.executable, "-m", "adaptive_streamer.cli", "demo", "--report", str(report),
           "--no-progress", "--no-plots", "--inject", f"{fault}@{at:g}",
           "--duration", f"{duration:g}"] + (["--limits", str(limits)] if limits else [])
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300,
                          env=dict(os.environ, PYTHONUNBUFFERED="1"))
    if proc.returncode != 0 or not (report / "summary.json").is_file():
        tail = (proc.stdout + proc.stderr).strip().splitlines()[-1:]
        return {"error": f"exit {proc.returncode}: {' '.join(tail)}"}
    return json.loads((report / "summary.json").read_text())["faults"][0]


def main(argv: list[str] | None = None) -> int:
    """Entry point; see the module docstring."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--at", type=float, default=1.0, help="injection time [s] (default 1)")
    ap.add_argument("--duration", type=float, default=3.5)
    ap.add_argument("--faults", default=",".join(EXPECTED_STOP),
                    help="comma-separated fault kinds (default: all)")
    args = ap.parse_args(argv)
    faults = [f for f in args.faults.split(",") if f]
    unknown = sorted(set(faults) - set(EXPECTED_STOP))
    if unknown:
        ap.error(f"--faults: unknown {unknown}; expected some of {list(EXPECTED_STOP)}")
    print(f"{'limits':8s} {'fault':18s} {'expected':19s} {'stop':19s} {'ok':3s} "
          f"{'to stop':>9s} {'to rest':>9s}  note")
    with tempfile.TemporaryDirectory() as tmp:
        tight = tight_limits(Path(tmp))
        for label, limits in (("demo", None), ("60%", tight)):
            for fault in faults:
                for k in range(args.repeat):
                    folder = Path(tmp) / f"{label}_{fault}_{k}"
                    folder.mkdir()
                    r = run(fault, args.at, args.duration, limits, folder)
                    if "error" in r:
                        print(f"{label:8s} {fault:18s} {r['error']}", flush=True)
                        continue
                    print(f"{label:8s} {fault:18s} {r['expected']:19s} {r['stop'] or '-':19s} "
                          f"{'yes' if r['as_expected'] else 'no':3s} "
                          f"{1e3 * r['stop_after']:7.0f}ms {1e3 * r['rest_after']:7.0f}ms  "
                          f"{r['note'][:60]}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
