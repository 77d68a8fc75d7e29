# SPDX-License-Identifier: Apache-2.0
"""Fuzzing of every file a user gives the package (ROS-free), with hypothesis.

Limits files (own YAML and URDF), params files (`adaptive_streamer.bringup.read_params`),
policy cards and ONNX models (wrong input/output names, shapes, dtypes, NaN/inf/huge
outputs, failing graphs, corrupted files): each case must end in the module's own error
with a message naming the file, or in something sound (limits a limit stage accepts with
"hold still" admissible at rest; a policy whose decisions stay within the limits, a bad
output becoming a controlled stop). The targets and strategies are in `fuzz_harness`;
`bench/fuzz_report.py` runs them with larger counts. The cases tried per input kind are
printed at the end of this module.
"""
import pytest

import fuzz_harness
from fuzz_harness import Cases

CASES = Cases()
EXAMPLES = {"limits file": 150, "params file": 150, "policy card": 120, "onnx model": 80}


@pytest.fixture(scope="module", autouse=True)
def print_counts(request):
    """Print the cases tried per input kind (shown even when output is captured)."""
    yield
    fuzz_harness.print_uncaptured(request, "file fuzzing, cases tried per input kind:\n"
                                  + CASES.table())


@pytest.mark.parametrize("kind", sorted(EXAMPLES))
def test_fuzzed_file_is_refused_clearly_or_sound(kind, tmp_path):
    fuzz_harness.fuzz_files(kind, EXAMPLES[kind], CASES, tmp_path)
    assert CASES.tried(kind) > 0
