# SPDX-License-Identifier: Apache-2.0
"""The soak bench for 60 seconds (`make soak` runs it for 10 minutes).

Runs ``bench/soak.py`` as its own process (the demo stack: cell and adapter processes, the
operator with the stream check in a third): a pseudo-random policy at a 500 Hz stream, a
fault every 7 s (each kind once: jumped reference window, joint_states stall, feedback
dropout, NaN policy, slow policy, ~/stop, the stop topic), reset and resume after each.
Checks the figures it writes, and re-checks every received setpoint here with
`fuzz_harness.step_check` (mean value theorem bounds, independent of the package's code).
Timings are printed, never asserted.
"""
import json
import subprocess
import sys
from pathlib import Path

import numpy as np

import fuzz_harness

ROOT = Path(__file__).resolve().parents[1]
DURATION = 60.0


def test_soak_60_s_no_violation_every_fault_stops_and_recovers(tmp_path, request):
    report, stream = tmp_path / "soak.json", tmp_path / "stream.npz"
    proc = subprocess.run(
        [sys.executable, str(ROOT / "bench" / "soak.py"), "--duration", str(DURATION),
         "--fault-every", "7", "--warmup", "20", "--json", str(report),
         "--save-stream", str(stream), "--keep-logs", str(tmp_path / "logs")],
        capture_output=True, text=True, timeout=DURATION + 240)
    fuzz_harness.print_uncaptured(request, proc.stdout.strip())
    assert report.is_file(), proc.stdout + proc.stderr
    f = json.loads(report.read_text())
    assert not f["error"], f["error"]
    assert f["setpoints_checked"] > 1000
    assert f["violations_total"] == 0, f["violations"]
    assert f["faults_injected"] == 7
    for rec in f["faults"]:
        if rec["fault"] != "none":
            assert rec["trip"] == rec["expected"], rec
        assert rec["recovered"], rec
    counters = f["adapter_counters"]
    assert counters["stream_errors"] == "0" and counters["decision_errors"] == "0", counters
    assert f["adapter_rss"]["growth_after_warmup_mb"] < 5.0, f["adapter_rss"]

    # independent re-check of every received setpoint (mean value theorem bounds)
    data = np.load(stream)
    assert data["stamps_ns"].shape[0] == f["setpoints_checked"]
    bad = fuzz_harness.step_check(data["stamps_ns"], data["position"], data["velocity"],
                                  data["acceleration"])
    assert not bad, bad
