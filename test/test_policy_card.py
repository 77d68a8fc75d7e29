# SPDX-License-Identifier: Apache-2.0
"""Policy cards: parsing the committed cards, every validation error (naming file and
field), default gains, and refusal of cards that do not fit the running configuration."""
import math
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.observation import ObservationBlock
from adaptive_streamer.core.policies import (CardError, PolicyError, RunningConfig, check_card,
                                             load_card, load_policy)
from test_policies import make_mlp

DATA = Path(__file__).parent / "data" / "policies"
JOINTS7 = tuple(f"j{i}" for i in range(1, 8))
LIMITS7 = JointLimits.from_file(DATA / "limits7.yaml")


@pytest.fixture
def folder(tmp_path) -> Path:
    """The committed test cards in a fresh folder, with a small model for the onnx card."""
    out = tmp_path / "policies"
    shutil.copytree(DATA, out)
    make_mlp(out / "mlp7.onnx", 116, 7, hidden=(8,))
    return out


def write(folder: Path, base: str, change) -> Path:
    """A card made from ``base`` (a committed card) with ``change(data)`` applied."""
    data = yaml.safe_load((folder / base).read_text())
    change(data)
    path = folder / "edited.card.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def setter(**fields):
    return lambda data: data.update(fields)


def dropper(*keys):
    return lambda data: [data.pop(k) for k in keys]


def obs(index, entry):
    def change(data):
        data["observation"][index] = entry
    return change


def running(**changes) -> RunningConfig:
    base = dict(joints=JOINTS7, decision_period=0.05, limits=LIMITS7, horizon=5,
                features=("edge_offset", "edge_angle"))
    base.update(changes)
    return RunningConfig(**base)


# ---------------------------------------------------------------------------- good cards
def test_onnx_card_parses_every_field(folder):
    card = load_card(folder / "mlp7.card.yaml")
    assert (card.name, card.kind, card.action) == ("mlp7_test", "onnx", "normalised")
    assert card.description == "2x64 tanh MLP, every observation block"
    assert card.joints == JOINTS7 and card.decision_period == 0.05
    assert card.limits.same_as(LIMITS7)
    assert card.model == folder / "mlp7.onnx"
    assert (card.onnx.input, card.onnx.output, card.onnx.intra_op_threads) == ("obs", "action", 1)
    assert card.observation[3] == ObservationBlock("reference_position", 5, (0.1,) * 7)
    assert card.observation[6] == ObservationBlock(
        "feedback", features=("edge_offset", "edge_angle"), scale=(0.005, 0.02),
        offset=(0.001, 0.0))
    assert card.feedback_features == ("edge_offset", "edge_angle")
    assert card.reference_points == 5
    assert card.source == str(folder / "mlp7.card.yaml")


def test_default_tracker_gains_are_a_critically_damped_pair(folder):
    card = load_card(folder / "tracker7.card.yaml")
    w = 2 * math.pi * 1.5  # at the card's 50 ms decision period
    np.testing.assert_allclose(card.gains.kp, w * w)
    np.testing.assert_allclose(card.gains.kd, 2 * w)  # critical damping: kd = 2 sqrt(kp)
    np.testing.assert_array_equal(card.gains.feedforward, 1.0)
    assert card.action == "acceleration" and card.reference_points == 2


@pytest.mark.parametrize("gains, kp, kd", [
    ({"kp": 64.0}, 64.0, 16.0),                   # kd = 2 sqrt(kp)
    ({"kd": 10.0}, 25.0, 10.0),                   # kp = (kd / 2)^2
    ({"kp": 1.0, "kd": 0.5}, 1.0, 0.5),
])
def test_missing_gains_complete_a_critically_damped_pair(folder, gains, kp, kd):
    card = load_card(write(folder, "tracker7.card.yaml", setter(gains=gains)))
    np.testing.assert_allclose(card.gains.kp, kp)
    np.testing.assert_allclose(card.gains.kd, kd)


def test_linear_feedback_card(folder):
    card = load_card(folder / "edge7.card.yaml")
    assert card.feedback_gain.features == ("edge_offset", "edge_angle")
    assert card.feedback_gain.matrix.shape == (7, 2) and card.feedback_gain.matrix[2, 1] == 0.5
    np.testing.assert_allclose(card.gains.kd, 2 * math.sqrt(80.0))
    assert card.feedback_features == ("edge_offset", "edge_angle")


def test_hold_card_takes_its_joints_from_a_larger_limits_file(folder):
    card = load_card(folder / "hold3.card.yaml")
    assert card.limits.names == ("j1", "j2", "j3") and card.action == "brake"
    assert card.limits.same_as(LIMITS7.subset(["j1", "j2", "j3"]))


def test_inline_limits_and_per_joint_gains(folder):
    inline = LIMITS7.to_dict()
    card = load_card(write(folder, "tracker7.card.yaml",
                           setter(limits=inline, gains={"kp": list(range(1, 8)), "kd": 2.0})))
    assert card.limits.same_as(LIMITS7)
    assert card.gains.kp.tolist() == [1, 2, 3, 4, 5, 6, 7]


# ---------------------------------------------------------------------------- errors
@pytest.mark.parametrize("base, change, message", [
    ("mlp7.card.yaml", setter(policy_card=2), "policy_card: expected format version 1, got 2"),
    ("mlp7.card.yaml", setter(kind="lstm"), "kind: unknown policy kind 'lstm'; expected one of "
                                            "onnx, tracker, linear_feedback, hold"),
    ("tracker7.card.yaml", setter(gain={"kp": 1}), "unknown or unused field(s) ['gain'] for "
                                                   "kind 'tracker'"),
    ("tracker7.card.yaml", setter(observation=["joint_position"]),
     "unknown or unused field(s) ['observation'] for kind 'tracker'"),
    ("mlp7.card.yaml", dropper("model", "action"), "missing required field(s) ['model', "
                                                   "'action'] for kind 'onnx'"),
    ("mlp7.card.yaml", setter(model="absent.onnx"), "model: file '{folder}/absent.onnx' not found"),
    ("mlp7.card.yaml", setter(name=""), "name: expected a non-empty string"),
    ("mlp7.card.yaml", setter(joints=["j1", "j1"]), "joints: names repeat: ['j1']"),
    ("mlp7.card.yaml", setter(decision_period=float("nan")), "decision_period: must be finite"),
    ("mlp7.card.yaml", setter(decision_period=-0.05), "decision_period: must be positive"),
    ("mlp7.card.yaml", setter(decision_period="50ms"), "decision_period: expected a number"),
    ("mlp7.card.yaml", setter(joints=["j1", "j9"]), "limits: joint(s) ['j9'] of the card are "
                                                    "not in the limits"),
    ("mlp7.card.yaml", setter(limits="nowhere.yaml"), "limits: cannot read limits file"),
    ("mlp7.card.yaml", setter(limits={"joints": {"j1": {"velocity": 1.0}}}),
     "limits: joint 'j1': missing 'position'"),
    ("mlp7.card.yaml", setter(limits=3), "limits: expected a limits file path or an inline"),
    ("mlp7.card.yaml", setter(action="brake"), "action: 'brake' is not possible for kind "
                                               "'onnx'; expected normalised or acceleration"),
    ("tracker7.card.yaml", setter(action="normalised"), "action: 'normalised' is not possible "
                                                        "for kind 'tracker'"),
    ("mlp7.card.yaml", setter(observation=[]), "observation: expected a non-empty list"),
    ("mlp7.card.yaml", obs(1, "joint_jerk"), "observation[1]: unknown block 'joint_jerk'"),
    ("mlp7.card.yaml", obs(3, "reference_position"),
     "observation[3] (reference_position): horizon: expected an integer >= 1"),
    ("mlp7.card.yaml", obs(4, {"block": "reference_velocity", "horizon": 0}),
     "observation[4] (reference_velocity): horizon: expected an integer >= 1 (reference points), "
     "got 0"),
    ("mlp7.card.yaml", obs(4, {"block": "reference_velocity", "horizon": 2, "scale": 1.0}),
     "observation[4] (reference_velocity): unknown parameter(s) ['scale']; allowed: ['horizon']"),
    ("mlp7.card.yaml", obs(0, {"block": "joint_position", "scale": 1.0}),
     "observation[0] (joint_position): unknown parameter(s) ['scale']; allowed: none"),
    ("mlp7.card.yaml", obs(3, {"block": "reference_position", "horizon": 2, "scale": -0.1}),
     "observation[3] (reference_position): scale: must be positive"),
    ("mlp7.card.yaml", obs(3, {"block": "reference_position", "horizon": 2, "scale": [1, 2]}),
     "observation[3] (reference_position): scale: expected one number or 7 (one per joint), "
     "got 2"),
    ("mlp7.card.yaml", obs(6, {"block": "feedback"}), "observation[6] (feedback): missing "
                                                      "'features'"),
    ("mlp7.card.yaml", obs(6, {"block": "feedback", "features": ["x"], "scale": 0}),
     "observation[6] (feedback): scale: must be non-zero"),
    ("mlp7.card.yaml", obs(6, {"block": "feedback", "features": ["x"], "offset": float("nan")}),
     "observation[6] (feedback): offset[0]: must be finite, got nan"),
    ("mlp7.card.yaml", setter(onnx={"inputs": "obs"}), "onnx: unknown field(s) ['inputs']"),
    ("mlp7.card.yaml", setter(onnx={"intra_op_threads": 0}), "onnx.intra_op_threads: expected "
                                                             "an integer >= 1, got 0"),
    ("mlp7.card.yaml", setter(onnx={"input": 3}), "onnx.input: expected a tensor name"),
    ("tracker7.card.yaml", setter(gains={"kp": [1.0, 2.0]}),
     "gains.kp: expected one number or 7 (one per joint ['j1', 'j2', 'j3', 'j4', 'j5', 'j6', "
     "'j7']), got 2"),
    ("tracker7.card.yaml", setter(gains={"kp": -1.0}), "gains.kp: must be >= 0"),
    ("tracker7.card.yaml", setter(gains={"kd": float("nan")}), "gains.kd[0]: must be finite"),
    ("tracker7.card.yaml", setter(gains={"ki": 1.0}), "gains: unknown field(s) ['ki']"),
    ("edge7.card.yaml", lambda d: d["feedback_gain"].pop("matrix"),
     "feedback_gain: expected a mapping with exactly 'features' and 'matrix'"),
    ("edge7.card.yaml", lambda d: d["feedback_gain"]["matrix"].pop(),
     "feedback_gain.matrix: expected 7 rows (joints ['j1', 'j2', 'j3', 'j4', 'j5', 'j6', 'j7']) "
     "of 2 numbers (features ['edge_offset', 'edge_angle'])"),
    ("edge7.card.yaml", lambda d: d["feedback_gain"]["matrix"][1].__setitem__(0, float("inf")),
     "feedback_gain.matrix[1][0]: must be finite, got inf"),
    ("edge7.card.yaml", dropper("feedback_gain"), "missing required field(s) ['feedback_gain']"),
])
def test_card_errors_name_the_file_and_field(folder, base, change, message):
    path = write(folder, base, change)
    with pytest.raises(CardError) as err:
        load_card(path)
    text = str(err.value)
    assert text.startswith(str(path) + ": ")
    assert message.format(folder=folder) in text


def test_unreadable_and_malformed_files(folder):
    with pytest.raises(CardError, match="cannot read policy card '.*absent.yaml'"):
        load_card(folder / "absent.yaml")
    (folder / "bad.yaml").write_text("policy_card: [1\n")
    with pytest.raises(CardError, match="bad.yaml: not valid YAML"):
        load_card(folder / "bad.yaml")
    (folder / "list.yaml").write_text("- 1\n")
    with pytest.raises(CardError, match="list.yaml: a policy card must be a YAML mapping"):
        load_card(folder / "list.yaml")


def test_card_errors_are_policy_errors():
    assert issubclass(CardError, PolicyError) and issubclass(PolicyError, ValueError)


# ---------------------------------------------------------------------------- vs running config
def test_a_fitting_card_passes(folder):
    for name in ("mlp7.card.yaml", "tracker7.card.yaml", "edge7.card.yaml"):
        check_card(load_card(folder / name), running())


def test_joint_mismatch_shows_both_lists(folder):
    limits = LIMITS7.subset(list(reversed(JOINTS7)))
    with pytest.raises(CardError, match=r"joints: card \['j1', .*'j7'\] vs running \['j7', "
                                        r".*'j1'\]"):
        check_card(load_card(folder / "tracker7.card.yaml"),
                   running(joints=tuple(reversed(JOINTS7)), limits=limits))


def test_period_mismatch_shows_both_values(folder):
    with pytest.raises(CardError, match=r"decision_period: card 0.05 s vs running 0.04 s"):
        check_card(load_card(folder / "tracker7.card.yaml"), running(decision_period=0.04))


def test_limits_mismatch_lists_each_difference_with_both_values(folder):
    other = dict(LIMITS7.to_dict()["joints"])
    other["j2"] = dict(other["j2"], velocity=2.0)
    other["j5"] = dict(other["j5"], position=[-2.5, 2.51])
    limits = JointLimits.from_mapping({"joints": other})
    with pytest.raises(CardError) as err:
        check_card(load_card(folder / "tracker7.card.yaml"), running(limits=limits))
    # JointLimits.describe_difference: card value first, then the running value
    assert ("limits differ (card vs running): j5.position_min: -2.93 vs -2.5; "
            "j2.velocity_max: 1.61 vs 2") in str(err.value)


def test_horizon_and_features_beyond_the_running_configuration(folder):
    with pytest.raises(CardError) as err:
        check_card(load_card(folder / "mlp7.card.yaml"),
                   running(horizon=3, features=("edge_offset", "gap")))
    text = str(err.value)
    assert "the policy reads 5 reference points per decision, the adapter provides 3" in text
    assert ("feedback features ['edge_angle'] are not available; the adapter receives "
            "['edge_offset', 'gap']") in text


def test_load_policy_refuses_a_mismatch_before_building(folder):
    with pytest.raises(CardError, match="does not fit the adapter: decision_period: card 0.05 s "
                                        "vs running 0.1 s"):
        load_policy(folder / "mlp7.card.yaml", running(decision_period=0.1))


@pytest.mark.parametrize("changes, message", [
    ({"joints": ("j1",)}, "limits are for joints ['j1', 'j2', 'j3', 'j4', 'j5', 'j6', 'j7'] but "
                          "the joints are ['j1']"),
    ({"decision_period": 0.0}, "decision_period must be a positive number of seconds, got 0.0"),
    ({"horizon": 0}, "horizon must be an integer >= 1 (reference points per decision), got 0"),
    ({"features": ("a", "a")}, "feedback features repeat"),
])
def test_running_config_is_validated(changes, message):
    with pytest.raises(PolicyError) as err:
        running(**changes)
    assert message in str(err.value)
