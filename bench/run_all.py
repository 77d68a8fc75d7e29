# SPDX-License-Identifier: Apache-2.0
"""`make bench`: run every benchmark script in bench/ and print their figures.

Each script prints its own figures (and the command that reproduces them); this runner
only runs them in order. Pass script names to run a subset:
``.venv/bin/python bench/run_all.py limit_stage_speed cycle_speed``.
"""
from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).parent
ORDER = ["limit_stage_speed", "policy_speed", "card_load", "cycle_speed", "plan_speed",
         "replay_speed",
         "batch_speed",
         "stream_timing",
         "limit_stage_acceptance", "env_speed"]


def main(argv: list[str]) -> int:
    """Run the chosen (default: all) benchmarks; non-zero if one failed."""
    names = argv or [n for n in ORDER if (HERE / f"{n}.py").is_file()]
    failed = []
    for name in names:
        print(f"\n=== {name}  (.venv/bin/python bench/{name}.py)", flush=True)
        t0 = time.monotonic()
        rc = subprocess.call([sys.executable, str(HERE / f"{name}.py")])
        print(f"=== {name}: {'ok' if rc == 0 else f'exit {rc}'} in {time.monotonic() - t0:.0f} s",
              flush=True)
        if rc:
            failed.append(name)
    if failed:
        print(f"failed: {failed}")
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
