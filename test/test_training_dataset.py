# SPDX-License-Identifier: Apache-2.0
"""`adaptive-streamer dataset`: training tables from a recorded live run.

The bag is a real recording of the real stack over DDS (`replay_harness`). External checks:
the observations are rebuilt independently with the replay layer's input rebuilder
(`InputRebuilder.exact`, the code replay uses to reproduce the live decisions bit for bit)
and must match the table bit for bit; the state blocks must equal the decision records'
planned state through the card format's normalisation; the recorded action and interval
are copied unchanged.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import replay_harness
from adaptive_streamer.core.alignment import align
from adaptive_streamer.core.feedback import FeedbackParser
from adaptive_streamer.core.policies.card import load_card
from adaptive_streamer.core.policy_inputs import PolicyInputs
from adaptive_streamer.io.bag_io import read_bag
from adaptive_streamer.io.messages import decision_records
from adaptive_streamer.replay.inputs import InputRebuilder
from adaptive_streamer.sim.closed_loop import demo_file

pytestmark = [pytest.mark.ros, pytest.mark.slow]


@pytest.fixture(scope="module")
def live_bag(tmp_path_factory):
    return replay_harness.live_recording(tmp_path_factory.getbasetemp())


def test_dataset_rows_are_what_the_policy_saw(live_bag: Path, tmp_path: Path) -> None:
    card_path = demo_file("policy_edge.yaml")
    out = tmp_path / "table.npz"
    proc = subprocess.run([sys.executable, "-m", "adaptive_streamer.cli", "dataset",
                           str(live_bag), "--card", str(card_path), "--out", str(out)],
                          capture_output=True, text=True, env=os.environ.copy(), timeout=300)
    assert proc.returncode == 0, proc.stderr
    table = np.load(out)
    card = load_card(card_path)
    layout = card.observation_layout()

    bag = read_bag(live_bag)
    get = lambda name: bag.get(name) or bag.get("/" + name)  # noqa: E731
    rec = get("adapter/decisions")
    records, index = decision_records(rec.raw)
    following = [(d, int(rec.times[i])) for d, i in zip(records, index)
                 if d.mode == "following"]
    if not following:  # the adapter stopped before following (seen under heavy load)
        pytest.skip(f"the live recording {live_bag} holds no 'following' decision to check")
    assert len(following) == table["time"].shape[0]
    rebuilder = InputRebuilder(card.joints, FeedbackParser(card.feedback_features),
                               get("reference/window"), get("feedback"),
                               get("joint_states"))
    offsets = np.arange(max(2, layout.horizon)) * card.decision_period
    previous = np.zeros(6)
    first = True
    for k, (d, now_ns) in enumerate(following):
        si, missing = rebuilder.exact(now_ns, d.window_stamp, d.feedback_stamp)
        assert not missing
        ref = align(si.window, d.time + offsets)
        if first:
            previous, first = np.zeros(6), False
        obs = layout.build(PolicyInputs(d.time, d.state, ref.positions, ref.velocities,
                                        ref.accelerations, si.feedback, previous))
        np.testing.assert_array_equal(table["observation"][k], obs)
        previous = d.action if d.verdict == "ok" else previous
        # the card format: joint_velocity block = v / velocity_max (float32)
        s = layout.slices[0]
        np.testing.assert_array_equal(
            table["observation"][k][s],
            (d.state.velocity / card.limits.velocity_max).astype(np.float32))
        np.testing.assert_array_equal(table["action"][k], d.action)
        np.testing.assert_array_equal(table["admissible_low"][k], d.lo)
        np.testing.assert_array_equal(table["admissible_high"][k], d.hi)
        np.testing.assert_array_equal(table["u"][k], d.u)
    r = table["reward"][:-1]
    assert np.all((r >= 0) & (r <= 1))
    np.testing.assert_allclose(r, (table["reward_task"] * table["reward_deviation"]
                                   * table["reward_smoothness"])[:-1], rtol=1e-12)
