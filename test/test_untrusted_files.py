# SPDX-License-Identifier: Apache-2.0
"""Files from untrusted places: a bag's run info cannot write outside the replay folder, a
file set as a parameter is stored in a bag only when the adapter would load it, and card and
limits files are size-capped and their errors never quote their contents."""
from pathlib import Path

import pytest
import yaml

from adaptive_streamer.core.limits import JointLimits, LimitsError
from adaptive_streamer.core.policies.card import CardError, load_card
from adaptive_streamer.core.text_files import C_LOADER_MAX, MAX_BYTES, TextFileError, load_yaml
from adaptive_streamer.io import run_info
from adaptive_streamer.share import demo_file

SECRET = "hunter2-not-for-rosout"


def _info(files: dict, parameters: dict | None = None) -> run_info.RunInfo:
    return run_info.parse(yaml.safe_dump({"run_info": run_info.FORMAT,
                                          "adapter": {"parameters": parameters or {}},
                                          "files": files}))


@pytest.mark.parametrize("entry", ["/tmp/a/../../../{outside}", "relative/card.yaml",
                                   "/tmp/./x/../{outside}"])
def test_run_info_entries_that_leave_the_folder_are_refused(tmp_path, entry):
    outside = tmp_path / "outside.txt"
    folder = tmp_path / "replay"
    folder.mkdir()
    name = entry.format(outside=outside.relative_to("/"))
    info = _info({name: {"sha256": "0" * 64, "size": 5, "text": "owned"}})
    with pytest.raises(run_info.RunInfoError, match="refused"):
        run_info.resolve_files(info, folder)
    assert not outside.exists()


def test_a_changed_file_is_written_inside_the_folder(tmp_path):
    gone = tmp_path / "cards" / "card.yaml"          # recorded, since removed
    folder = tmp_path / "replay"
    info = _info({str(gone): {"sha256": "0" * 64, "size": 5, "text": "card: 1\n"}},
                 {"policy": str(gone)})
    params, notes = run_info.resolve_files(info, folder)
    copy = Path(params["policy"])
    assert folder.resolve() in copy.parents and copy.read_text() == "card: 1\n", notes


def test_a_file_the_adapter_would_not_load_is_not_stored(tmp_path):
    other = tmp_path / "not_limits.txt"
    other.write_text(f"password: {SECRET}\n")
    files = run_info.collect_files({"limits_file": str(other), "policy": str(other)})
    entry = files[str(other.resolve())]
    assert entry["text"] is None and entry["refused"], entry
    assert SECRET not in yaml.safe_dump(files)
    # the demo's own files are valid: stored with their text (the model by hash only)
    good = run_info.collect_files({"policy": str(demo_file("policy_edge.yaml")),
                                   "limits_file": str(demo_file("limits.yaml"))})
    stored = {Path(p).suffix: e.get("text") is not None for p, e in good.items()}
    assert stored == {".yaml": True, ".onnx": False}, good


def test_oversized_card_and_limits_are_refused_before_parsing(tmp_path):
    big = tmp_path / "big.yaml"
    big.write_text("# padding\n" * (MAX_BYTES // 10 + 1))
    with pytest.raises(CardError, match="bytes, over the"):
        load_card(big)
    with pytest.raises(LimitsError, match="bytes, over the"):
        JointLimits.from_file(big)


def test_yaml_errors_name_the_line_not_the_contents(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text(f"policy_card: 1\nkind: [tracker, {SECRET}: x\n")
    for load, error in ((load_card, CardError), (JointLimits.from_file, LimitsError)):
        with pytest.raises(error) as exc:
            load(bad)
        assert "line 3" in str(exc.value) and SECRET not in str(exc.value), exc.value


@pytest.mark.parametrize("padding", [0, C_LOADER_MAX])
def test_both_yaml_loaders_give_the_same_values_and_positions(padding):
    # short texts take libyaml's loader, long ones the Python loader: same result either way
    head = "#" * padding + "\n"
    text = head + "a: 1\nb: [2.5, yes, '3']\nc: {d: null}\n"
    assert load_yaml(text, "t") == yaml.safe_load(text) == {"a": 1, "b": [2.5, True, "3"],
                                                             "c": {"d": None}}
    with pytest.raises(TextFileError, match="t: not valid YAML: line 4, column 1: "):
        load_yaml(head + "a: 1\nb: [2.5, x: y\n", "t")
