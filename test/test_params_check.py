# SPDX-License-Identifier: Apache-2.0
"""Params files checked as a whole against the nodes' parameter tables (`io.param_specs`),
before anything starts (``bringup``, ``preflight``, the demo's own files), and the adapter
node refusing a params-file entry it does not declare (as ``ros2 run ... --params-file``
users start it). The nodes build no DDS traffic here: each is constructed and destroyed."""
from pathlib import Path

import numpy as np
import pytest
import rclpy
from rclpy.context import Context

from adaptive_streamer.bringup import BringupError, read_params
from adaptive_streamer.core.limits import JointLimits, LimitsError
from adaptive_streamer.core.session import make_stages
from adaptive_streamer.io.param_specs import (ADAPTER, NODE_PARAMS, ParamsCheckError,
                                              check_params_file)
from adaptive_streamer.nodes.adapter import AdapterNode
from adaptive_streamer.nodes.common import NodeParamError
from adaptive_streamer.nodes.sim_driver import SimDriver, SimDriverError
from adaptive_streamer.preflight.run import preflight
from adaptive_streamer.share import demo_file

ROOT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.ros   # builds nodes (DDS participants): a process of its own
ADAPTER_OK = ("adapter:\n  ros__parameters:\n    policy: /tmp/card.yaml\n"
              "    stream_rate: 250.0\n")


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "cell.params.yaml"
    path.write_text(text)
    return path


@pytest.mark.parametrize("path", [demo_file("params.yaml"), ROOT / "config/soak/params.yaml",
                                  ROOT / "config/streamer.params.yaml",
                                  ROOT / "config/streamer_plan.params.yaml"],
                         ids=lambda p: p.name)
def test_the_package_params_files_pass(path):
    check_params_file(path)


@pytest.mark.parametrize("line, words", [
    ("    limit_scle: 0.25\n",
     r"cell.params.yaml:5: adapter: parameter 'limit_scle' is not a parameter of adapter; "
     r"did you mean limit_scale\?"),
    ("    watchdog: {comand_latency: 0.012}\n", r":5: .*did you mean watchdog.command_latency\?"),
    ("    stream_rate: '250'\n", r"'stream_rate' is '250'; expected a number in \[125, 1000\]"),
    ("    horizon: 10.0\n", r"'horizon' is 10.0; expected an integer in \[1, inf\)"),
    ("    limit_scale: 2.0\n", r"'limit_scale' is 2.0; expected a number in \(0, 1\]"),
    ("    limit_scale: 1\n", r"'limit_scale' is 1; .*\(write 1.0: an integer is not a number"),
    ("    outputs: []\n", r"'outputs' is empty; expected a non-empty list of strings"),
    ("    position: {topc: /x}\n", r"'position.topc' is not .*did you mean position.topic\?"),
    ("    position: {type: effort}\n", r"'position.type' is 'effort'; expected one of position, "
                                     r"velocity, trajectory, plan"),
    ("    joint_states_qos: fast\n", r"expected one of reliable, best_effort, sensor_data"),
])
def test_a_bad_adapter_entry_is_refused_with_file_line_and_expectation(tmp_path, line, words):
    path = write(tmp_path, ADAPTER_OK.replace("    stream_rate: 250.0\n", "    joints: []\n")
                 + line)
    with pytest.raises(ParamsCheckError, match=words):
        check_params_file(path)
    with pytest.raises(BringupError, match=words):   # bringup checks before starting
        read_params(path)


def test_every_problem_of_every_node_is_listed(tmp_path):
    path = write(tmp_path, ADAPTER_OK + "    limit_scle: 0.25\n    horizon: 0\n"
                 "sim_driver:\n  ros__parameters:\n    joints: []\n    rat: 250.0\n")
    with pytest.raises(ParamsCheckError) as err:
        check_params_file(path)
    lines = str(err.value).splitlines()
    assert len(lines) == 4, lines
    assert "sim_driver: parameter 'joints' is empty; expected a non-empty list of strings" \
        in str(err.value)
    assert "did you mean rate?" in str(err.value)


def test_empty_lists_are_accepted_where_they_mean_none(tmp_path):
    check_params_file(write(tmp_path, ADAPTER_OK + "    joints: []\n    features: []\n"
                            "    position: {joints: []}\n"))


def test_preflight_refuses_the_file_before_listening(tmp_path):
    rows = preflight(str(write(tmp_path, ADAPTER_OK + "    limit_scle: 0.25\n")))
    assert rows[0].name == "params" and rows[0].failed
    assert "did you mean limit_scale?" in rows[0].detail


def test_node_tables_name_each_parameter_once():
    for table in NODE_PARAMS.values():
        names = [p.name for p in table.params]
        assert len(names) == len(set(names)), table.node
        for p in table.params:
            assert p.problem(p.default) is None or p.default is None, (table.node, p.name)


def test_limit_scale_above_one_is_refused_by_the_session():
    limits = JointLimits.from_file(demo_file("limits.yaml"))
    with pytest.raises(LimitsError, match=r"limit_scale must be in \(0, 1\], got 2.0"):
        make_stages(limits, 0.05, 2.0, 0.3)
    running, _ = make_stages(limits, 0.05, 0.5, 0.3)
    assert np.allclose(running.limits.velocity_max, 0.5 * limits.velocity_max)


def _node_with_params_file(cls, path: Path):
    context = Context()
    rclpy.init(args=["--ros-args", "--params-file", str(path)], context=context)
    try:
        node = cls(context=context)
        node.destroy_node()
    finally:
        rclpy.shutdown(context=context)


@pytest.mark.parametrize("entry, words", [
    ("    limit_scle: 0.25\n", "parameter 'limit_scle' is not a parameter of adapter; did you "
                               "mean limit_scale?"),
    ("    position: {topc: /x}\n", "'position.topc' is not a parameter of adapter; did you "
                                   "mean position.topic?"),
    ("    limit_scale: 2.0\n", r"parameter 'limit_scale' is 2.0; expected a number in (0, 1]"),
    ("    stream_rate: 250\n", "parameter 'stream_rate' is 250; expected a number in "
                               "[125, 1000]"),
])
def test_the_adapter_node_refuses_a_params_file_entry_it_does_not_take(tmp_path, entry, words):
    path = write(tmp_path, ADAPTER_OK + entry)
    with pytest.raises(NodeParamError) as err:
        _node_with_params_file(AdapterNode, path)
    assert words in str(err.value)


def test_the_adapter_node_takes_empty_lists_from_a_params_file(tmp_path):
    _node_with_params_file(AdapterNode, write(tmp_path, ADAPTER_OK + "    joints: []\n"
                                              "    features: []\n"
                                              "    position: {joints: [], topic: /x}\n"))


def test_a_node_refuses_an_empty_list_it_needs(tmp_path):
    path = write(tmp_path, "sim_driver:\n  ros__parameters:\n    joints: []\n")
    with pytest.raises(SimDriverError, match="parameter 'joints' is empty; expected a "
                                             "non-empty list of strings"):
        _node_with_params_file(SimDriver, path)



@pytest.mark.parametrize("name,old,new,state,words", [
    ("limits_file", "a.yaml", "b.yaml", "active", "read at configure and the adapter is active"),
    ("stream_rate", 250.0, 500.0, "inactive", "read at configure and the adapter is inactive"),
    ("limit_scale", 0.25, 1.0, "active", "can only be lowered while the adapter is active"),
    ("watchdog.deviation_joint", 0.05, 1e9, "inactive", "0.05 -> 1e+09 loosens it"),
    ("watchdog.overrun_window", 20, 5, "active", "read at configure"),
])
def test_runtime_changes_that_loosen_or_reconfigure_are_refused(name, old, new, state, words):
    spec = ADAPTER[name]
    assert words in spec.change_problem(old, new, state)
    assert spec.change_problem(old, new, "unconfigured") is None   # the next configure checks it
    assert spec.change_problem(old, old, state) is None


@pytest.mark.parametrize("name,old,new", [
    ("limit_scale", 1.0, 0.25), ("watchdog.following_error", 0.05, 0.01),
    ("watchdog.max_overruns", 3, 1), ("policy", "a.yaml", "b.yaml"),
])
def test_runtime_changes_that_tighten_or_swap_are_allowed(name, old, new):
    assert ADAPTER[name].change_problem(old, new, "active") is None
