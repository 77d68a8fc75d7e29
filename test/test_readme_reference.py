# SPDX-License-Identifier: Apache-2.0
"""README's reference tables list every command-line option (each subcommand's argparse
options, as `--help` shows them) and every node parameter (the nodes' parameter tables,
which the nodes declare from), so they cannot drift apart. The adapter node is built once
to check that what it declares is its table."""
import argparse
import re
from pathlib import Path

import pytest
import rclpy
from rclpy.context import Context

from adaptive_streamer.cli import build_parser
from adaptive_streamer.io.param_specs import ADAPTER, NODE_PARAMS, RCLPY_PARAMS
from adaptive_streamer.nodes.adapter import AdapterNode

pytestmark = pytest.mark.ros   # builds nodes (DDS participants): a process of its own
README = Path(__file__).resolve().parents[1] / "README.md"


def readme_rows(section: str) -> dict[str, dict[str, list[str]]]:
    """Cells of each row of each ``#### `title``` table under ``### section``, by name."""
    text = README.read_text()
    body = text.split(f"\n### {section}\n", 1)[1]
    body = re.split(r"\n##?#? (?!#)", body, maxsplit=1)[0]
    rows: dict[str, dict[str, list[str]]] = {}
    title = None
    for line in body.splitlines():
        heading = re.match(r"#### `(.+)`$", line)
        if heading:
            title = heading.group(1)
            rows[title] = {}
        elif title and line.startswith("| `"):
            cells = [c.strip() for c in line.split("|")[1:-1]]
            rows[title][cells[0].strip("`")] = cells
    return rows


def readme_tables(section: str) -> dict[str, list[str]]:
    """First-column entries of each ``#### `title``` table under ``### section``."""
    return {title: list(rows) for title, rows in readme_rows(section).items()}


def subcommands() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


def test_readme_lists_every_option_of_every_subcommand():
    tables = readme_tables("Command line")
    commands = subcommands()
    assert sorted(tables) == sorted(f"adaptive-streamer {c}" for c in commands)
    for name, parser in commands.items():
        listed = {flag for cell in tables[f"adaptive-streamer {name}"]
                  for flag in re.findall(r"--[a-z][a-z-]*", cell)}
        options = {flag for a in parser._actions if not isinstance(a, argparse._HelpAction)
                   for flag in a.option_strings if flag.startswith("--")}
        assert listed == options, (name, "README lacks", sorted(options - listed),
                                   "README has extra", sorted(listed - options))
        help_text = parser.format_help()
        assert all(flag in help_text for flag in options), name


def test_readme_gives_each_parameter_its_valid_values():
    # the "valid" column is the table's own words for the range ("any": the type's values)
    rows = readme_rows("Node parameters")
    for node, table in NODE_PARAMS.items():
        specs = {p.name: p for p in table.params}
        specs |= {f"<{g.list_param[:-1]}>.{m.name}": m for g in table.groups for m in g.members}
        for name, cells in rows[node].items():
            expected = specs[name].expected()
            want = "any" if expected == specs[name].kind.value else expected
            assert cells[3] == want, (node, name, cells[3], want)


def test_readme_lists_every_node_parameter():
    tables = readme_tables("Node parameters")
    assert sorted(tables) == sorted(NODE_PARAMS)
    for node, table in NODE_PARAMS.items():
        listed = {cell.strip("`") for cell in tables[node]}
        known = {p.name for p in table.params}
        known |= {f"<{g.list_param[:-1]}>.{m.name}" for g in table.groups for m in g.members}
        assert listed == known, (node, "README lacks", sorted(known - listed),
                                 "README has extra", sorted(listed - known))


def test_the_adapter_declares_exactly_its_table():
    context = Context()
    rclpy.init(context=context)
    try:
        node = AdapterNode(context=context)
        declared = set(node._parameters) - set(RCLPY_PARAMS)   # noqa: SLF001
        node.destroy_node()
    finally:
        rclpy.shutdown(context=context)
    assert declared == {p.name for p in ADAPTER.params}
