# SPDX-License-Identifier: Apache-2.0
"""The README's demo claim: the live demo over 10 scenario seeds, and the median.

Runs ``adaptive-streamer demo --seed K`` for K = 0..9 (each a full live pass over DDS),
reads each run's summary.json and prints per-seed lateral errors and the medians. Run:
``.venv/bin/python scripts/demo_seeds.py [--policy KIND] [--seeds 10]`` (about 5 minutes).
"""
from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path


def main() -> int:
    """Run the seeds and print the table."""
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--seeds", type=int, default=10)
    ap.add_argument("--policy", default=None)
    args = ap.parse_args()
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(args.seeds):
            out = Path(tmp) / f"seed{seed}"
            cmd = [sys.executable, "-m", "adaptive_streamer.cli", "demo", "--seed", str(seed),
                   "--report", str(out), "--no-progress"]
            if args.policy:
                cmd += ["--policy", args.policy]
            rc = subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.STDOUT).returncode
            s = json.loads((out / "summary.json").read_text())
            rows.append(s)
            print(f"seed {seed}: adapted RMS {s['lateral_rms_mm']:.2f} mm (max "
                  f"{s['lateral_max_mm']:.2f}), reference only RMS {s['reference_only_rms_mm']:.2f} "
                  f"mm (max {s['reference_only_max_mm']:.2f}), ratio "
                  f"{s['lateral_rms_mm'] / s['reference_only_rms_mm']:.3f}, violations "
                  f"{s['violations']}, watchdog events {len(s['watchdog_events'])}, exit {rc}",
                  flush=True)
    med = statistics.median
    print(f"median over {len(rows)} seeds: adapted RMS {med(r['lateral_rms_mm'] for r in rows):.2f} mm,"
          f" reference only RMS {med(r['reference_only_rms_mm'] for r in rows):.2f} mm, ratio "
          f"{med(r['lateral_rms_mm'] / r['reference_only_rms_mm'] for r in rows):.3f}; max errors "
          f"{med(r['lateral_max_mm'] for r in rows):.2f} vs "
          f"{med(r['reference_only_max_mm'] for r in rows):.2f} mm; total violations "
          f"{sum(r['violations'] for r in rows)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
