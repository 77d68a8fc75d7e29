# SPDX-License-Identifier: Apache-2.0
"""Numeric fields of ROS messages named by path: validated against the type, read fast.

Path grammar (whitespace not allowed)::

    path     := segment ("." segment)*
    segment  := field [ "[" index "]" ]
    index    := digits                    # element of an array or sequence, from 0
              | joint_name                # JointState-style: element at name.index(joint_name)
              | "'" text "'" | '"' text '"'   # quoted joint name (for names made of digits)

Examples: ``point.y``, ``wrench.force.z``, ``pose.orientation.w``, ``data[2]``,
``position[1]``, ``position[j3]``, ``effort['3']``.

A joint-name index is allowed on an array field of a message that also has a ``name`` field
of strings (``sensor_msgs/JointState``: ``position``/``velocity``/``effort``); at run time
the element is the one at the position of that name in the message's ``name`` list.

`compile_fields` checks every path against the message class at configuration time (field
exists, indexing only on arrays, fixed-array bounds, the path ends at a number) and returns
one getter for all paths. A message that lacks an element at run time (sequence too short,
joint name absent) raises `FieldPathError`; the caller counts and drops it.
"""
from __future__ import annotations

import importlib
import operator
import re
from dataclasses import dataclass
from typing import Any, Callable, Sequence

from rosidl_parser.definition import (FLOATING_POINT_TYPES, INTEGER_TYPES,
                                      AbstractGenericString, AbstractNestedType,
                                      AbstractSequence, AbstractType, Array, BasicType,
                                      BoundedSequence, NamespacedType)

NUMERIC_TYPES = frozenset(FLOATING_POINT_TYPES) | frozenset(INTEGER_TYPES) | {"boolean"}
_SEGMENT = re.compile(r"^([A-Za-z][A-Za-z0-9_]*)(?:\[([^\[\]]+)\])?$")
_TYPE_NAME = re.compile(r"^([A-Za-z][A-Za-z0-9_]*)/(?:msg/)?([A-Za-z][A-Za-z0-9_]*)$")


class FieldPathError(ValueError):
    """A message type or field path is invalid, or a message lacks the element a path names."""


def message_class(type_name: str) -> type:
    """The Python class of a ROS message type ``pkg/msg/Type`` (or ``pkg/Type``)."""
    m = _TYPE_NAME.match(type_name.strip())
    if m is None:
        raise FieldPathError(f"message type '{type_name}' is not of the form "
                             "'package/msg/Type' (e.g. geometry_msgs/msg/PointStamped)")
    pkg, name = m.groups()
    try:
        module = importlib.import_module(f"{pkg}.msg")
    except ImportError:
        raise FieldPathError(f"unknown message type '{type_name}': no message package "
                             f"'{pkg}' is installed") from None
    cls = getattr(module, name, None)
    if not (isinstance(cls, type) and hasattr(cls, "get_fields_and_field_types")):
        raise FieldPathError(f"unknown message type '{type_name}': package '{pkg}' has no "
                             f"message '{name}'")
    return cls


def type_name(cls: type) -> str:
    """``pkg/msg/Type`` of a message class."""
    return f"{cls.__module__.split('.')[0]}/msg/{cls.__name__}"


def _fields(cls: type) -> dict[str, AbstractType]:
    return dict(zip(cls.get_fields_and_field_types(), cls.SLOT_TYPES))


def _class_of(t: NamespacedType) -> type:
    return getattr(importlib.import_module(".".join(t.namespaces)), t.name)


def is_stamped(cls: type) -> bool:
    """True when the type has a top-level ``header`` of type ``std_msgs/Header``."""
    t = _fields(cls).get("header")
    return isinstance(t, NamespacedType) and t.namespaces[0] == "std_msgs" and t.name == "Header"


def _describe(t: AbstractType) -> str:
    if isinstance(t, NamespacedType):
        return f"{t.namespaces[0]}/msg/{t.name}"
    if isinstance(t, BasicType):
        return t.typename
    if isinstance(t, Array):
        return f"{_describe(t.value_type)}[{t.size}]"
    if isinstance(t, AbstractSequence):
        return f"{_describe(t.value_type)}[]"
    return "string"


def _parse_index(text: str) -> int | str:
    if text.isdigit():
        return int(text)
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "'\"":
        return text[1:-1]
    return text


@dataclass(frozen=True)
class _Step:
    kind: str          # 'attr' | 'index' | 'name'
    field: str
    index: int | str = 0


def _make_name_step(field: str, key: str) -> Callable[[Any], Any]:
    array = operator.attrgetter(field)
    cache = [0]

    def step(parent: Any) -> Any:
        names = parent.name
        i = cache[0]
        if i >= len(names) or names[i] != key:
            i = names.index(key)
            cache[0] = i
        return array(parent)[i]

    return step


def _compile_steps(steps: list[_Step]) -> Callable[[Any], Any]:
    funcs: list[Callable[[Any], Any]] = []
    attrs: list[str] = []
    for s in steps:
        if s.kind == "name":
            if attrs:
                funcs.append(operator.attrgetter(".".join(attrs)))
                attrs = []
            funcs.append(_make_name_step(s.field, str(s.index)))
            continue
        attrs.append(s.field)
        if s.kind == "index":
            funcs.append(operator.attrgetter(".".join(attrs)))
            funcs.append(operator.itemgetter(s.index))
            attrs = []
    if attrs:
        funcs.append(operator.attrgetter(".".join(attrs)))
    if len(funcs) == 1:
        return funcs[0]

    def get(msg: Any) -> Any:
        for f in funcs:
            msg = f(msg)
        return msg

    return get


def resolve(cls: type, path: str) -> Callable[[Any], Any]:
    """Validate ``path`` against message class ``cls``; return a getter for its value."""
    where = f"field '{path}'"
    if not path:
        raise FieldPathError("a field path is empty")
    steps: list[_Step] = []
    current: type | None = cls
    leaf: AbstractType | None = None
    for part in path.split("."):
        if current is None:
            raise FieldPathError(f"{where}: '{part}' follows {_describe(leaf)}, which has no "
                                 "fields")
        m = _SEGMENT.match(part)
        if m is None:
            raise FieldPathError(f"{where}: cannot read segment '{part}' (expected 'field' or "
                                 "'field[index]')")
        name, index_text = m.groups()
        fields = _fields(current)
        if name not in fields:
            raise FieldPathError(f"{where}: {type_name(current)} has no field '{name}' "
                                 f"(fields: {', '.join(fields)})")
        t = fields[name]
        if index_text is None:
            steps.append(_Step("attr", name))
        else:
            if not isinstance(t, AbstractNestedType):
                raise FieldPathError(f"{where}: '{name}' is {_describe(t)}, not an array; "
                                     "it cannot be indexed")
            index = _parse_index(index_text)
            if isinstance(index, int):
                limit = t.size if isinstance(t, Array) else (
                    t.maximum_size if isinstance(t, BoundedSequence) else None)
                if limit is not None and index >= limit:
                    raise FieldPathError(f"{where}: index {index} is out of range for "
                                         f"'{name}' ({_describe(t)})")
                steps.append(_Step("index", name, index))
            else:
                names_t = fields.get("name")
                if not (isinstance(names_t, AbstractNestedType)
                        and isinstance(names_t.value_type, AbstractGenericString)):
                    raise FieldPathError(
                        f"{where}: '{index_text}' is a name, but {type_name(current)} has no "
                        "'name' list of strings to look it up in (use a number as index)")
                if not index:
                    raise FieldPathError(f"{where}: the joint name in '[{index_text}]' is empty")
                steps.append(_Step("name", name, index))
            t = t.value_type
        leaf = t
        current = _class_of(t) if isinstance(t, NamespacedType) else None
    if not (isinstance(leaf, BasicType) and leaf.typename in NUMERIC_TYPES):
        hint = " (add an index, e.g. '[0]')" if isinstance(leaf, AbstractNestedType) else ""
        raise FieldPathError(f"{where}: ends at {_describe(leaf)}, not a number{hint}")
    return _compile_steps(steps)


def compile_fields(cls: type, paths: Sequence[str]) -> Callable[[Any], list[float]]:
    """One getter returning the float values of ``paths`` (all validated now) from a message.

    The getter raises `FieldPathError` naming the path when a message lacks the element.
    """
    getters = [(p, resolve(cls, p)) for p in paths]

    def extract(msg: Any) -> list[float]:
        out = []
        for path, get in getters:
            try:
                out.append(float(get(msg)))
            except IndexError:
                raise FieldPathError(f"field '{path}': the message's array is too short") \
                    from None
            except ValueError:
                raise FieldPathError(f"field '{path}': the joint name is not in the "
                                     "message's name list") from None
        return out

    return extract
