# SPDX-License-Identifier: Apache-2.0
"""Reading the package's text inputs (policy cards, limits, references, params files) safely.

* Size cap: a file over `MAX_BYTES` is refused before it is read, so a huge file named by a
  parameter cannot stall the process (parsing holds the interpreter).
* Errors name the file and the line, never the file's contents: a YAML error's text from
  the YAML library quotes the offending line, and error messages reach every node of the
  domain through ``/rosout``. `yaml_problem` keeps the position and the kind of problem only.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

MAX_BYTES = 1 << 20   # 1 MiB: far above any card, limits or params file of the package
# texts up to this size are parsed with libyaml's loader (2-5x faster for a policy card,
# bench/card_load.py); its C part holds the interpreter in one piece (about 1.3 ms at this
# size: no switch to the stream thread meanwhile), so larger texts take the Python
# loader, which lets other threads in between
C_LOADER_MAX = 8 << 10
_C_LOADER = getattr(yaml, "CSafeLoader", None)


class TextFileError(ValueError):
    """A text input cannot be read: missing, too large, not UTF-8, or not valid YAML."""


def read_text(path: str | Path, what: str, max_bytes: int = MAX_BYTES) -> str:
    """The UTF-8 text of ``path`` (``what``: e.g. "policy card", named in errors)."""
    p = Path(path)
    try:
        size = p.stat().st_size
        if size > max_bytes:
            raise TextFileError(f"{what} '{p}' is {size:,} bytes, over the {max_bytes:,} bytes "
                                "accepted; not read")
        return p.read_text(encoding="utf-8")
    except OSError as exc:
        raise TextFileError(f"cannot read {what} '{p}': {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise TextFileError(f"{p}: not a UTF-8 text file ({exc.reason} at byte "
                            f"{exc.start})") from None


def yaml_problem(exc: yaml.YAMLError) -> str:
    """Where and what a YAML error is ("line 3, column 7: found unexpected ':'"), without
    the quoted source line that the YAML library's own message carries."""
    mark = getattr(exc, "problem_mark", None)
    problem = getattr(exc, "problem", None) or type(exc).__name__
    context = getattr(exc, "context", None)
    where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark is not None else ""
    return where + (f"{problem} ({context})" if context else str(problem))


def load_yaml(text: str, source: str) -> Any:
    """``yaml.safe_load`` of ``text`` (libyaml's loader for short texts, see
    `C_LOADER_MAX`); a YAML error becomes `TextFileError` naming ``source`` and the
    position, not the text."""
    loader = _C_LOADER if _C_LOADER is not None and len(text) <= C_LOADER_MAX else yaml.SafeLoader
    try:
        return yaml.load(text, Loader=loader)  # noqa: S506 (safe loaders only)
    except yaml.YAMLError as exc:
        raise TextFileError(f"{source}: not valid YAML: {yaml_problem(exc)}") from None
