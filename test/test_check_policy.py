# SPDX-License-Identifier: Apache-2.0
"""`adaptive-streamer check-policy`: the demo cards pass; broken cards and models fail with
the reason in the table (real onnxruntime sessions on real .onnx files)."""
import subprocess
import sys

import numpy as np
import onnx
import pytest
import yaml
from onnx import TensorProto, helper

from adaptive_streamer.share import demo_file


def check(target) -> tuple[int, str]:
    proc = subprocess.run([sys.executable, "-m", "adaptive_streamer.cli", "check-policy",
                           str(target), "--samples", "100"], capture_output=True, text=True,
                          timeout=120)
    return proc.returncode, proc.stdout + proc.stderr


@pytest.mark.parametrize("card", ["policy_edge.yaml", "policy_feedback.yaml",
                                  "policy_reference_only.yaml"])
def test_demo_cards_pass_every_check(card):
    rc, out = check(demo_file(card))
    assert rc == 0, out
    for row in ("load", "neutral", "random", "extreme", "nan", "deterministic", "latency"):
        assert f"{row} " in out
    assert "all checks passed" in out


def nan_when_positive_model(path, size: int, n: int) -> None:
    """action = sqrt(-sum(obs)) per joint: finite at a neutral (zero) input, NaN otherwise."""
    w = helper.make_tensor("w", TensorProto.FLOAT, [size, n], np.full(size * n, 1.0).tolist())
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["obs", "w"], ["s"]), helper.make_node("Neg", ["s"], ["m"]),
         helper.make_node("Sqrt", ["m"], ["action"])], "nan_policy",
        [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, size])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, n])], [w])
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), path)


def test_a_model_that_outputs_nan_fails_with_the_reason(tmp_path):
    card = yaml.safe_load(demo_file("policy_edge.yaml").read_text())
    card["limits"] = str(demo_file("limits.yaml"))
    card["observation"] = ["joint_velocity"]
    card["model"] = str(tmp_path / "nan.onnx")
    card.pop("onnx", None)
    nan_when_positive_model(tmp_path / "nan.onnx", 6, 6)
    path = tmp_path / "card.yaml"
    path.write_text(yaml.safe_dump(card))
    rc, out = check(path)
    assert rc == 1, out
    assert "random" in out and "FAIL" in out and "non-finite" in out


def test_a_card_that_does_not_fit_its_model_fails_at_load(tmp_path):
    card = yaml.safe_load(demo_file("policy_edge.yaml").read_text())
    card["limits"] = str(demo_file("limits.yaml"))
    card["model"] = str(demo_file(card["model"]))
    card["observation"] = ["joint_position"]   # 6 values, the model takes more
    path = tmp_path / "card.yaml"
    path.write_text(yaml.safe_dump(card))
    rc, out = check(path)
    assert rc == 1 and "load" in out and "FAIL" in out, out


def test_a_bare_model_is_checked_on_its_raw_input(tmp_path):
    nan_when_positive_model(tmp_path / "m.onnx", 4, 2)
    rc, out = check(tmp_path / "m.onnx")
    assert rc == 1 and "inputs: obs float32 [1, 4]" in out and "random" in out, out
    rc, out = check(tmp_path / "missing.onnx")
    assert rc == 1 and "cannot load" in out, out


def check_with(target, *options) -> tuple[int, str]:
    proc = subprocess.run([sys.executable, "-m", "adaptive_streamer.cli", "check-policy",
                           str(target), "--samples", "50", *options], capture_output=True,
                          text=True, timeout=120)
    return proc.returncode, proc.stdout + proc.stderr


def test_with_params_it_refuses_what_the_adapter_refuses_at_configure(tmp_path):
    # a card for another decision period passes on its own, but the adapter of the demo's
    # params file (50 ms) refuses it at configure, and so does check-policy --params
    card = yaml.safe_load(demo_file("policy_feedback.yaml").read_text())
    card["limits"] = str(demo_file("limits.yaml"))
    card["decision_period"] = 0.04
    path = tmp_path / "card_40ms.yaml"
    path.write_text(yaml.safe_dump(card))
    rc, out = check_with(path)
    assert rc == 0, out
    rc, out = check_with(path, "--params", str(demo_file("params.yaml")))
    assert rc == 1 and "load  FAIL" in out and "decision" in out and "0.04" in out, out
    from adaptive_streamer.core.adapter_setup import SetupError, build_session
    from adaptive_streamer.io.params_files import load_params_file
    with pytest.raises(SetupError) as err:   # the adapter's configure step, same message
        build_session(load_params_file(demo_file("params.yaml")), policy=str(path))
    assert str(err.value) in out


def test_with_limits_it_checks_the_card_against_those_limits(tmp_path):
    limits = yaml.safe_load(demo_file("limits.yaml").read_text())
    limits["joints"].pop("j6")
    other = tmp_path / "five_joints.yaml"
    other.write_text(yaml.safe_dump(limits))
    rc, out = check_with(demo_file("policy_feedback.yaml"), "--limits", str(other))
    assert rc == 1 and "load  FAIL" in out and "j6" in out, out
    rc, out = check_with("linear_feedback", "--limits", str(demo_file("limits.yaml")))
    assert rc == 0 and "accepted by an adapter with limits" in out, out


def test_with_params_a_params_file_mistake_is_named(tmp_path):
    path = tmp_path / "cell.yaml"
    path.write_text(demo_file("params.yaml").read_text().replace("stream_rate:",
                                                                 "stream_rat:"))
    rc, out = check_with(demo_file("policy_feedback.yaml"), "--params", str(path))
    assert rc == 1 and "did you mean stream_rate?" in out, out


def test_built_in_kinds_need_the_adapter_configuration():
    rc, out = check_with("tracker")
    assert rc == 1 and "give --params or --limits" in out, out
    rc, out = check_with("tracker", "--params", str(demo_file("params.yaml")))
    assert rc == 0, out
