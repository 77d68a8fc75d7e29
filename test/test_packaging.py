# SPDX-License-Identifier: Apache-2.0
"""The package installs like a ROS 2 ament_python package, and its launch files name only
what it installs."""
import ast
import os
import shutil
import subprocess
import sys
from importlib import metadata
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = "adaptive_streamer"


def entry_point_names() -> set[str]:
    return {ep.name for ep in metadata.distribution(PACKAGE).entry_points
            if ep.group == "console_scripts"}


def tracked_files() -> list[str]:
    out = subprocess.run(["git", "ls-files", "-co", "--exclude-standard"], cwd=ROOT,
                         capture_output=True, text=True, check=True).stdout.split()
    return [f for f in out if (ROOT / f).is_file()]


@pytest.fixture(scope="module")
def colcon_install(tmp_path_factory):
    colcon = shutil.which("colcon", path=str(Path(sys.executable).parent)) or shutil.which("colcon")
    if colcon is None:
        pytest.skip("colcon is not installed (pip install colcon-core colcon-ros "
                    "colcon-python-setup-py ros-jazzy-ament-package)")
    ws = tmp_path_factory.mktemp("ws")
    src = ws / "src" / PACKAGE
    for rel in tracked_files():
        dest = src / rel
        dest.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(ROOT / rel, dest)
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    proc = subprocess.run([colcon, "build", "--base-paths", "src"], cwd=ws, env=env,
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    return ws / "install" / PACKAGE


def test_colcon_installs_executables_launch_and_config(colcon_install):
    lib = colcon_install / "lib" / PACKAGE
    share = colcon_install / "share" / PACKAGE
    # `ros2 run adaptive_streamer <node>` looks in lib/<package> (common practice, ament_python)
    for exe in ("adapter", "reference_server", "sensor_bridge", "sim_driver", "edge_sensor",
                "watchdog", "recorder", "adaptive-streamer"):
        assert (lib / exe).is_file(), f"{exe} not installed in {lib}"
    for rel in ("package.xml", "launch/streamer.launch.py", "launch/demo.launch.py",
                "config/demo/params.yaml", "config/demo/limits.yaml", "config/streamer.params.yaml",
                "config/streamer_plan.params.yaml"):
        assert (share / rel).is_file(), f"{rel} not installed in {share}"
    marker = colcon_install / "share" / "ament_index" / "resource_index" / "packages" / PACKAGE
    assert marker.is_file(), "ament index marker missing"


def launch_references(path: Path) -> tuple[set[str], set[tuple[str, ...]]]:
    """Executables named in a launch file and the config paths it joins below SHARE."""
    tree = ast.parse(path.read_text())
    executables, configs = set(), set()
    for node in ast.walk(tree):
        if isinstance(node, ast.keyword) and node.arg == "executable":
            if isinstance(node.value, ast.Constant):
                executables.add(node.value.value)
            elif isinstance(node.value, ast.Name):  # a loop over a tuple of names
                for other in ast.walk(tree):
                    if isinstance(other, ast.Assign) and isinstance(other.value, ast.Tuple):
                        executables |= {e.value for e in other.value.elts
                                        if isinstance(e, ast.Constant)}
        if (isinstance(node, ast.Call) and getattr(node.func, "attr", "") == "join"
                and node.args and isinstance(node.args[0], ast.Name) and node.args[0].id == "SHARE"):
            configs.add(tuple(a.value for a in node.args[1:] if isinstance(a, ast.Constant)))
    return executables, configs


@pytest.mark.parametrize("name", ["streamer.launch.py", "demo.launch.py"])
def test_launch_files_name_only_installed_things(name):
    executables, configs = launch_references(ROOT / "launch" / name)
    assert executables, "no executables found"
    assert executables <= entry_point_names(), executables - entry_point_names()
    assert configs
    for parts in configs:
        assert (ROOT.joinpath(*parts)).is_file(), parts


@pytest.mark.parametrize("params", ["config/demo/params.yaml", "config/streamer.params.yaml",
                                    "config/streamer_plan.params.yaml"])
def test_params_files_name_existing_nodes_and_files(params):
    from adaptive_streamer.bringup import NODE_KINDS
    data = yaml.safe_load((ROOT / params).read_text())
    assert set(data) <= set(NODE_KINDS)
    for node, body in data.items():
        assert "ros__parameters" in body, node
    text = (ROOT / params).read_text()
    for token in [w for w in text.split() if w.startswith("$(share)/")]:
        assert (ROOT / token.replace("$(share)/", "")).exists(), token
