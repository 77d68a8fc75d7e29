# SPDX-License-Identifier: Apache-2.0
"""The real-driver templates (config/streamer.params.yaml, forward position commands, and
config/streamer_plan.params.yaml, the plan output) are working files: filled in the way
README's "Running against a real driver" says, with the demo's files, its sensor as the
sensor and the simulated driver as the driver (taking the template's output), `adaptive-streamer bringup` brings the
cell up, the adapter reaches the reference and holds it without a stop, and Ctrl-C brings
it to rest."""
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from diagnostic_msgs.msg import DiagnosticArray

from adaptive_streamer.io.param_specs import check_params_file
from adaptive_streamer.share import demo_file
from test_bringup import ProbeNode

ROOT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.ros


TEMPLATES = {"streamer.params.yaml": ("/my_driver/position_command", "position"),
             "streamer_plan.params.yaml": ("/my_driver/joint_trajectory", "plan")}


def fill_in_template(folder: Path, template: str) -> Path:
    """The template with README's blanks filled in (text edits, as a user would), plus the
    demo's simulated driver and line sensor standing in for the cell's hardware."""
    text = (ROOT / "config" / template).read_text()
    driver_topic, interface = TEMPLATES[template]
    for blank, value in [
            ("/path/to/reference.csv", str(demo_file("reference.csv"))),
            ("/path/to/limits.yaml", str(demo_file("limits.yaml"))),
            ("/path/to/policy_card.yaml", str(demo_file("policy_feedback.yaml"))),
            ("/my_sensor/measurement", "edge_sensor/offset"),
            ("fields: [point.y]", "fields: [point.y, point.z]"),
            ("features: [edge_offset]", "features: [edge_offset, edge_angle]"),
            (driver_topic, f"driver/{interface}" + ("" if interface == "plan" else
                                                    "_command"))]:
        assert blank in text, blank
        text = text.replace(blank, value)
    assert "/path/to" not in text and "/my_" not in text
    demo = yaml.safe_load(demo_file("params.yaml").read_text())
    hardware = {k: demo[k] for k in ("sim_driver", "edge_sensor")}
    hardware["sim_driver"]["ros__parameters"]["command_interface"] = interface
    path = folder / "cell.yaml"
    path.write_text(text.replace("$(share)", str(ROOT)) + "\n" + yaml.safe_dump(hardware))
    return path


class AdapterStatus(ProbeNode):
    """The adapter's values on /diagnostics, read in the test process: only an adapter that
    runs ``card`` counts (another cell on the same DDS domain may publish an adapter's
    status too)."""

    def __init__(self, card: Path) -> None:
        super().__init__("template_test_listener")
        self.card = str(card)
        self.values: dict[str, str] = {}
        self.node.create_subscription(DiagnosticArray, "/diagnostics", self._on, 50)

    def _on(self, msg: DiagnosticArray) -> None:
        for st in msg.status:
            values = {kv.key: kv.value for kv in st.values}
            if st.name == "adapter" and values.get("policy_active") == self.card:
                self.values = values


@pytest.mark.parametrize("template", sorted(TEMPLATES))
def test_the_filled_in_template_brings_the_cell_up(tmp_path, template):
    params = fill_in_template(tmp_path, template)
    check_params_file(params)
    proc = subprocess.Popen([sys.executable, "-m", "adaptive_streamer.cli", "bringup",
                             "--params", str(params)], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True,
                            env=dict(os.environ, PYTHONUNBUFFERED="1"))
    status = AdapterStatus(demo_file("policy_feedback.yaml"))
    try:
        following = status.spin_until(lambda: status.values.get("mode") == "following",
                                      90.0, proc)
        held = following and not status.spin_until(
            lambda: status.values.get("trip", "none") != "none", 4.0, proc)
        values = dict(status.values)
        proc.send_signal(signal.SIGINT)   # what Ctrl-C does
        out, _ = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
        status.close()
    assert following, f"adapter values {values}\n{out[-4000:]}"
    assert held, f"stopped while holding the reference: {values}\n{out[-4000:]}"
    assert values.get("limit_scale") == "0.25"
    assert proc.returncode == 0, out[-4000:]
    assert "configure refused" not in out and "Traceback" not in out, out[-4000:]
