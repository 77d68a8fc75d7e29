# SPDX-License-Identifier: Apache-2.0
"""Standard ROS 2 params files (``node: ros__parameters: ...``) read into flat parameter
dicts (nested keys joined with dots, ``$(share)`` replaced by the package's share folder)."""
from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

import yaml

from ..core.text_files import yaml_problem
from ..core.adapter_setup import SetupError
from ..share import expand
from .param_specs import flatten


class ParamsFileError(SetupError):
    """A params file cannot be read or has no section for the node (names the file)."""


def load_params_file(path: str | Path, node: str = "adapter") -> dict[str, Any]:
    """The ``ros__parameters`` of ``node`` (its base name, or ``/**``) in a params file."""
    p = Path(path)
    try:
        data = yaml.safe_load(expand(p.read_text()))
    except OSError as exc:
        raise ParamsFileError(f"cannot read params file '{p}': {exc.strerror}") from None
    except yaml.YAMLError as exc:
        raise ParamsFileError(f"params file '{p}': not valid YAML: {yaml_problem(exc)}"
                              ) from None
    if not isinstance(data, Mapping):
        raise ParamsFileError(f"params file '{p}': expected a mapping of node names")
    base = node.strip("/").split("/")[-1]
    merged: dict[str, Any] = {}
    found = False
    for key in ("/**", base, f"/{base}", node, node.strip("/")):
        section = data.get(key)
        if isinstance(section, Mapping) and isinstance(section.get("ros__parameters"), Mapping):
            merged.update(flatten(section["ros__parameters"]))
            found = True
    if not found:
        raise ParamsFileError(f"params file '{p}': no section for node '{base}' (expected "
                         f"'{base}: {{ros__parameters: ...}}'); sections: {sorted(map(str, data))}")
    return merged
