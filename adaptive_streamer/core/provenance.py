# SPDX-License-Identifier: Apache-2.0
"""Who publishes the adapter's inputs: the expected publishers of each input and the verdict
on the publishers seen (no ROS; the node queries the ROS graph and calls these).

Each input (`InputTopic`) has an allow-list of fully qualified node names (the adapter's
``sources.*`` parameters). An empty list means "exactly one publisher, whichever it is at
activation": activation pins it. A non-empty list allows those nodes, one publisher each.
Publishers are compared as a multiset of node names, so a second publisher from the same
node, or a second node with the same name, is an extra publisher too.

* `expected_sources` (at activate): the expected publishers, or the refusal naming the
  nodes when the input has more publishers than allowed;
* `source_fault` (while active): the reason when a publisher is seen that is not expected
  (an extra or a changed one), None otherwise. A missing publisher is no provenance fault:
  the watchdog's staleness checks see the input go quiet.
"""
from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from enum import Enum
from typing import Sequence


# a publisher whose node the ROS graph has not named yet (its endpoint was discovered before
# its participant's node information): not judged until it is named
UNIDENTIFIED = "<not yet identified>"


class InputTopic(Enum):
    """The inputs whose publishers are checked (value: the topic's relative name)."""

    JOINT_STATES = "joint_states"
    REFERENCE = "reference/window"
    FEEDBACK = "feedback"

    @property
    def parameter(self) -> str:
        """The adapter's allow-list parameter of this input."""
        return "sources." + self.name.lower()


@dataclass(frozen=True)
class ExpectedSources:
    """The publishers expected of one input from activation on (``refusal`` set instead
    when activation must be refused)."""

    topic: InputTopic
    nodes: tuple[str, ...] = ()
    refusal: str | None = None


def expected_sources(topic: InputTopic, allowed: Sequence[str],
                     seen: Sequence[str]) -> ExpectedSources:
    """The expected publishers of ``topic`` given its allow-list ``allowed`` (empty:
    exactly one, the one ``seen`` now) and the publishers' node names ``seen`` now."""
    allowed = tuple(a for a in allowed if a)
    if UNIDENTIFIED in seen:
        return ExpectedSources(topic, refusal=(
            f"a publisher of '{topic.value}' is not identified yet (the ROS graph has not "
            f"named its node); ask again"))
    if allowed:
        fault = source_fault(topic, allowed, seen)
        if fault is not None:
            return ExpectedSources(topic, refusal=fault)
        return ExpectedSources(topic, tuple(sorted(allowed)))
    if len(seen) > 1:
        return ExpectedSources(topic, refusal=(
            f"'{topic.value}' has {len(seen)} publishers ({_names(seen)}) where one is "
            f"expected; name the allowed nodes in {topic.parameter}"))
    return ExpectedSources(topic, tuple(seen))


def source_fault(topic: InputTopic, expected: Sequence[str],
                 seen: Sequence[str]) -> str | None:
    """Why the publishers ``seen`` of ``topic`` are not the ``expected`` ones (an extra or
    changed publisher, named), or None (also while a publisher is not identified yet: it is
    judged once the graph names it)."""
    if UNIDENTIFIED in seen:
        return None
    extra = Counter(seen) - Counter(expected)
    if not extra:
        return None
    unexpected = sorted(extra.elements())
    return (f"unexpected publisher{'s' if len(unexpected) > 1 else ''} of '{topic.value}': "
            f"{_names(unexpected)} (publishers now: {_names(seen)}; expected: "
            f"{_names(expected) if expected else 'none'})")


def _names(nodes: Sequence[str]) -> str:
    return ", ".join(f"'{n}'" for n in sorted(nodes)) or "none"
