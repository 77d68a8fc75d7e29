# SPDX-License-Identifier: Apache-2.0
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
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import yaml

from adaptive_streamer.core.limits import JointLimits, LimitsError
from adaptive_streamer.core.policies.card import CardError, load_card
from adaptive_streamer.core.text_files import TextFileError, load_yaml, read_text

TOPIC = "adaptive_streamer/run_info"
CUSTOM_KEY = "adaptive_streamer.run_info"
FORMAT = 1
FILE_PARAMS = ("limits_file", "limits_dynamics", "policy", "shadow_policy")
CARD_PARAMS = ("policy", "shadow_policy")
MAX_TEXT = 2 ** 20  # larger files are stored by hash only (the adapter refuses them anyway)


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


def _file_entry(path: Path, store_text: bool = True) -> dict[str, Any]:
    """Hash and size of ``path`` and, with ``store_text``, its text (UTF-8 files of at most
    `MAX_TEXT` bytes); ``missing`` when it cannot be read."""
    try:
        size = path.stat().st_size
        data = path.read_bytes() if size <= MAX_TEXT else None
    except OSError:
        return {"missing": True}
    text: str | None = None
    if store_text and data is not None and b"\0" not in data:
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError:
            text = None
    digest = hashlib.sha256(data).hexdigest() if data is not None else _sha(path)
    return {"sha256": digest, "size": size, "text": text}


def _loaded_card(path: Path) -> tuple[list[Path], str]:
    """The files a valid policy card makes the adapter load (the card, its limits and
    model, absolute), or no files and the reason it is not a card the adapter loads."""
    try:
        load_card(path)
        data = load_yaml(read_text(path, "policy card"), str(path))
    except (CardError, TextFileError) as exc:
        return [], str(exc)
    return [path] + [(path.parent / data[k]).resolve() for k in ("limits", "model")
                     if isinstance(data.get(k), str) and data[k]], ""


def _loaded_limits(path: Path, dynamics: str) -> tuple[list[Path], str]:
    """The limits file (and the limits YAML beside a URDF) if the adapter can load them."""
    try:
        JointLimits.from_file(path, Path(dynamics).resolve() if dynamics else None)
    except LimitsError as exc:
        return [], str(exc)
    paths = [path]
    if dynamics:
        paths.append(Path(dynamics).resolve())
    elif path.suffix.lower() in (".urdf", ".xml"):
        paths.append(path.with_name(path.stem + ".limits.yaml"))
    return paths, ""


def collect_files(parameters: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """Entries (hash, size, text) of the files the adapter parameters make it load: a policy
    card only when it is a valid card (with its limits and model: the model by hash only), a
    limits file only when it loads as limits. A file named by a parameter that the adapter
    would not load is listed as ``refused`` with the reason, hash and size, never its text,
    so any readable file set as a parameter is not copied into the bag."""
    files: dict[str, dict[str, Any]] = {}
    for key in FILE_PARAMS:
        value = parameters.get(key)
        if not isinstance(value, str) or not value or key == "limits_dynamics":
            continue
        path = Path(value).resolve()
        if key in CARD_PARAMS:
            paths, refused = _loaded_card(path)
        else:
            paths, refused = _loaded_limits(path, str(parameters.get("limits_dynamics") or ""))
        if refused:
            entry = _file_entry(path, store_text=False)
            files[str(path)] = entry if entry.get("missing") else {**entry, "refused": refused}
            continue
        for p in paths:
            files[str(p)] = _file_entry(p, store_text=p.suffix.lower() != ".onnx")
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
        doc = load_yaml(text, source)
    except TextFileError as exc:
        raise RunInfoError(str(exc)) from None
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


def _mirror(folder: Path, recorded: str) -> Path:
    """Where the copy of the recorded file ``recorded`` goes under ``folder`` (its absolute
    path mirrored); `RunInfoError` for an entry that is not a normalised absolute path, so
    no entry of an untrusted bag can write outside ``folder``."""
    p = Path(recorded)
    if not p.is_absolute() or ".." in p.parts or str(p) != os.path.normpath(recorded):
        raise RunInfoError(f"run info: file entry '{recorded}' is not a normalised absolute "
                           "path; refused (a bag's entries must not reach outside the replay "
                           "folder)")
    out = (folder / p.relative_to(p.anchor)).resolve()
    root = folder.resolve()
    if root not in out.parents:
        raise RunInfoError(f"run info: file entry '{recorded}' would be written outside the "
                           f"replay folder {root}; refused")
    return out


def resolve_files(info: RunInfo, folder: Path) -> tuple[dict[str, Any], list[str]]:
    """Parameters whose file paths hold the recorded content, and notes on what was done.

    Changed or missing text files are written under ``folder`` (mirroring their absolute
    paths; an entry that is not a normalised absolute path is refused); a changed or
    missing binary file raises `RunInfoError`.
    """
    params = dict(info.parameters)
    notes: list[str] = []
    stale = {p: e for p, e in info.files.items()
             if not (e.get("missing") or e.get("refused")) and _sha(Path(p)) != e.get("sha256")}
    if not stale:
        return params, notes
    mirrors = {p: _mirror(folder, p) for p in info.files}
    for p, e in info.files.items():
        mirror = _mirror(folder, p)   # again: links made meanwhile must not lead outside
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
        elif not e.get("missing") and Path(p).is_file() and not mirror.exists():
            mirror.symlink_to(Path(p))   # regular files only: a linked folder could lead out
    for key in FILE_PARAMS:
        value = params.get(key)
        if isinstance(value, str) and value and str(Path(value).resolve()) in info.files:
            params[key] = str(mirrors[str(Path(value).resolve())])
    return params, notes
