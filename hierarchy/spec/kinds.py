"""Value kinds: each checks one value of the file and describes itself in JSON Schema.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, replace

import numpy as np

from hierarchy.spec import rules
from hierarchy.spec.rules import MAX_NUMBER
from hierarchy.spec.rules import suggest as _suggest
from hierarchy.spec.positions import _At, _child, _describe, _items, _join, _plural

__all__ = ['SPEC_VERSION']


SPEC_VERSION = 1
# A name appears inside places (``areas.NAME.lag``) and link ids (``A->B``), so
# it must not contain the characters that build those.
_NAME_PATTERN = r"^(?!\s*$)(?![\s\S]*->)[^\[\].\x00-\x1f\x7f-\x9f\u2028\u2029]+$"
_MATRIX_WORDS = ("identity", "zero")


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
