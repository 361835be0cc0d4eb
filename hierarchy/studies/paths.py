"""Value paths (``links[a->b].price``) and the grids a study sweeps them over.
"""

from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass, replace

import numpy as np

from hierarchy.spec import rules
from hierarchy.errors import InputError
from hierarchy.spec.model import Spec, World, frozen_array

__all__ = ['MAX_POINTS', 'ValuePath', 'settable_paths', 'parse_path', 'set_value', 'grid', 'parse_range']


#: Largest number of points in one study.
MAX_POINTS = 100_000
_SECTIONS = {
    "links": ("price", "noise"),
    "budgets": ("total",),
    "areas": ("weight", "activity_price"),
    "sensors": ("noise",),
    "world.states": ("dynamics", "noise"),
}
_PATH = re.compile(r"^(?P<section>[A-Za-z_.]+)\[(?P<name>[^\[\]]+)\]\.(?P<field>[A-Za-z_]+)$")


@dataclass(frozen=True)
class ValuePath:
    """A settable number of a spec, e.g. ``links[low->high].price``, or a
    group of them (``links[kind:prediction].price``): ``members`` are the
    names the path sets (one for a plain path)."""

    section: str
    name: str
    field: str
    members: tuple = ()

    def __str__(self) -> str:
        return f"{self.section}[{self.name}].{self.field}"

    @property
    def grouped(self) -> bool:
        """Whether the path names a group rather than one place."""
        return self.members != (self.name,)


#: Group selectors a path may hold in place of a name (besides ``*``).
_SELECTORS = {"links": ("kind", "from", "to")}


def _group(spec: Spec, section: str, name: str, text: str):
    """The names a group selector picks, or ``None`` when ``name`` is not a
    selector. Raises :class:`InputError` for a selector that picks nothing."""
    if name == "*":
        found = _names(spec, section)
    else:
        key, colon, value = name.partition(":")
        if not colon or key not in _SELECTORS.get(section, ()):
            return None
        if key == "kind":
            from hierarchy.spec.model import LINK_KINDS

            if value not in LINK_KINDS:
                raise InputError(f"there is no link kind `{value}`{_close(value, LINK_KINDS)}", place=text,
                                 fix="write kind:prediction or kind:residual")
        attr = {"kind": "kind", "from": "source", "to": "target"}[key]
        found = [l.id for l in spec.links if getattr(l, attr) == value]
    if not found:
        raise InputError(f"the group `{name}` selects nothing in this spec", place=text,
                         fix="choose a group that holds at least one " + {
                             "links": "link", "budgets": "budget", "areas": "area", "sensors": "sensor",
                             "world.states": "state block"}[section])
    return tuple(found)


def _names(spec: Spec, section: str) -> list:
    return {
        "links": lambda: [l.id for l in spec.links],
        "budgets": lambda: [b.name for b in spec.budgets],
        "areas": lambda: [a.name for a in spec.areas],
        "sensors": lambda: [s.name for s in spec.sensors],
        "world.states": lambda: list(spec.world.names),
    }[section]()


def settable_paths(spec: Spec) -> list:
    """Every path :func:`set_value` accepts for ``spec``.

    Examples
    --------
    >>> settable_paths(spec)[:2]                                    # doctest: +SKIP
    ['links[thermometer->estimate].price', 'links[thermometer->estimate].noise']
    """
    return [f"{section}[{name}].{f}" for section, fs in _SECTIONS.items()
            for name in _names(spec, section) for f in fs]


def _choices(items, limit=12) -> str:
    items = list(items)
    text = ", ".join(items[:limit])
    return text + (f", ... ({len(items)} in all)" if len(items) > limit else "")


def _close(word, known) -> str:
    near = difflib.get_close_matches(word, list(known), n=1)
    return f" (did you mean `{near[0]}`?)" if near else ""


def _undotted(spec: Spec, text: str) -> str:
    """The shell-safe form, ``links.low:high.price`` or ``areas.top.weight``,
    in brackets (names never hold a dot); other text is returned as it is."""
    for section in sorted(_SECTIONS, key=len, reverse=True):
        name, dot, fld = text[len(section) + 1:].rpartition(".")
        if text.startswith(section + ".") and dot and name and "[" not in text:
            ids = [l.id for l in spec.links if f"{l.source}:{l.target}" == name] if section == "links" else []
            return f"{section}[{ids[0] if len(ids) == 1 else name}].{fld}"
    return text


def parse_path(spec: Spec, text) -> ValuePath:
    """Read a value path and check that it names something in ``spec``.

    Raises
    ------
    InputError
        Naming the path, with the valid choices in the fix.

    Examples
    --------
    >>> parse_path(spec, "links[low->high].price")                 # doctest: +SKIP
    ValuePath(section='links', name='low->high', field='price')
    >>> parse_path(spec, "links.low:high.price")    # the same, safe in a shell unquoted   # doctest: +SKIP
    ValuePath(section='links', name='low->high', field='price')
    """
    if isinstance(text, ValuePath):
        text = str(text)
    m = _PATH.match(_undotted(spec, str(text).strip()))
    if m is None:
        if str(text).strip().endswith("-") and "]" not in str(text):
            raise InputError("this path looks cut at `-`: the shell may have read the `>` of `->` as a "
                             "redirection (and written a file named after the rest)", place=str(text),
                             fix="quote the path, e.g. 'links[low->high].price', or write it with no shell "
                                 "characters: links.low:high.price")
        raise InputError("cannot read this value path", place=str(text),
                         fix="write SECTION[NAME].FIELD, e.g. " + _choices(settable_paths(spec), 4))
    section, name, fld = m.group("section"), m.group("name"), m.group("field")
    if section not in _SECTIONS:
        raise InputError(f"there is no section `{section}` to vary{_close(section, _SECTIONS)}",
                         place=str(text), fix="sections: " + ", ".join(_SECTIONS))
    names = _names(spec, section)
    members = (name,) if name in names else _group(spec, section, name, str(text))
    if members is None:
        what = {"links": "link", "budgets": "budget", "areas": "area", "sensors": "sensor",
                "world.states": "state block"}[section]
        raise InputError(f"this spec has no {what} `{name}`{_close(name, names)}", place=str(text),
                         fix=(f"choose one of: {_choices(names)}; or a group: "
                              + ", ".join(("*",) + tuple(f"{k}:..." for k in _SELECTORS.get(section, ()))))
                         if names else f"the spec has no {what}s")
    if fld not in _SECTIONS[section]:
        raise InputError(f"`{section}[{name}]` has no settable value `{fld}`{_close(fld, _SECTIONS[section])}",
                         place=str(text), fix="settable here: " + ", ".join(_SECTIONS[section]))
    return ValuePath(section, name, fld, members)


def _world_with(world: World, name: str, **changes) -> World:
    return World(tuple(replace(b, **changes) if b.name == name else b for b in world.states))


def set_value(spec: Spec, path, value) -> Spec:
    """A copy of ``spec`` with the value at ``path`` set to ``value``, checked
    for well-posedness.

    A noise or a dynamics block is set to ``value`` times the identity.

    Raises
    ------
    InputError
        For a bad path, a value out of range, or a circuit that the value
        makes ill-posed (the message names the path and the value).

    Examples
    --------
    >>> cheap = set_value(spec, "links[low->high].price", 0.01)     # doctest: +SKIP
    """
    p = parse_path(spec, path)
    out = spec
    v = _number(value, p)
    members = p.members
    if p.grouped and p.section == "areas" and p.field == "weight":
        members = [a for a in members if spec.area(a).has_target]  # a relay has no error to weigh
    for member in members:
        out = _set_one(out, ValuePath(p.section, member, p.field, (member,)), v)
    rules.check_spec(out, place=f"{p} = {v:.12g}", error=InputError)
    return out


def _number(value, p) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"the value {value!r} is not a number", place=str(p), fix="give a plain number") from None
    if not math.isfinite(v):
        raise InputError(f"the value {v} is not finite", place=str(p), fix="give a finite number")
    if v < 0 and p.field != "dynamics":
        raise InputError(f"{p.field} must be at least 0; got {v:g}", place=str(p),
                         fix="keep the range at or above 0")
    return v


def _set_one(spec: Spec, p: ValuePath, v: float) -> Spec:
    """``spec`` with the one place ``p`` set to ``v`` (not yet checked)."""
    if p.section == "links":
        link = spec.link(p.name)
        new = frozen_array(v * np.eye(link.dim)) if p.field == "noise" else v
        links = tuple(replace(l, **{p.field: new}) if l.id == p.name else l for l in spec.links)
        out = replace(spec, links=links)
    elif p.section == "budgets":
        out = replace(spec, budgets=tuple(replace(b, total=v) if b.name == p.name else b for b in spec.budgets))
    elif p.section == "areas":  # a relay's weight is refused by rules.check_area
        out = replace(spec, areas=tuple(replace(a, **{p.field: v}) if a.name == p.name else a
                                        for a in spec.areas))
    elif p.section == "sensors":
        dim = spec.sensor(p.name).dim
        out = replace(spec, sensors=tuple(replace(s, noise=frozen_array(v * np.eye(dim))) if s.name == p.name
                                          else s for s in spec.sensors))
    else:
        block = next(b for b in spec.world.states if b.name == p.name)
        out = replace(spec, world=_world_with(spec.world, p.name,
                                              **{p.field: frozen_array(v * np.eye(block.dim))}))
    return out


def grid(lo, hi, n, log=False) -> np.ndarray:
    """``n`` values from ``lo`` to ``hi``, evenly spaced or (``log``) evenly
    spaced in logarithm.

    Examples
    --------
    >>> grid(0.01, 1, 3, log=True).tolist()
    [0.01, 0.1, 1.0]
    """
    lo, hi, n = float(lo), float(hi), int(n)
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise InputError("the range ends must be finite numbers", place="range", fix="give finite numbers")
    if n < 1 or n > MAX_POINTS:
        raise InputError(f"the number of points must be between 1 and {MAX_POINTS}; got {n}",
                         place="points", fix="give a number of points such as 20")
    if n == 1:
        return np.array([lo])
    if log:
        if lo <= 0 or hi <= 0:
            raise InputError(f"a log grid needs both ends above 0; got {lo:g} and {hi:g}", place="range",
                             fix="start the range above 0, or leave out --log")
        out = np.geomspace(lo, hi, n)
    else:
        out = np.linspace(lo, hi, n)
    out[0], out[-1] = lo, hi  # exact ends: the values a user typed
    return out


def parse_range(text, place="range"):
    """Read ``LO:HI:N`` (``N`` points from ``LO`` to ``HI``).

    Examples
    --------
    >>> parse_range("0.1:10:5")
    (0.1, 10.0, 5)
    """
    parts = str(text).split(":")
    try:
        if len(parts) != 3:
            raise ValueError
        return float(parts[0]), float(parts[1]), int(parts[2])
    except ValueError:
        raise InputError(f"cannot read the range `{text}`", place=place,
                         fix="write LO:HI:N, e.g. 0.1:10:8 for 8 points from 0.1 to 10") from None
