# SPDX-License-Identifier: Apache-2.0
"""Thirty seconds of everything at once against the moving adapter, over real rclpy/DDS.

In a seeded random order, about every 80 ms: policy swaps (valid ones and a card that does
not fit), limit_scale lowered and a raise (refused), stops by topic and by service, the
stop latch cleared, resets (accepted or refused with a reason), the reference resumed,
lifecycle state queries and a transition that is not valid while active, parameter reads.
Checked from outside: every service answers (within its timeout) with the answer the
interface promises, the whole stream stays within the limits and continuous (the probe's
independent checker), and at the end the adapter follows again after one reset at rest.
"""
from __future__ import annotations

import random
import time
from collections import Counter

import pytest
import rclpy
from lifecycle_msgs.msg import Transition
from std_msgs.msg import Bool
from std_srvs.srv import Trigger

import adapter_harness as h

pytestmark = pytest.mark.ros

DURATION = 30.0
ANSWER = 5.0   # [s] every service answers within this (it answers in ms when healthy)
SWAP_CARDS = ("tracker", "onnx")


@pytest.fixture(scope="module")
def cards(tmp_path_factory):
    folder = tmp_path_factory.mktemp("stress")
    return folder, {"tracker": h.write_card(folder, "tracker", "tracker"),
                    "onnx": h.write_tracking_onnx(folder, "onnx_tracker"),
                    "wrong_period": h.write_card(folder, "wrong_period", "tracker",
                                                 decision_period=0.02)}


@pytest.fixture(scope="module")
def cell(cards):
    rclpy.init()
    folder, c = cards
    cell = h.Cell(folder, c["tracker"])
    try:
        cell.start_following()
        cell.start_reference()
        yield cell
    finally:
        try:
            cell.close()
        finally:
            rclpy.shutdown()


def test_thirty_seconds_of_swaps_stops_resets_and_requests(cell, cards):
    _, c = cards
    rng = random.Random(20)
    seen: Counter[str] = Counter()
    scale = 1.0
    t0 = cell.now()

    def swap() -> None:
        card = c[rng.choice(SWAP_CARDS)]
        res = cell.set_params(policy=str(card))[0]
        # refused only when the load took longer than the cycle can wait (a loaded machine)
        assert res.successful or "longer than" in res.reason, res.reason
        seen["swap" if res.successful else "swap refused: slow load"] += 1

    def bad_swap() -> None:
        res = cell.set_params(policy=str(c["wrong_period"]))[0]
        assert not res.successful and "decision_period" in res.reason, res.reason

    def scale_down() -> None:
        nonlocal scale
        if scale > 0.55:
            scale = round(scale - 0.1, 2)
            assert cell.set_params(limit_scale=scale)[0].successful
        res = cell.set_params(limit_scale=1.0)[0]
        assert scale == 1.0 or not res.successful and "lowered" in res.reason, res.reason

    def stop_topic() -> None:
        cell.probe.stop_pub.publish(Bool(data=rng.random() < 0.5))

    def stop_service() -> None:
        assert cell.call(Trigger, "/adapter/stop", timeout=ANSWER).message

    def reset() -> None:
        res = cell.call(Trigger, "/adapter/reset", timeout=ANSWER)
        assert res.message   # accepted, or refused with the reason
        seen["reset accepted" if res.success else "reset refused"] += 1

    def resume() -> None:
        res = cell.call(Trigger, "/reference_server/resume", timeout=ANSWER)
        assert res.message

    def state() -> None:
        assert cell.state(timeout=ANSWER) == "active"

    def bad_transition() -> None:
        assert not cell.transition(Transition.TRANSITION_CONFIGURE, timeout=ANSWER)

    def read() -> None:
        assert cell.get_param("policy_active") in (str(c["tracker"]), str(c["onnx"]))

    ops = [swap, swap, bad_swap, scale_down, stop_topic, stop_service, reset, reset, resume,
           resume, state, bad_transition, read]
    end = time.monotonic() + DURATION
    while time.monotonic() < end:
        op = rng.choice(ops)
        op()
        seen[op.__name__] += 1
        time.sleep(rng.uniform(0.0, 0.16))
    print("operations:", dict(seen))
    # every stop cleared, the reference paused (a resumed one would run away from the
    # approach, which moves at approach_scale), one reset at rest: the adapter approaches,
    # follows, and follows the resumed reference
    cell.probe.stop_pub.publish(Bool(data=False))
    assert cell.trigger("/reference_server/pause").message
    cell.wait_rest(timeout=15.0)
    time.sleep(0.3)
    res = cell.trigger("/adapter/reset")
    assert res.success, res.message
    cell.wait_mode("following")
    cell.start_reference()
    time.sleep(1.0)
    check = h.check_stream(cell.samples_since(t0))
    print("stream:", check.describe())
    assert check.ok, check.describe()
    assert cell.state() == "active"
    assert seen["reset accepted"] > 0 and seen["swap"] > 5, dict(seen)
