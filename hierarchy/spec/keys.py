"""Key tables, one per section (the single source of truth), and the JSON Schema built from them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from hierarchy.spec.model import LINK_KINDS, PREDICTION, RESIDUAL
from hierarchy.spec.rules import MAX_DELAY, MAX_LAG, MAX_LEVEL, MAX_NUMBER, MAX_TOTAL_DIM
from hierarchy.spec.kinds import (
    _MATRIX_WORDS,
    _NAME_PATTERN,
    SPEC_VERSION,
    _Choice,
    _Int,
    _Key,
    _Kind,
    _LinkNumbers,
    _ListOf,
    _MapOf,
    _Matrix,
    _Name,
    _Names,
    _read_table,
    _Real,
    _Table,
    _Text,
    _Version,
)
from hierarchy.spec.positions import _describe, _items
from hierarchy.spec.units import MAPS, PRESETS, RADIO_DISTANCE

__all__ = ['SCHEMA_PATH', 'spec_schema']


SCHEMA_PATH = Path(__file__).with_name("spec-v1.schema.json")


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
