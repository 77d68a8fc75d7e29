# SPDX-License-Identifier: Apache-2.0
"""Fuzzing at larger counts than `make test` runs, with the cases tried per input kind.

The same targets as test/test_fuzz_files.py and test/test_fuzz_topics.py (in
test/fuzz_harness.py): limits files, params files, policy cards and ONNX models (ROS-free),
then, over real DDS, joint_states, reference windows, feedback, the sensor_bridge's input,
the driver's command topic and sim time going backwards. A property violation stops the
run with hypothesis's shrunk example (exit code 1); otherwise it prints one line per input
kind: cases tried and how they ended (accepted, refused, stopped and why).

    .venv/bin/python bench/fuzz_report.py                      # 1000 per file kind, 100 per topic kind
    .venv/bin/python bench/fuzz_report.py --files 200 --topics 0
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "test"))
os.environ.setdefault("ROS_AUTOMATIC_DISCOVERY_RANGE", "LOCALHOST")
os.environ.setdefault("ROS_DOMAIN_ID", str(1 + os.getpid() % 100))

import fuzz_harness  # noqa: E402  (after the path and DDS settings above)
from fuzz_harness import Cases  # noqa: E402

CLOCK_JUMPS = (0.004, 0.02, 0.1, 0.4, 1.0, 2.5)   # seconds the sim clock is sent back


def main(argv: list[str] | None = None) -> int:
    """Entry point; see the module docstring."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--files", type=int, default=1000, help="examples per file kind")
    ap.add_argument("--topics", type=int, default=100,
                    help="examples per topic kind (0: skip the DDS part)")
    ap.add_argument("--seed", type=int, default=0, help="hypothesis seed (0: derandomised)")
    args = ap.parse_args(argv)
    cases = Cases()
    folder = Path(tempfile.mkdtemp(prefix="adaptive_streamer_fuzz_"))
    t0 = time.monotonic()
    for kind in fuzz_harness.FILE_KINDS:
        t = time.monotonic()
        fuzz_harness.fuzz_files(kind, args.files, cases, folder / kind.replace(" ", "_"),
                                seed=args.seed)
        print(f"{kind}: {cases.tried(kind)} cases in {time.monotonic() - t:.1f} s", flush=True)
    if args.topics:
        import rclpy
        rclpy.init()
        (folder / "topics").mkdir()
        (folder / "clock").mkdir()
        fuzz = fuzz_harness.TopicFuzz(folder / "topics")
        clock = None
        try:
            fuzz.start()
            for kind in fuzz_harness.TOPIC_CASES:
                t = time.monotonic()
                fuzz_harness.fuzz_topics(fuzz, kind, args.topics, cases)
                print(f"{kind}: {cases.tried(kind)} cases in {time.monotonic() - t:.1f} s",
                      flush=True)
            fuzz.ensure_following()
            bad = fuzz_harness.step_check(*fuzz.stream())
            if bad:
                print(f"setpoints outside the limits during the topic fuzzing: {bad}")
                return 1
            clock = fuzz_harness.ClockFuzz(folder / "clock")
            clock.start()
            for back in CLOCK_JUMPS:
                cases.add("sim time backwards", clock.run_jump(back))
            bad = fuzz_harness.step_check(*clock.stream())
            if bad:
                print(f"setpoints outside the limits around the clock jumps: {bad}")
                return 1
            errors = {k: v for k, v in fuzz.adapter._counters.items()
                      if k in ("stream_errors", "decision_errors") and v}
            errors.update({f"sim time {k}": v for k, v in clock.adapter._counters.items()
                           if k in ("stream_errors", "decision_errors") and v})
            if errors or fuzz.bridge._callback_errors:
                print(f"callback errors: {errors}, bridge {fuzz.bridge._callback_errors}")
                return 1
        finally:
            if clock is not None:
                clock.close()
            fuzz.close()
            rclpy.shutdown()
    print(f"\nfuzzing, cases tried per input kind ({time.monotonic() - t0:.0f} s; every "
          "streamed setpoint within the limits, no callback error):")
    print(cases.table())
    print("\ncommand: .venv/bin/python bench/fuzz_report.py " + " ".join(argv or sys.argv[1:]))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
