# SPDX-License-Identifier: Apache-2.0
"""Run the whole test suite: the modules that talk over DDS (marked ``ros``) each in a pytest
process of their own, every other module together in one. DDS modules that declare the same
``SUITE_GROUP = "name"`` share a process (the replay modules share one live recording).

A test module's rclpy contexts and DDS participants live until the collector finalises them,
and what one module leaves in the process (a participant, a discovery thread, a matched
endpoint) can keep a later module's service replies from arriving. A node in the field runs
in a process of its own; its tests do too. Extra arguments go to every pytest run.

    python test/run_suite.py [PYTEST_ARGS...]
"""
from __future__ import annotations

import re
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
MARK = "pytest.mark.ros"
GROUP = re.compile(r'^SUITE_GROUP = "([^"]+)"', re.M)


@dataclass(frozen=True)
class RunResult:
    """One pytest process: what it ran, its exit code and how long it took."""

    label: str
    code: int
    seconds: float

    @property
    def ok(self) -> bool:
        """Passed, or collected nothing to run (pytest's exit code 5)."""
        return self.code in (0, 5)


def dds_modules(folder: Path) -> list[Path]:
    """The test modules that use the ``ros`` mark (module- or test-level)."""
    return sorted(p for p in folder.glob("test_*.py") if MARK in p.read_text())


def dds_runs(modules: list[Path]) -> dict[str, list[Path]]:
    """The pytest runs of the DDS modules: label -> modules (one each, or a declared group)."""
    runs: dict[str, list[Path]] = {}
    for p in modules:
        found = GROUP.search(p.read_text())
        runs.setdefault(found.group(1) if found else p.name, []).append(p)
    return runs


def run(label: str, args: list[str]) -> RunResult:
    """Run pytest with ``args`` in a new process."""
    print(f"== {label}", flush=True)
    t0 = time.monotonic()
    code = subprocess.call([sys.executable, "-m", "pytest", *args])
    return RunResult(label, code, time.monotonic() - t0)


def main(extra: list[str]) -> int:
    """Run the suite; 0 when every pytest process passed."""
    alone = dds_modules(HERE)
    ignore = [f"--ignore={p}" for p in alone]
    results = [run("modules without DDS", [*extra, *ignore, str(HERE)])]
    results += [run(label, [*extra, *map(str, group)])
                for label, group in dds_runs(alone).items()]
    print("\n== suite summary")
    for r in results:
        print(f"{'ok    ' if r.ok else 'FAILED'} {r.label} ({r.seconds:.0f} s, exit {r.code})")
    failed = [r for r in results if not r.ok]
    print(f"{len(results) - len(failed)} of {len(results)} pytest runs passed in "
          f"{sum(r.seconds for r in results):.0f} s")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
