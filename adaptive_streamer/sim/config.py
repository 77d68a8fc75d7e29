# SPDX-License-Identifier: Apache-2.0
"""Loading the demo cell description (``config/demo/scenario.yaml``).

Format (base frame of the arm, metres/seconds; keys ending in ``_mm``/``_deg`` are in
millimetres/degrees)::

    seed: 7                        # run seed: panel placement and sensor noise
    table_height: 0.200            # table top z [m]
    panel:
      thickness: 0.003             # panel top = table_height + thickness
      centre: [1.00, 0.00]         # rotation centre of the placement error [m]
      edge:                        # nominal processed edge (table plane) [m]
        start: [0.80, -0.30]
        end: [0.80, 0.30]
    placement:                     # real = nominal rotated about centre, shifted along normal
      offset_mm: [2.0, 6.0]        # |offset| ~ U(lo, hi), random sign
      angle_deg: [0.5, 1.5]        # |angle| ~ U(lo, hi), random sign
    sensor:
      rate: 100.0                  # Hz
      latency: 0.030               # s
      offset_noise_mm: 0.2         # std
      angle_noise_deg: 0.1         # std
      range_mm: 15.0               # |offset| beyond this -> no reading
    pass:
      start: [0.80, -0.25]         # nozzle path in the table plane [m]
      end: [0.80, 0.25]
      nozzle_height: 0.004         # above the panel top [m]
      cruise_speed: 0.06           # m/s
      ramp_time: 1.5               # s per speed ramp
      dwell: 0.5                   # s at rest at each end
      sample_period: 0.01          # s between reference CSV rows
      ik_seed: [0.3, 0.75, 0.3, 0.0, 0.5, -1.9]   # rad, first IK guess
    lock_on:                       # optional: the pass's start condition (core.lock_on)
      feature: edge_offset         # the feedback feature judged
      tolerance_mm: 1.0            # settled: |feature| within this
      hold: 0.5                    # s, every reading settled for this long
      timeout: 10.0                # s, then the start fails with the reason
      max_age: 0.1                 # s, longest gap between readings

All keys are required, except the ``lock_on`` block. Random streams: the placement draws from
``numpy.random.default_rng([seed, 0])``, the sensor noise from ``default_rng([seed, 1])``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import yaml

from ..core.lock_on import LockOnConfig, LockOnError
from ..core.text_files import yaml_problem
from .line_sensor import SensorConfig, SensorError
from .nominal_path import PassConfig, PathError
from .panel import Panel, PanelError, draw_placement



class ScenarioError(ValueError):
    """A scenario file is missing, malformed or has out-of-range values."""


@dataclass(frozen=True, eq=False)
class Scenario:
    """The demo cell: nominal panel, placement draw, line sensor and nominal pass."""

    seed: int
    nominal_panel: Panel
    offset_mm: tuple[float, float]
    angle_deg: tuple[float, float]
    sensor: SensorConfig
    nominal_pass: PassConfig
    source: str = "<memory>"
    lock_on: LockOnConfig | None = None   # the pass's start condition (None: start at once)

    def placement(self, seed: int | None = None) -> tuple[float, float]:
        """The placement (offset [m], angle [rad]) drawn for ``seed`` (default: the file's)."""
        rng = np.random.default_rng([self.seed if seed is None else seed, 0])
        return draw_placement(rng, self.offset_mm, self.angle_deg)

    def panel(self, seed: int | None = None, offset_mm: float | None = None,
              angle_deg: float | None = None) -> Panel:
        """The real panel of a run: drawn from ``seed``, or the given offset and/or angle."""
        offset, angle = self.placement(seed)
        if offset_mm is not None:
            offset = offset_mm * 1e-3
        if angle_deg is not None:
            angle = math.radians(angle_deg)
        return self.nominal_panel.placed(offset, angle)

    def sensor_seed(self, seed: int | None = None) -> list[int]:
        """The seed of the line sensor's noise stream for a run seed."""
        return [self.seed if seed is None else seed, 1]


def _get(node: Mapping[str, Any], key: str, where: str) -> Any:
    if not isinstance(node, Mapping):
        raise ScenarioError(f"{where}: expected a mapping, got {type(node).__name__}")
    if key not in node:
        raise ScenarioError(f"{where}: missing key '{key}'")
    return node[key]


def _num(node: Mapping[str, Any], key: str, where: str) -> float:
    value = _get(node, key, where)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ScenarioError(f"{where}.{key}: expected a finite number, got {value!r}")
    return float(value)


def _vec(node: Mapping[str, Any], key: str, where: str, n: int | None = 2) -> list[float]:
    value = _get(node, key, where)
    if not isinstance(value, list) or (n is not None and len(value) != n) \
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        size = f"{n} numbers" if n is not None else "a list of numbers"
        raise ScenarioError(f"{where}.{key}: expected {size}, got {value!r}")
    return [float(v) for v in value]


def parse_scenario(data: Mapping[str, Any], source: str = "<memory>") -> Scenario:
    """Build a `Scenario` from the parsed YAML mapping; errors name ``source`` and the key."""
    try:
        seed = _get(data, "seed", source)
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise ScenarioError(f"{source}: seed: expected an integer >= 0, got {seed!r}")
        table = _num(data, "table_height", source)
        panel = _get(data, "panel", source)
        edge = _get(panel, "edge", f"{source}: panel")
        thickness = _num(panel, "thickness", f"{source}: panel")
        nominal = Panel(np.array(_vec(edge, "start", f"{source}: panel.edge")),
                        np.array(_vec(edge, "end", f"{source}: panel.edge")),
                        np.array(_vec(panel, "centre", f"{source}: panel")),
                        table + thickness)
        place = _get(data, "placement", source)
        offset_mm = tuple(_vec(place, "offset_mm", f"{source}: placement"))
        angle_deg = tuple(_vec(place, "angle_deg", f"{source}: placement"))
        draw_placement(np.random.default_rng(0), offset_mm, angle_deg)   # validates ranges
        s = _get(data, "sensor", source)
        w = f"{source}: sensor"
        sensor = SensorConfig(rate=_num(s, "rate", w), latency=_num(s, "latency", w),
                              offset_noise=_num(s, "offset_noise_mm", w) * 1e-3,
                              angle_noise=math.radians(_num(s, "angle_noise_deg", w)),
                              range=_num(s, "range_mm", w) * 1e-3)
        p = _get(data, "pass", source)
        w = f"{source}: pass"
        nominal_pass = PassConfig(
            start=np.array(_vec(p, "start", w)), end=np.array(_vec(p, "end", w)),
            nozzle_height=_num(p, "nozzle_height", w), cruise_speed=_num(p, "cruise_speed", w),
            ramp_time=_num(p, "ramp_time", w), dwell=_num(p, "dwell", w),
            sample_period=_num(p, "sample_period", w),
            ik_seed=np.array(_vec(p, "ik_seed", w, None)))
        lock = None
        if data.get("lock_on") is not None:
            q = _get(data, "lock_on", source)
            w = f"{source}: lock_on"
            feature = q.get("feature")
            if not isinstance(feature, str):
                raise ScenarioError(f"{w}: 'feature' must name a feedback feature")
            lock = LockOnConfig(feature, _num(q, "tolerance_mm", w) * 1e-3, _num(q, "hold", w),
                                _num(q, "timeout", w), _num(q, "max_age", w))
    except (PanelError, SensorError, PathError, LockOnError) as exc:
        raise ScenarioError(f"{source}: {exc}") from None
    return Scenario(seed, nominal, offset_mm, angle_deg, sensor, nominal_pass,  # type: ignore
                    source, lock)


def load_scenario(path: str | Path | None = None) -> Scenario:
    """Read a scenario YAML file (default: the demo's, see `default_scenario_path`)."""
    path = Path(path) if path is not None else default_scenario_path()
    try:
        data = yaml.safe_load(path.read_text())
    except OSError as exc:
        raise ScenarioError(f"scenario file '{path}': cannot read: {exc.strerror}") from None
    except yaml.YAMLError as exc:
        raise ScenarioError(f"scenario file '{path}': not valid YAML: {yaml_problem(exc)}"
                            ) from None
    return parse_scenario(data, f"scenario file '{path}'")


def default_scenario_path() -> Path:
    """The demo scenario file in the package's share folder."""
    from ..share import ShareError, demo_file
    try:
        path = demo_file("scenario.yaml")
    except ShareError as exc:
        raise ScenarioError(f"no demo scenario file found: {exc}; pass one explicitly") from None
    if not path.is_file():
        raise ScenarioError(f"no demo scenario file at {path}; pass one explicitly")
    return path
