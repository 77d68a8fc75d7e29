"""`adaptive-streamer demo --inject FAULT@S`: every fault kind, with the demo's limits and
with tighter ones (the demo then runs another policy and builds its fault policies for
those limits), ends in the watchdog stop expected for it, and the summary says so; faults
that could not stop the run are refused before the pass, with the reason.

The expected stop per fault is the watchdog trigger for what the fault does (the trigger
table in adaptive_streamer/core/watchdog.py): readings stop -> feedback_stale, joint_states
stop -> joint_states_stale, a reference 0.2 rad off the plan (deviation_joint 0.07 rad in
the demo params) -> deviation, NaN actions -> policy_fault, decisions later than the
period -> overruns.
"""
import json
import math

import pytest
import yaml

from adaptive_streamer.share import demo_file
from test_demo import run_demo

pytestmark = pytest.mark.ros

EXPECTED = {"feedback_dropout": "feedback_stale", "reference_jump": "deviation",
            "joint_state_stall": "joint_states_stale", "nan_policy": "policy_fault",
            "slow_policy": "overruns"}
INJECT_AT = 1.0   # the demo reference starts moving at about 0.9 s
DURATION = 3.5


@pytest.fixture(scope="module")
def tight_limits(tmp_path_factory):
    """The demo's limits with velocity, acceleration and jerk at 60 %."""
    lim = yaml.safe_load(demo_file("limits.yaml").read_text())
    for entry in lim["joints"].values():
        for key in ("velocity", "acceleration", "jerk"):
            entry[key] = round(0.6 * entry[key], 6)
    path = tmp_path_factory.mktemp("limits") / "tight.yaml"
    path.write_text(yaml.safe_dump(lim))
    return path


@pytest.mark.parametrize("limits", ["demo", "tight"])
@pytest.mark.parametrize("kind", sorted(EXPECTED))
def test_each_fault_ends_in_its_expected_stop(tmp_path, tight_limits, kind, limits):
    extra = ["--limits", str(tight_limits)] if limits == "tight" else []
    rc, out, report = run_demo(tmp_path, "--inject", f"{kind}@{INJECT_AT:g}",
                               "--duration", f"{DURATION:g}", "--no-plots", *extra, timeout=120)
    assert rc == 0, out[-4000:]
    (fault,) = json.loads((report / "summary.json").read_text())["faults"]
    assert fault["fault"] == kind and fault["expected"] == EXPECTED[kind], fault
    assert fault["injected"], (fault, out[-3000:])
    assert fault["stop"] == EXPECTED[kind] and fault["as_expected"], (fault, out[-3000:])
    assert 0.0 <= fault["stop_after"] < DURATION - INJECT_AT, fault
    assert math.isfinite(fault["rest_after"]), fault   # the stop brought the arm to rest
    assert f"{kind} at +{INJECT_AT:g} s (expected stop: {EXPECTED[kind]}): " \
           f"{EXPECTED[kind]} stop" in out
    if limits == "tight" and kind in ("nan_policy", "slow_policy"):
        assert "fault policy built for this run" in out, out[-3000:]


@pytest.mark.parametrize("args, words", [
    (["--policy", "tracker", "--inject", "feedback_dropout@1"], "reads no feedback"),
    (["--inject", "nan_policy@1", "--inject", "slow_policy@2"], "one fault per run"),
    (["--inject", "joint_state_stall@5", "--duration", "3"], "before the injection"),
    (["--inject", "nan_policy@10.6"], "the reference stands still"),  # it ends at 10.8 s
])
def test_a_fault_that_could_not_stop_the_run_is_refused_before_the_pass(tmp_path, args, words):
    rc, out, _ = run_demo(tmp_path, *args, timeout=60)
    assert rc == 2 and words in out and "Traceback" not in out, out[-2000:]
    assert "dispensing pass" not in out
