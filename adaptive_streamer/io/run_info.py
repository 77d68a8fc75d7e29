"""What ran: the adapter's effective parameters and the files they name, stored in a bag.

The recorder fetches every parameter of the adapter node (parameter services) and reads
the files its parameters name (``limits_file``, ``limits_dynamics``, ``policy``,
``shadow_policy``) and the files a policy card names (its ``limits`` and ``model``, relative
to the card's folder). The document is YAML (format 1)::

    run_info: 1
    created: 2026-01-01T12:00:00+00:00
    adapter:
      node: /adapter                    # fully qualified name
      parameters: {policy: /path/card.yaml, decision_period: 0.05, ...}
    files:                              # by absolute path
      /path/card.yaml: {sha256: ..., size: 512, text: "policy_card: 1\\n..."}
      /path/model.onnx: {sha256: ..., size: 40960, text: null}   # binary: hash only
    recorder: {node: /recorder, topics: [...], compression: none, chunk_size: 262144}

It is written as a ``std_msgs/String`` message on `TOPIC` (resolved in the recorder's
namespace) when the adapter's parameters were read and again when they change, and into
the bag's ``metadata.yaml`` ``custom_data`` under `CUSTOM_KEY` at close.

`resolve_files` gives replay parameters whose paths point at files with the recorded
content: the original file when it is unchanged, otherwise a copy of the recorded text
under a folder that mirrors the original absolute paths (so a card's relative paths still
resolve); a binary file (ONNX model) must still exist unchanged.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import yaml

TOPIC = "adaptive_streamer/run_info"
CUSTOM_KEY = "adaptive_streamer.run_info"
FORMAT = 1
FILE_PARAMS = ("limits_file", "limits_dynamics", "policy", "shadow_policy")
CARD_PARAMS = ("policy", "shadow_policy")
MAX_TEXT = 4 * 2 ** 20  # larger files are stored by hash only


class RunInfoError(ValueError):
    """A run-info document is malformed, or a file it names is missing or changed."""


@dataclass
class RunInfo:
    """A parsed run-info document."""

    node: str
    parameters: dict[str, Any]
    files: dict[str, dict[str, Any]]
    recorder: dict[str, Any] = field(default_factory=dict)
    created: str = ""

    @property
    def namespace(self) -> str:
        """The adapter's namespace, with a trailing slash ('/' at the root)."""
        ns = self.node.rsplit("/", 1)[0]
        return (ns or "") + "/"


def _file_entry(path: Path) -> dict[str, Any] | None:
    try:
        data = path.read_bytes()
    except OSError:
        return None
    text: str | None
    try:
        text = data.decode("utf-8") if len(data) <= MAX_TEXT and b"\0" not in data else None
    except UnicodeDecodeError:
        text = None
    return {"sha256": hashlib.sha256(data).hexdigest(), "size": len(data), "text": text}


def _card_files(card: Path) -> list[Path]:
    """Files a policy card names (limits, model), as absolute paths."""
    try:
        data = yaml.safe_load(card.read_text())
    except (OSError, yaml.YAMLError, UnicodeDecodeError):
        return []
    if not isinstance(data, Mapping):
        return []
    return [(card.parent / data[k]).resolve() for k in ("limits", "model")
            if isinstance(data.get(k), str) and data[k]]


def collect_files(parameters: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """Entries (hash, size, text) of every file the adapter parameters name."""
    files: dict[str, dict[str, Any]] = {}
    for key in FILE_PARAMS:
        value = parameters.get(key)
        if not isinstance(value, str) or not value:
            continue
        path = Path(value).resolve()
        paths = [path] + (_card_files(path) if key in CARD_PARAMS else [])
        for p in paths:
            entry = _file_entry(p)
            files[str(p)] = entry if entry is not None else {"missing": True}
    return files


def build(node: str, parameters: Mapping[str, Any], recorder: Mapping[str, Any]) -> str:
    """The run-info YAML for the adapter ``node`` with ``parameters``."""
    doc = {"run_info": FORMAT,
           "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
           "adapter": {"node": node, "parameters": dict(parameters)},
           "files": collect_files(parameters),
           "recorder": dict(recorder)}
    return yaml.safe_dump(doc, sort_keys=False)


def parse(text: str, source: str = "run_info") -> RunInfo:
    """Parse a run-info document; raises `RunInfoError` naming ``source``."""
    try:
        doc = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise RunInfoError(f"{source}: not valid YAML: {exc}") from None
    if not isinstance(doc, Mapping) or doc.get("run_info") != FORMAT:
        raise RunInfoError(f"{source}: not a run-info document of format {FORMAT}")
    adapter = doc.get("adapter")
    if not isinstance(adapter, Mapping) or not isinstance(adapter.get("parameters"), Mapping):
        raise RunInfoError(f"{source}: 'adapter.parameters' is missing")
    files = doc.get("files") or {}
    if not isinstance(files, Mapping):
        raise RunInfoError(f"{source}: 'files' must be a mapping")
    return RunInfo(str(adapter.get("node", "/adapter")), dict(adapter["parameters"]),
                   {str(k): dict(v) for k, v in files.items() if isinstance(v, Mapping)},
                   dict(doc.get("recorder") or {}), str(doc.get("created", "")))


def _sha(path: Path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def resolve_files(info: RunInfo, folder: Path) -> tuple[dict[str, Any], list[str]]:
    """Parameters whose file paths hold the recorded content, and notes on what was done.

    Changed or missing text files are written under ``folder`` (mirroring their absolute
    paths); a changed or missing binary file raises `RunInfoError`.
    """
    params = dict(info.parameters)
    notes: list[str] = []
    stale = {p: e for p, e in info.files.items()
             if not e.get("missing") and _sha(Path(p)) != e.get("sha256")}
    if not stale:
        return params, notes
    for p, e in info.files.items():
        mirror = folder / Path(p).relative_to(Path(p).anchor)
        mirror.parent.mkdir(parents=True, exist_ok=True)
        if p in stale:
            if e.get("text") is None:
                raise RunInfoError(f"file '{p}' used by the recorded run is "
                                   f"{'missing' if not Path(p).exists() else 'changed'} and "
                                   "was not stored in the bag (binary); restore it or pass "
                                   "--policy")
            mirror.write_text(e["text"])
            notes.append(f"'{p}' is {'missing' if not Path(p).exists() else 'changed'}; "
                         "replay uses the copy stored in the bag")
        elif not e.get("missing") and not mirror.exists():
            mirror.symlink_to(Path(p))
    for key in FILE_PARAMS:
        value = params.get(key)
        if isinstance(value, str) and value and str(Path(value).resolve()) in info.files:
            params[key] = str(folder / Path(value).resolve().relative_to(Path(value).anchor))
    return params, notes
