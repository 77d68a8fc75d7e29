# SPDX-License-Identifier: Apache-2.0
"""The license is stated once and everywhere: LICENSE holds the Apache-2.0 text, the package
metadata declare it, and every Python source file starts with its SPDX identifier line
(after a shebang line, if any). SPDX short identifiers in a first-line comment are common
practice (the SPDX specification, spdx.dev; "Apache-2.0" from its license list)."""
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SPDX = "# SPDX-License-Identifier: Apache-2.0"
FOLDERS = ("adaptive_streamer", "test", "bench", "scripts", "launch")


def sources() -> list[Path]:
    files = [ROOT / "setup.py"]
    for folder in FOLDERS:
        files += sorted((ROOT / folder).rglob("*.py"))
    return [f for f in files if "__pycache__" not in f.parts]


def test_the_license_file_and_the_metadata_agree():
    text = (ROOT / "LICENSE").read_text()
    assert "Apache License" in text and "Version 2.0, January 2004" in text
    assert "<license>Apache-2.0</license>" in (ROOT / "package.xml").read_text()
    assert 'license="Apache-2.0"' in (ROOT / "setup.py").read_text()


@pytest.mark.parametrize("path", sources(), ids=lambda p: str(p.relative_to(ROOT)))
def test_every_source_file_starts_with_the_spdx_line(path):
    lines = path.read_text().splitlines()
    first = lines[1] if lines and lines[0].startswith("#!") else (lines[0] if lines else "")
    assert first == SPDX, f"{path.relative_to(ROOT)}: first line {first!r}, expected {SPDX!r}"
