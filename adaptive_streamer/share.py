# SPDX-License-Identifier: Apache-2.0
"""Where the package's installed files (config/, launch/) are.

Order: the ament index (a colcon or distro install), the source checkout this module runs
from (an editable install), then ``<sys.prefix>/share/adaptive_streamer`` (a pip install).
"""
from __future__ import annotations

import sys
from pathlib import Path

PACKAGE = "adaptive_streamer"
SHARE_TOKEN = "$(share)"


class ShareError(FileNotFoundError):
    """The package's share folder (config/, launch/) cannot be found."""


def share_candidates() -> list[Path]:
    """Folders that may hold config/ and launch/, in order of preference."""
    out = []
    try:
        from ament_index_python.packages import get_package_share_directory
        out.append(Path(get_package_share_directory(PACKAGE)))
    except (ImportError, KeyError, LookupError, OSError, ValueError):
        pass
    out.append(Path(__file__).resolve().parents[1])
    out.append(Path(sys.prefix, "share", PACKAGE))
    return out


def share_dir() -> Path:
    """The first candidate that holds config/demo."""
    for path in share_candidates():
        if (path / "config" / "demo").is_dir():
            return path
    raise ShareError("cannot find the adaptive_streamer share folder with config/demo (looked in "
                     + ", ".join(str(p) for p in share_candidates()) + ")")


def demo_file(name: str) -> Path:
    """A file of the demo configuration (``config/demo/<name>``)."""
    return share_dir() / "config" / "demo" / name


# the demo's policy cards by kind (``demo --policy KIND``; see `io.policy_kinds`)
KIND_CARDS = {"onnx": "policy_edge.yaml", "linear_feedback": "policy_feedback.yaml",
              "tracker": "policy_reference_only.yaml"}


def expand(text: str) -> str:
    """Replace ``$(share)`` in a params file's text by the share folder."""
    return text.replace(SHARE_TOKEN, str(share_dir())) if SHARE_TOKEN in text else text
