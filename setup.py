# SPDX-License-Identifier: Apache-2.0
"""ament_python / pip setup for adaptive_streamer.

Installs the Python package, the node executables (``lib/adaptive_streamer`` under colcon,
so ``ros2 run adaptive_streamer <node>`` finds them) and the ``launch/`` and ``config/``
trees into ``share/adaptive_streamer``.
"""
from pathlib import Path

from setuptools import find_packages, setup

PACKAGE = "adaptive_streamer"
HERE = Path(__file__).parent


def tree(folder: str) -> list[tuple[str, list[str]]]:
    """Data-file entries mirroring ``folder`` below ``share/<package>/``."""
    entries: dict[str, list[str]] = {}
    for path in sorted((HERE / folder).rglob("*")):
        if path.is_file() and "__pycache__" not in path.parts:
            rel = path.relative_to(HERE)
            entries.setdefault(str(Path("share", PACKAGE, rel.parent)), []).append(str(rel))
    return sorted(entries.items())


NODES = {
    "reference_server": "reference_server",
    "sensor_bridge": "sensor_bridge",
    "adapter": "adapter",
    "sim_driver": "sim_driver",
    "edge_sensor": "edge_sensor",
    "watchdog": "watchdog_monitor",
    "recorder": "recorder",
}

setup(
    name=PACKAGE,
    version="0.1.0",
    packages=find_packages(exclude=["test", "test.*"]),
    data_files=[
        ("share/ament_index/resource_index/packages", ["resource/" + PACKAGE]),
        ("share/" + PACKAGE, ["package.xml"]),
        *tree("launch"),
        *tree("config"),
    ],
    python_requires=">=3.10",
    install_requires=[
        "numpy>=1.24",
        "scipy>=1.10",
        "PyYAML>=6",
        "onnx>=1.15",
        "onnxruntime>=1.17",
        "rosbags>=0.10",
        "mcap>=1.1",
        "matplotlib>=3.7",
        "tqdm>=4.60",
        "dask[distributed]>=2024.1",
        "gymnasium>=1.0",
    ],
    extras_require={
        "test": [
            "pytest>=7",
            "hypothesis>=6.80",
            "ruckig>=0.12",
            "pytest-timeout>=2.1",
            "colcon-core",
            "colcon-ros",
            "colcon-python-setup-py",
            "ros-jazzy-ament-package",
        ],
    },
    zip_safe=True,
    maintainer="adaptive_streamer developers",
    maintainer_email="dev@adaptive-streamer.invalid",
    description="Jerk-bounded streaming of policy-adapted joint setpoints for ROS 2.",
    license="Apache-2.0",
    entry_points={
        "console_scripts": [
            *(f"{exe} = {PACKAGE}.nodes.{mod}:main" for exe, mod in NODES.items()),
            f"adaptive-streamer = {PACKAGE}.cli:main",
        ],
    },
)
