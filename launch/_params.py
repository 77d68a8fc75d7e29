# SPDX-License-Identifier: Apache-2.0
"""Shared by the launch files: expand ``$(share)`` in a params file (as bringup does)."""
import os
import tempfile

from ament_index_python.packages import get_package_share_directory


def expanded_params(path: str) -> str:
    """Path of a copy of ``path`` with ``$(share)`` replaced by this package's share folder."""
    share = get_package_share_directory("adaptive_streamer")
    with open(path, encoding="utf-8") as f:
        text = f.read().replace("$(share)", share)
    fd, out = tempfile.mkstemp(prefix="adaptive_streamer_", suffix=".yaml")
    with os.fdopen(fd, "w", encoding="utf-8") as f:
        f.write(text)
    return out
