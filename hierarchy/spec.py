"""Read a circuit spec (YAML, version 1) into the objects of :mod:`hierarchy.model`.

One key table per section of the file lists its keys: whether each is required,
its type, its default and a one-line description. The parser checks the file
against these tables, and :func:`spec_schema` turns the same tables into a JSON
Schema, so the two cannot drift apart. Run ``python -m hierarchy.spec
--write-schema`` to refresh the shipped ``spec-v1.schema.json``.

Every problem is raised as :class:`hierarchy.errors.SpecError` with the place in
the file (``links[2] (low->high).noise``), the line where known, and a fix.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import sys
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import yaml

from hierarchy.errors import SpecError
from hierarchy.units import MAPS, PRESETS, RADIO_DISTANCE, Units, radio_energy_per_bit
from hierarchy.io import atomic_write_text
from hierarchy.model import (
    LINK_KINDS,
    PREDICTION,
    RESIDUAL,
    Area,
    Budget,
    Link,
    Sensor,
    Spec,
    StateBlock,
    World,
    frozen_array,
    frozen_map,
)
from hierarchy import rules
from hierarchy.rules import suggest as _suggest
from hierarchy.rules import (  # noqa: F401 (re-exported)
    MAX_DELAY, MAX_LAG, MAX_LEVEL, MAX_NUMBER, MAX_TOTAL_DIM, STABLE_RADIUS)

SPEC_VERSION = 1
SCHEMA_PATH = Path(__file__).with_name("spec-v1.schema.json")

#: Largest accepted document, in characters (bytes for a file).
MAX_DOCUMENT = 5_000_000
#: Largest number of YAML nodes after aliases are expanded (each use counts).
MAX_NODES = 1_000_000

# A name appears inside places (``areas.NAME.lag``) and link ids (``A->B``), so
# it must not contain the characters that build those.
_NAME_PATTERN = r"^(?!\s*$)(?![\s\S]*->)[^\[\].\x00-\x1f\x7f-\x9f\u2028\u2029]+$"
_MATRIX_WORDS = ("identity", "zero")


# --------------------------------------------------------------------------
# Positions: a value from the file together with its place and line
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class _At:
    """A value read from the file, with its place in the spec and its line."""

    value: object
    place: str
    line: int | None = None

    def fail(self, message: str, fix: str):
        raise SpecError(message, place=self.place, fix=fix, line=self.line)


def _join(place: str, key) -> str:
    return f"{place}.{key}" if place else str(key)


def _child(at: _At, key) -> _At:
    """The value under ``key`` of the mapping at ``at``; its line is the key's."""
    lines = getattr(at.value, "key_lines", {})
    return _At(at.value[key], _join(at.place, key), lines.get(key, at.line))


def _items(at: _At) -> list[_At]:
    lines = getattr(at.value, "item_lines", ())
    return [
        _At(v, f"{at.place}[{i}]", lines[i] if i < len(lines) else at.line)
        for i, v in enumerate(at.value)
    ]


def _describe(value) -> str:
    """Say in words what a YAML value is, for error messages."""
    if value is None:
        return "nothing"
    if isinstance(value, bool):
        return f"the boolean {str(value).lower()}"
    if isinstance(value, (int, float)):
        return f"the number {value}"
    if isinstance(value, str):
        return f"the text '{value}'"
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    return f"a {type(value).__name__}"


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


# --------------------------------------------------------------------------
# YAML loading: safe, with line numbers, duplicate keys and bombs refused
# --------------------------------------------------------------------------


class _LineDict(dict):
    """A YAML mapping that remembers its line and the line of each key."""


class _LineList(list):
    """A YAML sequence that remembers its line and the line of each item."""


class _SpecLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that builds line-aware containers.

    It also reads ``1e-3`` as a number (as YAML 1.2 and editors do); YAML 1.1
    would silently read it as text.
    """


def _node_line(node) -> int:
    return node.start_mark.line + 1


def _construct_mapping(loader, node):
    loader.flatten_mapping(node)  # YAML merge keys (`<<: *base`)
    data = _LineDict()
    data.line = _node_line(node)
    data.key_lines = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        data[key] = loader.construct_object(value_node, deep=True)
        data.key_lines[key] = _node_line(key_node)
    return data


def _construct_sequence(loader, node):
    data = _LineList(loader.construct_object(n, deep=True) for n in node.value)
    data.line = _node_line(node)
    data.item_lines = [_node_line(n) for n in node.value]
    return data


_SpecLoader.add_constructor("tag:yaml.org,2002:map", _construct_mapping)
_SpecLoader.add_constructor("tag:yaml.org,2002:seq", _construct_sequence)
_SpecLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?[0-9][0-9_]*(?:\.[0-9_]*)?[eE][-+]?[0-9]+$"),
    list("-+0123456789"),
)


def _check_keys(node, place: str, loader) -> None:
    """Refuse non-scalar keys and keys written twice in one mapping."""
    seen = {}
    for key_node, _ in node.value:
        if key_node.tag == "tag:yaml.org,2002:merge":
            continue
        if not isinstance(key_node, yaml.ScalarNode):
            raise SpecError(
                "a key must be a plain word, not a list or a mapping",
                place=place or "top level", line=_node_line(key_node),
                fix="write keys as simple words, e.g. `noise: 0.1`")
        key = loader.construct_object(key_node)
        if key in seen:
            raise SpecError(
                f"the key `{key}` is written twice in the same mapping "
                f"(first on line {seen[key]})",
                place=_join(place, key), line=_node_line(key_node),
                fix="keep only one of them")
        seen[key] = _node_line(key_node)


def _check_tree(root, loader) -> None:
    """Check the composed YAML graph before any Python object is built.

    Aliases share nodes, so a small file can stand for a huge tree (the
    "billion laughs" attack). Sizes are counted with aliases expanded but each
    shared node is visited once, so this check is fast even on a bomb.
    """
    sizes, open_nodes = {}, set()

    def size(node, place):
        if id(node) in sizes:
            return sizes[id(node)]
        if id(node) in open_nodes:
            raise SpecError("an alias refers to a node that contains it",
                            place=place or "top level", line=_node_line(node),
                            fix="remove the self-referencing alias (`*name` "
                                "inside the node marked `&name`)")
        open_nodes.add(id(node))
        total = 1
        if isinstance(node, yaml.MappingNode):
            _check_keys(node, place, loader)
            for key_node, value_node in node.value:
                total += size(value_node, _join(place, key_node.value)) + 1
        elif isinstance(node, yaml.SequenceNode):
            for i, item in enumerate(node.value):
                total += size(item, f"{place}[{i}]")
        if total > MAX_NODES:
            raise SpecError(
                f"the document is too large: with its aliases expanded it has "
                f"more than {MAX_NODES:,} YAML nodes",
                place=place or "top level", line=_node_line(node),
                fix="write the spec out without deeply nested aliases")
        open_nodes.discard(id(node))
        sizes[id(node)] = total
        return total

    size(root, "")


def _yaml_error(err: yaml.YAMLError, where: str) -> SpecError:
    if isinstance(err, yaml.reader.ReaderError):
        return SpecError(
            f"the file holds a character YAML does not allow (#x{err.character:04x}"
            f" at character {err.position + 1})" if isinstance(err.character, int) else
            "the file holds bytes that are not text", place=where,
            fix="save the spec as plain UTF-8 text, without control characters")
    mark = getattr(err, "problem_mark", None) or getattr(err, "context_mark", None)
    words = [getattr(err, "context", None), getattr(err, "problem", None)]
    words = " ".join(w for w in words if w) or str(err)
    words = " ".join(words.split())  # one line
    line = mark.line + 1 if mark else None
    at = f" (line {line}, column {mark.column + 1})" if mark else ""
    if isinstance(err, yaml.constructor.ConstructorError) and "merg" in words:
        fix = ("a merge key (`<<:`) takes an alias of a mapping (`<<: *base`) "
               "or a list of such aliases")
    elif isinstance(err, yaml.constructor.ConstructorError):
        fix = "use plain YAML values only: remove the `!` tag"
    elif isinstance(err, yaml.composer.ComposerError):
        fix = ("define each anchor (`&name`) before its aliases (`*name`), "
               "and keep one document per file (no second `---`)")
    else:
        fix = ("check the indentation and punctuation near that line "
               "(YAML indents with spaces, never tabs)")
    return SpecError(f"the file is not valid YAML: {words}{at}",
                     place=where, line=line, fix=fix)


def _read_yaml(text: str, where: str) -> _At:
    """Parse ``text`` safely into line-aware containers; return the root."""
    if len(text) > MAX_DOCUMENT:
        raise SpecError(
            f"the document is too large ({len(text):,} characters; the limit "
            f"is {MAX_DOCUMENT:,})", place=where,
            fix="a spec should be a few kilobytes; use matrix shorthand "
                "(`identity`, a number, a diagonal list) for big blocks")
    loader = None
    try:
        loader = _SpecLoader(text)  # refuses non-printable characters
        root = loader.get_single_node()
        if root is None or root.tag == "tag:yaml.org,2002:null":
            raise SpecError("the file is empty", place=where,
                            fix="start the file with `spec: 1`, then add "
                                "`world`, `sensors` and `areas`")
        if not isinstance(root, yaml.MappingNode):
            raise SpecError("the top level must be a mapping of keys "
                            "(`spec: 1`, `world: ...`)",
                            place=where, line=_node_line(root),
                            fix="start the file with `spec: 1`")
        _check_tree(root, loader)
        data = loader.construct_document(root)
        if not isinstance(data, _LineDict):  # a tagged mapping: `!!set {a, b}`
            raise SpecError("the top level must be a mapping of keys "
                            "(`spec: 1`, `world: ...`)",
                            place=where, line=_node_line(root),
                            fix="start the file with `spec: 1`")
    except yaml.YAMLError as err:
        raise _yaml_error(err, where) from None
    except SpecError:
        raise
    except ValueError as err:  # e.g. an integer of thousands of digits
        raise SpecError(f"a value cannot be read ({err})", place=where,
                        fix="write numbers with at most a few dozen digits "
                            "(1e12, not 1000000000000...)") from None
    except RecursionError:
        raise SpecError("the document is nested too deeply", place=where,
                        fix="flatten the structure; a spec is only a few "
                            "levels deep") from None
    finally:
        if loader is not None:
            loader.dispose()
    return _At(data, "", data.line)


# --------------------------------------------------------------------------
# Value kinds: each checks one value and describes itself in JSON Schema
# --------------------------------------------------------------------------


def _number(at: _At) -> float:
    """A finite real number; booleans and quoted numbers are refused."""
    v = at.value
    if isinstance(v, bool):
        at.fail(f"expected a number, got {_describe(v)}",
                fix="write a number; YAML reads true/false/yes/no/on/off "
                    "as booleans")
    if isinstance(v, (int, float)):
        try:
            x = float(v)
        except OverflowError:
            x = math.inf
        if not math.isfinite(x):
            at.fail(f"expected a finite number, got {_short(v)}",
                    fix="write an ordinary number (no .inf or .nan)")
        return x
    if isinstance(v, str) and _is_number_text(v):
        at.fail(f"'{v}' is text, not a number: it is in quotes",
                fix=f"remove the quotes: {v.strip()}")
    at.fail(f"expected a number, got {_describe(v)}", fix="write a number")


def _short(value) -> str:
    """A number as the file wrote it, cut short if it is very long."""
    text = str(value)
    return text if len(text) <= 40 else f"{text[:12]}...({len(text)} digits)"


def _bounded(at: _At, x: float) -> float:
    """Refuse numbers too large for the computations that follow."""
    return rules.check_number(x, at.place, at.line, written=_short(at.value))


def _is_number_text(text: str) -> bool:
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


class _Kind:
    """How one value is checked and how it appears in the JSON Schema."""

    def schema(self) -> dict:
        raise NotImplementedError

    def check(self, at: _At):
        raise NotImplementedError


@dataclass(frozen=True)
class _Version(_Kind):
    def schema(self):
        return {"const": SPEC_VERSION}

    def check(self, at):
        v = at.value
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            if v == SPEC_VERSION:
                return SPEC_VERSION
            at.fail(f"this file says spec version {v}; this tool reads "
                    f"version {SPEC_VERSION}",
                    fix=f"write `spec: {SPEC_VERSION}` and convert the file "
                        f"to version {SPEC_VERSION}")
        at.fail(f"`spec` must be the number {SPEC_VERSION}, got {_describe(v)}",
                fix=f"write `spec: {SPEC_VERSION}`")


@dataclass(frozen=True)
class _Int(_Kind):
    minimum: int
    maximum: int | None = None

    def schema(self):
        out = {"type": "integer", "minimum": self.minimum}
        if self.maximum is not None:
            out["maximum"] = self.maximum
        return out

    def check(self, at):
        x = _number(at)
        if not x.is_integer():
            at.fail(f"expected a whole number, got {at.value}",
                    fix="write a whole number such as 2")
        return rules.check_whole(int(x), self.minimum, self.maximum, at.place, at.line,
                                 written=str(at.value))


@dataclass(frozen=True)
class _Real(_Kind):
    minimum: float = 0.0

    def schema(self):
        return {"type": "number", "minimum": self.minimum, "maximum": MAX_NUMBER}

    def check(self, at):
        x = _bounded(at, _number(at))
        if x < self.minimum:
            at.fail(f"must be at least {self.minimum:g}, got {at.value}",
                    fix=f"use a value of {self.minimum:g} or more")
        return x


@dataclass(frozen=True)
class _Text(_Kind):
    def schema(self):
        return {"type": "string", "pattern": r"\S"}

    def check(self, at):
        if not isinstance(at.value, str) or not at.value.strip():
            at.fail(f"expected some text, got {_describe(at.value)}",
                    fix="write the text in quotes")
        return at.value


@dataclass(frozen=True)
class _Name(_Kind):
    """The name of a state block, a sensor or an area."""

    def schema(self):
        return {"$ref": "#/$defs/name"}

    def check(self, at):
        name = at.value
        if not isinstance(name, str):
            at.fail(f"a name must be text, got {_describe(name)}",
                    fix="put the name in quotes (YAML reads yes/no/on/off as "
                        "booleans and digits as numbers)")
        if not name.strip():
            at.fail("a name cannot be empty or only spaces",
                    fix="give it a visible name")
        if not name.isprintable():
            at.fail(f"the name '{name}' contains a control character or a "
                    f"line break", fix="use letters, digits, spaces and "
                                       "punctuation only")
        if "->" in name:
            at.fail(f"the name '{name}' contains '->', which separates the "
                    "two ends of a link id", fix="rename it without '->'")
        if re.fullmatch(_NAME_PATTERN, name) is None:
            at.fail(f"the name '{name}' contains '[', ']' or '.', which are "
                    "used to write places such as links[2].noise",
                    fix="rename it without these characters")
        return name


@dataclass(frozen=True)
class _Names(_Kind):
    """One name, or a non-empty list of distinct names; checked as positions."""

    def schema(self):
        name = {"$ref": "#/$defs/name"}
        return {"anyOf": [name, {"type": "array", "items": name,
                                 "minItems": 1, "uniqueItems": True}]}

    def check(self, at):
        items = _items(at) if isinstance(at.value, list) else [at]
        if not items:
            at.fail("the list is empty",
                    fix="name at least one state, or remove the key")
        seen = set()
        for item in items:
            name = _Name().check(item)
            if name in seen:
                item.fail(f"`{name}` is listed twice",
                          fix="list each name once")
            seen.add(name)
        return tuple(items)


@dataclass(frozen=True)
class _Choice(_Kind):
    options: tuple

    def schema(self):
        return {"enum": list(self.options)}

    def check(self, at):
        if at.value not in self.options:
            at.fail(f"expected one of {', '.join(self.options)}, "
                    f"got {_describe(at.value)}",
                    fix=_suggest(at.value, self.options))
        return at.value


@dataclass(frozen=True)
class _Shorthand:
    """A matrix as written: checked for numbers, not yet given a shape.

    ``form`` is ``number``, ``diagonal``, ``full``, ``identity`` or ``zero``.
    """

    form: str
    value: object
    at: _At

    def size_hint(self) -> int | None:
        """The number of rows the written form fixes, if it fixes any."""
        if self.form in ("diagonal", "full"):
            return len(self.value)
        return None

    def expand(self, rows: int, cols: int, why: str) -> np.ndarray:
        """The full ``rows x cols`` matrix; ``why`` says where the shape comes from."""
        shape = f"{rows} x {cols}"
        if self.form == "zero":
            return np.zeros((rows, cols))
        if self.form == "full":
            return rules.check_shape(self.value, rows, cols, why, self.at.place, self.at.line)
        if rows != cols:
            what = ("a flat list is a diagonal matrix" if self.form == "diagonal"
                    else f"`{self.at.value}` stands for a multiple of the identity")
            self.at.fail(f"{what}, so it needs a square place; this one is "
                         f"{shape} ({why})",
                         fix=f"use a list of lists ({_plural(rows, 'row')} "
                             f"of {_plural(cols, 'number')} each), or `zero`")
        if self.form == "diagonal":
            if len(self.value) != rows:
                self.at.fail(f"expected a {shape} matrix ({why}), got a "
                             f"diagonal of {_plural(len(self.value), 'number')}",
                             fix=f"give {_plural(rows, 'number')} on the "
                                 f"diagonal")
            return np.diag(self.value)
        scale = 1.0 if self.form == "identity" else self.value
        return scale * np.eye(rows)


@dataclass(frozen=True)
class _Matrix(_Kind):
    """A matrix in any shorthand form (see ``_Shorthand``)."""

    def schema(self):
        return {"$ref": "#/$defs/matrix"}

    def check(self, at):
        v = at.value
        if isinstance(v, str) and v in _MATRIX_WORDS:
            return _Shorthand(v, None, at)
        if isinstance(v, str) and not _is_number_text(v):
            at.fail(f"expected a matrix, got {_describe(v)}",
                    fix=_suggest(v, _MATRIX_WORDS) + ", a number or a list")
        if not isinstance(v, list):
            return _Shorthand("number", _bounded(at, _number(at)), at)
        if not v:
            at.fail("a matrix cannot be an empty list",
                    fix="write numbers, a list of lists, `identity` or `zero`")
        rows = [isinstance(r, list) for r in v]
        if all(rows):
            return _Shorthand("full", self._rows(at), at)
        if any(rows):
            at.fail("a matrix mixes numbers and lists",
                    fix="write either a flat list (a diagonal) or a list of "
                        "lists (one list per row)")
        return _Shorthand("diagonal", self._entries(at), at)

    @staticmethod
    def _entries(at: _At) -> np.ndarray:
        # Fast path for the usual case; the slow path finds the bad entry.
        if all(type(x) in (int, float) for x in at.value):
            try:
                arr = np.array(at.value, dtype=float)
            except OverflowError:  # an integer beyond double precision
                arr = np.array([math.inf])
            if np.isfinite(arr).all() and np.abs(arr).max() <= MAX_NUMBER:
                return arr
        return np.array([_bounded(item, _number(item)) for item in _items(at)])

    @classmethod
    def _rows(cls, at: _At) -> np.ndarray:
        rows = _items(at)
        width = len(rows[0].value)
        for row in rows:
            if not row.value:
                row.fail("a row of a matrix cannot be empty",
                         fix="give every row its numbers")
            if len(row.value) != width:
                row.fail(f"the rows have different lengths ({len(row.value)} "
                         f"here, {width} in the first row)",
                         fix="give every row the same number of entries")
        return np.vstack([cls._entries(row) for row in rows])


@dataclass(frozen=True)
class _Key:
    """One allowed key of a section: the unit the parser and schema share."""

    name: str
    kind: _Kind
    doc: str
    required: bool = False
    default: object = None  # None: no fixed default (see doc)
    fix: str = ""  # what to add when a required key is missing


@dataclass(frozen=True)
class _Table(_Kind):
    """A mapping with a fixed set of keys; ``extra`` adds schema rules."""

    keys: tuple
    extra: dict | None = None

    def schema(self):
        out = {"type": "object",
               "properties": {k.name: _key_schema(k) for k in self.keys},
               "additionalProperties": False}
        required = [k.name for k in self.keys if k.required]
        if required:
            out["required"] = required
        out.update(self.extra or {})
        return out

    def check(self, at):
        return _read_table(at, self.keys)


@dataclass(frozen=True)
class _MapOf(_Kind):
    """A mapping from names to values of one kind, in the written order."""

    value: _Kind
    what: str  # singular noun for messages
    min_items: int = 0

    def schema(self):
        return {"type": "object", "propertyNames": {"$ref": "#/$defs/name"},
                "additionalProperties": self.value.schema(),
                "minProperties": self.min_items}

    def check(self, at):
        if not isinstance(at.value, dict):
            at.fail(f"expected a mapping from names to {self.what}s, got "
                    f"{_describe(at.value)}", fix=f"write `NAME: ...` lines")
        if len(at.value) < self.min_items:
            at.fail(f"needs at least one {self.what}",
                    fix=f"add a {self.what} under this key")
        pairs = []
        for key in at.value:
            child = _child(at, key)
            name = _Name().check(_At(key, child.place, child.line))
            pairs.append((name, self.value.check(child)))
        return pairs


@dataclass(frozen=True)
class _ListOf(_Kind):
    item: _Kind
    example: str

    def schema(self):
        return {"type": "array", "items": self.item.schema()}

    def check(self, at):
        if not isinstance(at.value, list):
            at.fail(f"expected a list, got {_describe(at.value)}",
                    fix=f"write one `- {self.example}` line per entry")
        return _items(at)


def _key_schema(key: _Key) -> dict:
    out = dict(key.kind.schema())
    out["description"] = key.doc
    if key.default is not None:
        out["default"] = key.default
    return out


class _Fields:
    """The keys of one mapping in the file, checked against its key table."""

    def __init__(self, at: _At, keys: tuple):
        self.at = at
        self.keys = {k.name: k for k in keys}

    def given(self, name: str) -> bool:
        return name in self.at.value

    def pos(self, name: str) -> _At:
        """Where ``name`` is; for a missing key, the mapping's own line."""
        if self.given(name):
            return _child(self.at, name)
        return _At(None, _join(self.at.place, name), self.at.line)

    def get(self, name: str):
        """The checked value of ``name``, or its default (None if it has none)."""
        key = self.keys[name]
        if self.given(name):
            return key.kind.check(self.pos(name))
        if key.default is None:
            return None
        return key.kind.check(replace(self.pos(name), value=key.default))


def _read_table(at: _At, keys: tuple) -> _Fields:
    """Check that ``at`` is a mapping using only (and all required) ``keys``."""
    names = [k.name for k in keys]
    fields = _Fields(at, keys)
    if not isinstance(at.value, dict):
        at.fail(f"expected a mapping of keys, got {_describe(at.value)}",
                fix=f"write `key: value` entries; the keys allowed here are: "
                    f"{', '.join(names)}")
    for key in at.value:
        if key not in names:
            _child(at, key).fail(f"unknown key `{key}`",
                                 fix=_suggest(key, names))
    for key in keys:
        if key.required and not fields.given(key.name):
            fields.pos(key.name).fail(
                f"the required key `{key.name}` is missing: {key.doc}",
                fix=key.fix or f"add `{key.name}: ...`")
    for key in at.value:
        if at.value[key] is None:
            _child(at, key).fail(f"`{key}` has no value",
                                 fix="give it a value, or delete the key to "
                                     "use its default")
    return fields


@dataclass(frozen=True)
class _Selector(_Kind):
    """Which links a budget covers: ``all``, a list of ids, ``{from:}``/``{to:}``."""

    def schema(self):
        return {"anyOf": [
            {"const": "all"},
            {"type": "array", "items": {"type": "string"}, "minItems": 1,
             "uniqueItems": True},
            _Table(_SELECTOR_KEYS,
                   {"minProperties": 1, "maxProperties": 1}).schema(),
        ]}

    def check(self, at):
        """Return ``("all", None)``, ``("ids", [positions])`` or ``(end, position)``."""
        if at.value == "all":
            return "all", None
        if isinstance(at.value, list):
            return "ids", _items(at)
        if isinstance(at.value, dict):
            fields = _read_table(at, _SELECTOR_KEYS)
            ends = [k.name for k in _SELECTOR_KEYS if fields.given(k.name)]
            if len(ends) != 1:
                at.fail("name exactly one of `from` or `to`",
                        fix="use {from: NODE} for the links out of a node, "
                            "or {to: NODE} for the links into it")
            fields.get(ends[0])  # a valid name
            return ends[0], fields.pos(ends[0])
        at.fail(f"expected `all`, a list of link ids, {{from: NODE}} or "
                f"{{to: NODE}}, got {_describe(at.value)}",
                fix="for a single link write a list: [A->B]")


@dataclass(frozen=True)
class _LinkNumbers(_Kind):
    """A mapping from link ids (``FROM->TO``) to numbers of at least
    ``minimum``; returns ``(id, number, position)`` triples."""

    minimum: float = 0.0

    def schema(self):
        return {"type": "object", "propertyNames": {"type": "string", "pattern": "->"},
                "additionalProperties": _Real(self.minimum).schema(), "minProperties": 1}

    def check(self, at):
        if not isinstance(at.value, dict) or not at.value:
            at.fail(f"expected a mapping from link ids to numbers, got {_describe(at.value)}",
                    fix="write `{FROM->TO: number}`")
        out = []
        for key in at.value:
            child = _child(at, key)
            if not isinstance(key, str) or "->" not in key:
                child.fail(f"`{key}` is not a link id", fix="write link ids as FROM->TO")
            out.append((key, _Real(self.minimum).check(child), child))
        return out


# --------------------------------------------------------------------------
# Key tables: one per section (the single source of truth)
# --------------------------------------------------------------------------

_STATE_KEYS = (
    _Key("dim", _Int(1, MAX_TOTAL_DIM),
         "size of the block; default: the size of a list-form dynamics or "
         "noise, else 1"),
    _Key("dynamics", _Matrix(), "the diagonal block A[this, this] (dim x dim)",
         default="zero"),
    _Key("noise", _Matrix(),
         "process-noise covariance of the block (dim x dim)", default="zero"),
    _Key("driven_by", _MapOf(_Matrix(), "matrix"),
         "other block name -> the block A[this, other] (dim x other's dim)"),
)

_WORLD_KEYS = (
    _Key("states", _MapOf(_Table(_STATE_KEYS), "state", 1),
         "the named blocks of the world state, stacked in the written order",
         required=True, fix="add `states:` with at least one named block"),
)

_SENSOR_KEYS = (
    _Key("observes", _MapOf(_Matrix(), "matrix", 1),
         "state name -> the block C[sensor, state] (sensor dim x state dim); "
         "blocks not named are zero", required=True,
         fix="add `observes: {STATE: identity}`"),
    _Key("noise", _Matrix(), "sensor-noise covariance (dim x dim)",
         default="zero"),
    _Key("dim", _Int(1, MAX_TOTAL_DIM),
         "size of the reading; default: inferred from the observes blocks"),
)

_AREA_PIN_KEYS = (
    _Key("M", _Matrix(), "the area's own transition gain (dim x dim)"),
)

_AREA_KEYS = (
    _Key("tracks", _Names(),
         "a state name or a list of them (stacked): the area's target; "
         "leave out for a free relay"),
    _Key("dim", _Int(1, MAX_TOTAL_DIM),
         "size of the area's state; default: the tracked size; required for "
         "a relay"),
    _Key("weight", _Real(0.0),
         "weight of the inference error in the cost; default: 1 if the area "
         "tracks something, else 0"),
    _Key("lag", _Int(0, MAX_LAG),
         "0 estimates the present, 1 the previous step, more smooths",
         default=0),
    _Key("activity_price", _Real(0.0),
         "price per unit of the area's activity E||z||^2", default=0),
    _Key("pin", _Table(_AREA_PIN_KEYS), "gains fixed by hand (not optimised)"),
    _Key("level", _Int(1, MAX_LEVEL),
         "where drawings and `hierarchy check` place the area (sensors are "
         "level 0); default: one above the lowest node that sends it a "
         "residual; changes no computed number"),
)

_K_PIN = _Key("K", _Matrix(),
              "the receiving area's gain for this link (receiver dim x dim)")
_PIN_KEYS = {
    PREDICTION: (
        _Key("G", _Matrix(), "the sender's gain (dim x sending area dim)"),
        _K_PIN,
    ),
    RESIDUAL: (
        _Key("S", _Matrix(), "the gain on the sender's signal "
                             "(dim x sender dim)"),
        _Key("P", _Matrix(), "the gain on the paired prediction received "
                             "(dim x that prediction's dim)"),
        _K_PIN,
    ),
}


def _link_pin_schema_rules() -> dict:
    """Schema rules that allow each kind of link only its own pinned gains."""
    return {"allOf": [
        {"if": {"properties": {"kind": {"const": kind}}, "required": ["kind"]},
         "then": {"properties": {"pin": {"propertyNames": {
             "enum": [k.name for k in keys]}}}}}
        for kind, keys in _PIN_KEYS.items()
    ]}


# The schema of a link's `pin` allows every gain; the rules above and the
# parser narrow it to the link's kind.
_LINK_PIN_KEYS = tuple({k.name: k for keys in _PIN_KEYS.values()
                        for k in keys}.values())

_LINK_KEYS = (
    _Key("from", _Name(), "the sending node (a sensor or an area)",
         required=True, fix="add `from: NODE`"),
    _Key("to", _Name(), "the receiving node", required=True,
         fix="add `to: NODE`"),
    _Key("kind", _Choice(LINK_KINDS),
         "prediction (area to area or sensor) or residual (sensor or area to "
         "area)", required=True, fix="add `kind: prediction` or "
                                     "`kind: residual`"),
    _Key("dim", _Int(1, MAX_TOTAL_DIM),
         "size of the signal; default: a prediction carries the receiver's "
         "size, a residual the sender's"),
    _Key("noise", _Matrix(), "channel-noise covariance (dim x dim)",
         default="zero"),
    _Key("price", _Real(0.0), "price per unit of power sent", default=0),
    _Key("delay", _Int(1, MAX_DELAY),
         "conduction delay in whole steps: the receiver uses at t+1 what was "
         "sent at t - delay + 1 (1: the next step, as every link without it)",
         default=1),
    _Key("pin", _Table(_LINK_PIN_KEYS),
         "gains fixed by hand: G and K on a prediction; S, P and K on a "
         "residual"),
)

_SELECTOR_KEYS = (
    _Key("from", _Name(), "every link out of this node"),
    _Key("to", _Name(), "every link into this node"),
)

_BUDGET_KEYS = (
    _Key("name", _Text(), "a unique name, used in reports", required=True,
         fix="add `name: ...`"),
    _Key("links", _Selector(),
         "`all`, a list of link ids (`A->B`), {from: NODE} or {to: NODE}",
         required=True, fix="add `links: all` or a list of link ids"),
    _Key("total", _Real(0.0), "the most the group may spend in total (with "
         "`each`: each of its parts); 0 switches its links off",
         required=True, fix="add `total: ...`"),
    _Key("costs", _LinkNumbers(),
         "link id -> what one unit of its power costs in this budget (a "
         "long-range link costs more); links not named cost 1"),
    _Key("caps", _LinkNumbers(),
         "link id -> the most power that link may send on its own"),
    _Key("activity", _MapOf(_Real(0.0), "weight"),
         "area -> weight of its activity E||z||^2 in this budget"),
    _Key("each", _Choice(("sender", "receiver")),
         "one budget per sending (or receiving) node over its selected "
         "links, named NAME[NODE], each with this total"),
)

_UNITS_KEYS = (
    _Key("step", _Real(0.0), "seconds one step lasts", required=True,
         fix="add `step: 0.01` (seconds per step)"),
    _Key("preset", _Choice(tuple(PRESETS)),
         "documented numbers to start from: " + ", ".join(PRESETS)
         + " (hierarchy/units.py names their sources)"),
    _Key("map", _Choice(MAPS),
         "how a link's signal becomes events: bits (its Gaussian channel "
         "capacity per step) or power (E||s||^2, a linear map)",
         default="bits"),
    _Key("event", _Text(),
         "what one event is, for reports (spike, bit, packet); default: the "
         "preset's, else `event`"),
    _Key("bits_per_event", _Real(0.0),
         "bits one event carries (map bits); default: the preset's, else 1"),
    _Key("power_per_event", _Real(0.0),
         "model power that makes one event per step (map power, required "
         "there)"),
    _Key("energy_per_event", _Real(0.0),
         "joules per event; default: the preset's (required without one)"),
    _Key("distance", _Real(0.0),
         f"metres between a radio link's ends (preset radio only); default "
         f"{RADIO_DISTANCE:g}"),
)

_TOP_KEYS = (
    _Key("spec", _Version(), "format version of this file", required=True,
         fix=f"add `spec: {SPEC_VERSION}` as the first line"),
    _Key("name", _Text(),
         "free-text name of the circuit; default: the file name without its "
         "extension"),
    _Key("world", _Table(_WORLD_KEYS), "the world the circuit observes",
         required=True, fix="add a `world:` section with `states:`"),
    _Key("sensors", _MapOf(_Table(_SENSOR_KEYS), "sensor", 1),
         "the sensors (a circuit needs at least one)", required=True,
         fix="add a `sensors:` section with at least one sensor"),
    _Key("areas", _MapOf(_Table(_AREA_KEYS), "area", 1),
         "the areas (a circuit needs at least one)", required=True,
         fix="add an `areas:` section with at least one area"),
    _Key("links", _ListOf(_Table(_LINK_KEYS, _link_pin_schema_rules()),
                          "{from: A, to: B, kind: residual}"),
         "the noisy channels between nodes; id `FROM->TO`", default=[]),
    _Key("budgets", _ListOf(_Table(_BUDGET_KEYS),
                            "{name: N, links: all, total: 1.0}"),
         "hard limits on the total power of groups of links", default=[]),
    _Key("units", _Table(_UNITS_KEYS),
         "physical units for reports: seconds per step and the energy of a "
         "link's signal; changes no computed number"),
)


def spec_schema() -> dict:
    """Return the JSON Schema (draft 2020-12) of spec files, version 1.

    The schema is generated from the key tables the parser uses, so it lists
    exactly the keys the parser accepts. It checks structure (keys, types,
    signs, matrix shorthand); rules that need the whole circuit (shapes,
    names, well-posedness) are checked only by :func:`parse_spec`.

    Returns
    -------
    dict
        The schema, ready for ``json.dump`` or ``jsonschema`` validation.

    Examples
    --------
    >>> schema = spec_schema()
    >>> schema["$schema"]
    'https://json-schema.org/draft/2020-12/schema'
    >>> schema["required"]
    ['spec', 'world', 'sensors', 'areas']
    """
    body = _Table(_TOP_KEYS).schema()
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": f"hierarchy circuit spec, version {SPEC_VERSION}",
        "description": "A multi-area predictive circuit: world, sensors, "
                       "areas, links and budgets.",
        **body,
        "$defs": {
            "name": {
                "type": "string", "pattern": _NAME_PATTERN,
                "description": "a name: not blank, without '->', '[', ']' "
                               "or '.'"},
            "matrix": {
                "description": "a matrix: a number s (s times the identity), "
                               "a flat list (the diagonal), a list of lists "
                               "(row by row), `identity` or `zero`",
                "anyOf": [
                    {"$ref": "#/$defs/entry"},
                    {"enum": list(_MATRIX_WORDS)},
                    {"type": "array", "minItems": 1,
                     "items": {"$ref": "#/$defs/entry"}},
                    {"type": "array", "minItems": 1,
                     "items": {"type": "array", "minItems": 1,
                               "items": {"$ref": "#/$defs/entry"}}},
                ]},
            "entry": {
                "type": "number", "minimum": -MAX_NUMBER, "maximum": MAX_NUMBER,
                "description": f"a matrix entry: a plain number, at most "
                               f"{MAX_NUMBER:g} in size"},
        },
    }


# --------------------------------------------------------------------------
# Checks shared by the sections
# --------------------------------------------------------------------------


def _known(at: _At, name, known, what: str) -> None:
    rules.check_known(name, known, what, at.place, at.line)


def _check_total(at: _At, sizes, what: str) -> None:
    """Refuse circuits too big to build, before any big matrix is made."""
    rules.check_total(sizes, what, at.place, at.line)


def _covariance(matrix: _Shorthand, n: int, why: str) -> np.ndarray:
    """Expand a covariance and check that it is symmetric and PSD."""
    return rules.check_covariance(matrix.expand(n, n, why), matrix.at.place, matrix.at.line)


def _expand_pins(pins: _Fields | None, shapes: dict) -> dict:
    """Expand the pinned gains given; ``shapes`` maps gain -> (rows, cols, why)."""
    if pins is None:
        return {}
    return {gain: frozen_array(pins.get(gain).expand(*shape))
            for gain, shape in shapes.items() if pins.given(gain)}


# --------------------------------------------------------------------------
# Sections
# --------------------------------------------------------------------------


def _parse_world(fields: _Fields) -> World:
    states = fields.get("states")
    dims = {name: _state_dim(f) for name, f in states}
    _check_total(fields.pos("states"), dims.values(),
                 "the sizes of the world's state blocks")
    world = World(tuple(_state_block(name, f, dims) for name, f in states))
    rules.check_world(world, fields.at.place, fields.at.line)
    return world


def _state_dim(f: _Fields) -> int:
    if f.given("dim"):
        return f.get("dim")
    for key in ("dynamics", "noise"):
        hint = f.get(key).size_hint()
        if hint is not None:
            return hint
    return 1


def _state_block(name: str, f: _Fields, dims: dict) -> StateBlock:
    n = dims[name]
    why = f"the state `{name}` has size {n}"
    driven = {}
    for other, matrix in f.get("driven_by") or ():
        _known(matrix.at, other, dims, "state")
        if other == name:
            matrix.at.fail("a block cannot be listed as driving itself",
                           fix="put the block's own dynamics under `dynamics`")
        driven[other] = frozen_array(matrix.expand(
            n, dims[other], f"rows: `{name}` has size {n}; columns: "
                            f"`{other}` has size {dims[other]}"))
    return StateBlock(
        name=name, dim=n,
        dynamics=frozen_array(f.get("dynamics").expand(n, n, why)),
        noise=frozen_array(_covariance(f.get("noise"), n, why)),
        driven_by=frozen_map(driven))


def _parse_sensors(pairs: list, at: _At, world: World) -> tuple:
    sizes = {b.name: b.dim for b in world.states}
    drafts = []
    for name, f in pairs:
        observes = f.get("observes")
        for state, matrix in observes:
            _known(matrix.at, state, sizes, "state")
        dim = f.get("dim") if f.given("dim") else _sensor_dim(name, f,
                                                              observes, sizes)
        drafts.append((name, f, observes, dim))
    _check_total(at, [dim for *_, dim in drafts], "the sensors' sizes")
    return tuple(_sensor(*draft, sizes) for draft in drafts)


def _sensor_dim(name: str, f: _Fields, observes: list, sizes: dict) -> int:
    """The first observed block that fixes its row count decides the size."""
    for state, matrix in observes:
        if matrix.form in ("full", "diagonal"):
            return len(matrix.value)
        if matrix.form in ("number", "identity"):
            return sizes[state]
    hint = f.get("noise").size_hint()
    if hint is None:
        f.at.fail(f"cannot tell the size of sensor `{name}`: its observed "
                  f"blocks are all `zero`", fix="add `dim: N`")
    return hint


def _sensor(name, f, observes, dim, sizes) -> Sensor:
    blocks = {
        state: frozen_array(matrix.expand(
            dim, sizes[state], f"rows: sensor `{name}` has size {dim}; "
                               f"columns: state `{state}` has size "
                               f"{sizes[state]}"))
        for state, matrix in observes}
    noise = _covariance(f.get("noise"), dim, f"sensor `{name}` has size {dim}")
    return Sensor(name=name, observes=frozen_map(blocks),
                  noise=frozen_array(noise))


def _parse_areas(pairs: list, at: _At, world: World, sensors: tuple) -> tuple:
    sizes = {b.name: b.dim for b in world.states}
    sensor_names = {s.name for s in sensors}
    drafts = [_area_draft(name, f, sizes, sensor_names) for name, f in pairs]
    _check_total(at, [dim for *_, dim in drafts], "the areas' sizes")
    areas = tuple(_area(*draft) for draft in drafts)
    # A lag L keeps L delayed copies of the whole world in the closed loop.
    deepest = max(areas, key=lambda a: a.lag)
    lag = next(f for name, f, *_ in drafts if name == deepest.name).pos("lag")
    rules.check_lag_depth(world.dim, deepest.lag, lag.place, lag.line)
    return areas


def _area_draft(name: str, f: _Fields, sizes: dict, sensor_names: set):
    if name in sensor_names:
        f.at.fail(f"`{name}` is already the name of a sensor; sensors and "
                  f"areas share one set of names", fix="rename one of them")
    tracks = f.get("tracks") or ()
    for state in tracks:
        _known(state, state.value, sizes, "state")
    tracked = sum(sizes[state.value] for state in tracks)
    if f.given("dim"):
        dim = f.get("dim")
    elif tracks:
        dim = tracked
    else:
        f.at.fail(f"area `{name}` tracks nothing, so its size must be given",
                  fix="add `dim: N` for a free relay, or `tracks: STATE`")
    tracks = tuple(state.value for state in tracks)
    # The size rule now, before the sections' totals; weight and lag in _area.
    rules.check_area(Area(name=name, dim=dim, tracks=tracks), sizes,
                     lambda key: (f.pos(key).place, f.pos(key).line))
    return name, f, tracks, dim


def _area(name: str, f: _Fields, tracks: tuple, dim: int) -> Area:
    weight = f.get("weight") if f.given("weight") else float(bool(tracks))
    lag = f.get("lag")
    sizes = {state: 0 for state in tracks}  # _area_draft checked the tracked size
    rules.check_area(Area(name=name, dim=dim, tracks=tracks, weight=weight, lag=lag), sizes,
                     lambda key: (f.pos(key).place, f.pos(key).line))
    pin = _expand_pins(f.get("pin"),
                       {"M": (dim, dim, f"area `{name}` has size {dim}")})
    return Area(name=name, dim=dim, tracks=tracks, weight=weight, lag=lag,
                activity_price=f.get("activity_price"), pin=frozen_map(pin),
                level=f.get("level") if f.given("level") else None)


@dataclass(frozen=True)
class _LinkDraft:
    """A link whose ends, kind and size are known; matrices come later."""

    fields: _Fields
    source: str
    target: str
    kind: str
    dim: int

    @property
    def id(self) -> str:
        return f"{self.source}->{self.target}"

    @property
    def label(self) -> str:
        return self.fields.at.place


def _link_label(item: _At) -> _At:
    """Name a link item by index and id, e.g. ``links[2] (low->high)``."""
    v = item.value
    if isinstance(v, dict) and isinstance(v.get("from"), str) \
            and isinstance(v.get("to"), str):
        return replace(item, place=f"{item.place} ({v['from']}->{v['to']})")
    return item


def _draft_links(items: list, node_dims: dict, sensor_names: set) -> list:
    drafts, seen = [], {}
    for item in items:
        draft = _link_draft(_link_label(item), node_dims, sensor_names)
        if draft.id in seen:
            draft.fields.at.fail(
                f"there is already a link {draft.id} ({seen[draft.id]}); at "
                f"most one link may join an ordered pair of nodes",
                fix="merge the two into one link (raise its dim for a wider "
                    "channel), or delete one")
        seen[draft.id] = draft.label
        drafts.append(draft)
    return drafts


def _link_draft(at: _At, node_dims: dict, sensor_names: set) -> _LinkDraft:
    f = _read_table(at, _LINK_KEYS)
    source, target, kind = f.get("from"), f.get("to"), f.get("kind")
    _known(f.pos("from"), source, node_dims, "sensor or area")
    _known(f.pos("to"), target, node_dims, "sensor or area")
    rules.check_link_ends(source, target, kind, sensor_names,
                          lambda key: (f.pos(key).place, f.pos(key).line))
    default_dim = node_dims[target] if kind == PREDICTION else node_dims[source]
    dim = f.get("dim") if f.given("dim") else default_dim
    return _LinkDraft(f, source, target, kind, dim)


def _link(draft: _LinkDraft, drafts_by_id: dict, node_dims: dict,
          sensor_names: set) -> Link:
    f = draft.fields
    noise = _covariance(f.get("noise"), draft.dim,
                        f"the link carries {draft.dim} numbers")
    pin = _link_pins(draft, drafts_by_id, node_dims, sensor_names)
    return Link(source=draft.source, target=draft.target, kind=draft.kind,
                dim=draft.dim, noise=frozen_array(noise), price=f.get("price"),
                pin=frozen_map(pin), delay=f.get("delay"))


def _parse_units(f: _Fields | None) -> Units | None:
    """The ``units:`` section: a preset's numbers, overridden by what the
    section states; every event count needs a positive size."""
    if f is None:
        return None
    step = f.get("step")
    if not step > 0:
        f.pos("step").fail("a step must last some time, got 0",
                           fix="give the step's duration in seconds, e.g. `step: 0.01`")
    preset = PRESETS.get(f.get("preset")) if f.given("preset") else None
    kind = f.get("map")
    wrong = "power_per_event" if kind == "bits" else "bits_per_event"
    if f.given(wrong):
        f.pos(wrong).fail(f"`{wrong}` does not apply to `map: {kind}`",
                          fix=f"remove `{wrong}`, or write `map: "
                              f"{'power' if kind == 'bits' else 'bits'}`")
    if f.given("distance") and (preset is None or preset.name != "radio"):
        f.pos("distance").fail("a distance applies only to the radio preset",
                               fix="remove `distance`, or write `preset: radio`")
    if kind == "bits":
        if f.given("bits_per_event"):
            per_event = f.get("bits_per_event")
        else:
            per_event = preset.bits_per_event if preset else 1.0
        size = "bits_per_event"
    else:
        if not f.given("power_per_event"):
            f.pos("power_per_event").fail(
                "`map: power` needs the model power that makes one event per step",
                fix="add `power_per_event: ...` (model units of power)")
        per_event, size = f.get("power_per_event"), "power_per_event"
    if not per_event > 0:
        f.pos(size).fail(f"`{size}` must be above 0, got 0",
                         fix=f"give how much one event is worth, e.g. `{size}: 1`")
    distance = None
    if f.given("energy_per_event"):
        if f.given("distance"):
            f.pos("distance").fail(
                "the distance sets the radio's energy per bit, and "
                "`energy_per_event` gives it too",
                fix="keep one of `distance` and `energy_per_event`")
        energy = f.get("energy_per_event")
    elif preset is None:
        f.pos("energy_per_event").fail(
            "without a preset the energy of one event must be given",
            fix="add `energy_per_event: ...` (joules), or `preset: "
                + " | ".join(PRESETS) + "`")
    elif preset.energy_per_event is None:  # radio: from the distance
        distance = f.get("distance") if f.given("distance") else RADIO_DISTANCE
        energy = radio_energy_per_bit(distance)
    else:
        energy = preset.energy_per_event
    event = f.get("event") if f.given("event") else (preset.event if preset else "event")
    return Units(step=step, map=kind, event=event.strip(), per_event=per_event,
                 energy_per_event=energy, preset=preset.name if preset else None,
                 distance=distance, sources=preset.sources if preset else ())


def _check_delay_states(drafts: list, links: tuple) -> None:
    """A link of delay k keeps k - 1 copies of its signal in the closed
    loop; refuse delays whose copies together pass the size limit."""
    by_id = {draft.id: draft for draft in drafts}
    rules.check_delay_states(links, lambda link: (by_id[link.id].fields.pos("delay").place,
                                                  by_id[link.id].fields.pos("delay").line))


def _link_pins(draft, drafts_by_id, node_dims, sensor_names) -> dict:
    f, dim = draft.fields, draft.dim
    if not f.given("pin"):
        return {}
    _check_pin_kind(f.pos("pin"), draft.kind)
    pins = _read_table(f.pos("pin"), _PIN_KEYS[draft.kind])
    src, dst = draft.source, draft.target
    sender = (dim, node_dims[src], f"rows: the link's dim {dim}; columns: "
                                   f"`{src}` has size {node_dims[src]}")
    pair = drafts_by_id.get(f"{dst}->{src}")
    paired = pair is not None and pair.kind == PREDICTION
    for gain in ("K", "P"):
        if pins.given(gain):
            pos = pins.pos(gain)
            rules.check_pin(draft.kind, gain, src, dst, sensor_names, paired, pos.place, pos.line)
    shapes = {}
    if draft.kind == PREDICTION:
        shapes["G"] = sender
    else:
        shapes["S"] = sender
        if paired:
            shapes["P"] = (dim, pair.dim, f"rows: the link's dim {dim}; "
                                          f"columns: the dim of {pair.id}, "
                                          f"{pair.dim}")
    if dst not in sensor_names:
        shapes["K"] = (node_dims[dst], dim, f"rows: `{dst}` has size "
                                            f"{node_dims[dst]}; columns: the "
                                            f"link's dim {dim}")
    return _expand_pins(pins, shapes)


def _check_pin_kind(at: _At, kind: str) -> None:
    """Say plainly when a gain of the other kind of link is pinned."""
    every_gain = {k.name for k in _LINK_PIN_KEYS}
    if not isinstance(at.value, dict):
        return  # _read_table reports it
    for gain in at.value:
        if gain in every_gain:  # the others are unknown keys, for _read_table
            pos = _child(at, gain)
            # The receiver rules (K, P) need the link's ends: _link_pins checks them.
            rules.check_pin(kind, gain, "", "", (), True, pos.place, pos.line)


def _parse_budgets(items: list, links: tuple, node_dims: dict, area_names=()) -> tuple:
    budgets, seen = [], {}
    for item in items:
        f = _read_table(item, _BUDGET_KEYS)
        name = f.get("name")
        if name in seen:
            f.pos("name").fail(f"there is already a budget called `{name}` "
                               f"({seen[name]})",
                               fix="give every budget its own name")
        seen[name] = item.place
        ids, selector = _select_links(f.pos("links"), f.get("links"), links,
                                      node_dims)
        total = f.get("total")
        costs = _link_numbers(f, "costs", ids)
        caps = _link_numbers(f, "caps", ids)
        activity = {}
        if f.given("activity"):
            for area, weight in f.get("activity"):
                _known(_child(f.pos("activity"), area), area, tuple(area_names), "area")
                activity[area] = weight
            if total == 0 and any(activity.values()):
                f.pos("activity").fail(
                    "a budget of total 0 cannot include activity: an area's "
                    "activity is never exactly zero while it works",
                    fix="give the budget a positive total, or move the activity "
                        "into its own budget")
        if not f.given("each"):
            budgets.append(Budget(name=name, links=ids, total=total,
                                  selector=selector, costs=costs, caps=caps,
                                  activity=activity))
            continue
        end = "source" if f.get("each") == "sender" else "target"
        by_node = {}
        for lid in ids:
            link = next(l for l in links if l.id == lid)
            by_node.setdefault(getattr(link, end), []).append(lid)
        for node, part in by_node.items():
            own = tuple(part)
            budgets.append(Budget(
                name=f"{name}[{node}]", links=own, total=total,
                selector=f"{selector}, {f.get('each')} {node}",
                costs={k: v for k, v in costs.items() if k in own},
                caps={k: v for k, v in caps.items() if k in own},
                activity={a: w for a, w in activity.items() if a == node}))
    names = [b.name for b in budgets]
    for b in budgets:
        if names.count(b.name) > 1:
            raise SpecError(f"two budgets are called `{b.name}`", place="budgets",
                            fix="rename a budget so that `each` does not repeat "
                                "another budget's name")
    return tuple(budgets)


def _link_numbers(f, key: str, ids: tuple) -> dict:
    """A budget's ``costs`` or ``caps``: every id must be one of its links."""
    if not f.given(key):
        return {}
    out = {}
    for lid, value, at in f.get(key):
        if lid not in ids:
            at.fail(f"the link {lid} is not in this budget",
                    fix=f"name one of the budget's links ({', '.join(ids[:4])}"
                        f"{', ...' if len(ids) > 4 else ''}) or add {lid} to "
                        f"`links`")
        out[lid] = value
    return out


def _select_links(at: _At, choice: tuple, links: tuple, node_dims: dict):
    """Resolve a budget's selector to link ids and a short description."""
    how, arg = choice
    all_ids = [link.id for link in links]
    if how == "all":
        ids, text = all_ids, "all"
    elif how == "ids":
        ids = []
        for pos in arg:
            _known(pos, pos.value, all_ids, "link")
            if pos.value in ids:
                pos.fail(f"the link {pos.value} is listed twice",
                         fix="list each link once")
            ids.append(pos.value)
        text = ", ".join(ids)
    else:
        _known(arg, arg.value, node_dims, "sensor or area")
        end = "source" if how == "from" else "target"
        ids = [link.id for link in links if getattr(link, end) == arg.value]
        text = f"{how} {arg.value}"
    if not ids:
        at.fail("this group selects no links",
                fix="name links that exist, or remove the budget")
    return tuple(ids), text


def _check_costs(drafts: list, links: tuple, budgets: tuple) -> None:
    """Every noisy link needs a cost, and every costed link needs noise
    (:func:`hierarchy.rules.check_costs`), named at its place in the file."""
    by_id = {draft.id: draft for draft in drafts}

    def where(link, key):
        pos = by_id[link.id].fields.pos(key) if key else by_id[link.id].fields.at
        return pos.place, pos.line

    rules.check_costs(links, budgets, where)


def _warnings(drafts: list, links: tuple, sensor_names: set) -> tuple:
    ids = {link.id for link in links}
    out = []
    for draft, link in zip(drafts, links):
        back = f"{link.target}->{link.source}"
        if link.target in sensor_names and back not in ids:
            out.append(f"{draft.label}: dead link: no residual goes from "
                       f"sensor `{link.target}` back to `{link.source}`, so "
                       f"this prediction is never used")
        for gain, value in link.pin.items():
            if not np.any(value):
                out.append(f"{draft.label}.pin.{gain}: the pinned gain is all "
                           f"zeros, so nothing passes through this link")
    return tuple(out)


#: What the tool's own output files are, and what to do with one given as a spec.
_OUTPUT_FILES = {
    "hierarchy-result": ("a result file (written by `hierarchy design --json` or `evaluate --json`)",
                         "give the spec the result came from; to draw or report the result use "
                         "`hierarchy render RESULT.json` or `hierarchy report RESULT.json -o report.html`"),
    "hierarchy-gains": ("a gains file (written by `hierarchy design --gains`)",
                        "give the spec as SPEC and this file with `--gains` (or `--start` for `design`)"),
}


def _flat_list_warnings(sensors: list) -> tuple:
    """A flat list under `observes` is a diagonal, so it makes a sensor as
    big as the state; when the sensor's size is not given, a one-row view
    written flat (`[0.8, 0.6]`) silently becomes a 2-dim sensor."""
    out = []
    for name, f in sensors:
        if f.given("dim"):
            continue
        for state, matrix in f.get("observes"):
            n = len(matrix.value) if matrix.form == "diagonal" else 0
            if n > 1:
                entries = ", ".join(f"{v:g}" for v in matrix.value)
                line = f" (line {matrix.at.line})" if matrix.at.line else ""
                out.append(f"{matrix.at.place}{line}: the flat list [{entries}] is read as a {n} x {n} "
                           f"diagonal, so sensor `{name}` reads {n} numbers; for one reading that mixes "
                           f"the state (a 1 x {n} row) write [[{entries}]]; to keep the diagonal and "
                           f"silence this warning, give `dim: {n}`")
    return tuple(out)


def _parse_document(root: _At, path) -> Spec:
    kind = root.value.get("format") if isinstance(root.value, dict) else None
    if isinstance(kind, str) and kind in _OUTPUT_FILES and "world" not in root.value:
        what, fix = _OUTPUT_FILES[kind]
        raise SpecError(f"this is {what}, not a spec", place=str(path) if path else "spec", fix=fix)
    top = _read_table(root, _TOP_KEYS)
    top.get("spec")
    world = _parse_world(top.get("world"))
    sensors = _parse_sensors(top.get("sensors"), top.pos("sensors"), world)
    areas = _parse_areas(top.get("areas"), top.pos("areas"), world, sensors)
    node_dims = {node.name: node.dim for node in sensors + areas}
    sensor_names = {s.name for s in sensors}
    drafts = _draft_links(top.get("links"), node_dims, sensor_names)
    _check_total(top.pos("links"), [d.dim for d in drafts], "the links' sizes")
    drafts_by_id = {d.id: d for d in drafts}
    links = tuple(_link(d, drafts_by_id, node_dims, sensor_names)
                  for d in drafts)
    _check_delay_states(drafts, links)
    budgets = _parse_budgets(top.get("budgets"), links, node_dims, [a.name for a in areas])
    _check_costs(drafts, links, budgets)
    default_name = Path(path).stem if path else "unnamed"
    return Spec(name=top.get("name") or default_name, world=world,
                sensors=sensors, areas=areas, links=links, budgets=budgets,
                version=SPEC_VERSION,
                warnings=_warnings(drafts, links, sensor_names)
                + _flat_list_warnings(top.get("sensors")),
                path=str(path) if path is not None else None,
                units=_parse_units(top.get("units")))


# --------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------


def parse_spec(text: str, path: str | None = None) -> Spec:
    """Parse the YAML text of a spec (version 1) into a checked :class:`Spec`.

    Parameters
    ----------
    text : str
        The YAML document.
    path : str, optional
        Where the text came from; used in messages and as the default name.

    Returns
    -------
    Spec
        The circuit, with every matrix expanded from its shorthand and every
        default filled in. Non-fatal findings are in ``spec.warnings``.

    Raises
    ------
    SpecError
        For anything malformed or ill-posed, with place, line and fix.

    Examples
    --------
    >>> spec = parse_spec('''
    ... spec: 1
    ... world: {states: {x: {dynamics: 0.9, noise: 1.0}}}
    ... sensors: {eye: {observes: {x: identity}, noise: 0.1}}
    ... areas: {v1: {tracks: x}}
    ... links: [{from: eye, to: v1, kind: residual}]
    ... ''')
    >>> spec.name, spec.areas[0].dim, spec.links[0].id
    ('unnamed', 1, 'eye->v1')
    """
    where = str(path) if path is not None else "<spec text>"
    return _parse_document(_read_yaml(text, where), path)


def load_spec(path) -> Spec:
    """Read a spec file (YAML, version 1) and parse it with :func:`parse_spec`.

    Parameters
    ----------
    path : str or os.PathLike
        The file to read (UTF-8).

    Returns
    -------
    Spec
        The checked circuit; its ``name`` defaults to the file's stem.

    Raises
    ------
    SpecError
        If the file cannot be read, or its content is not a valid spec.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "tiny.yaml"
    >>> _ = path.write_text('''
    ... spec: 1
    ... world: {states: {x: {dynamics: 0.5, noise: 1.0}}}
    ... sensors: {eye: {observes: {x: 1}}}
    ... areas: {v1: {tracks: x}}
    ... ''')
    >>> load_spec(path).name
    'tiny'
    """
    from .io import ReadRefused, read_text

    raw = os.fspath(path)  # as given: Path() would drop a trailing '/'
    path = Path(path)
    try:
        text = read_text(raw, MAX_DOCUMENT)
    except ReadRefused as err:
        if err.reason == "missing":
            raise SpecError("the spec file does not exist", place=str(path),
                            fix="check the path and the current folder") from None
        if err.reason == "folder":
            raise SpecError("this is a folder, not a spec file", place=str(path),
                            fix="give the path of a .yaml file") from None
        if err.reason == "too large":
            raise SpecError(f"the file is too large (more than {MAX_DOCUMENT:,} "
                            f"bytes)", place=str(path),
                            fix="a spec should be a few kilobytes") from None
        if err.reason == "not regular":
            raise SpecError(f"the spec is not a regular file ({err})", place=str(path),
                            fix="save the spec to a file and give its path") from None
        raise SpecError(f"the file cannot be read ({err})",
                        place=str(path),
                        fix="check that the file exists and is readable") from None
    except UnicodeDecodeError:
        raise SpecError("the file is not UTF-8 text", place=str(path),
                        fix="save the spec as UTF-8 text") from None
    return parse_spec(text, path=str(path))


def main(argv=None) -> int:
    """Print the spec JSON Schema, or write it to ``spec-v1.schema.json``.

    This is what ``python -m hierarchy.spec [--write-schema]`` runs.

    Parameters
    ----------
    argv : list of str, optional
        Command-line arguments (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        The exit status, 0.

    Examples
    --------
    >>> main([])  # doctest: +ELLIPSIS
    {
      "$schema": "https://json-schema.org/draft/2020-12/schema",
    ...
    0
    """
    parser = argparse.ArgumentParser(
        prog="python -m hierarchy.spec",
        description="Print the JSON Schema of spec files (version "
                    f"{SPEC_VERSION}).")
    parser.add_argument("--write-schema", action="store_true",
                        help=f"write it to {SCHEMA_PATH} instead")
    args = parser.parse_args(argv)
    text = json.dumps(spec_schema(), indent=2, ensure_ascii=False) + "\n"
    if args.write_schema:
        atomic_write_text(SCHEMA_PATH, text)
        print(f"wrote {SCHEMA_PATH}")
    else:
        sys.stdout.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
