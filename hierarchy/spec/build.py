"""Sections: from checked tables to the typed model (world, sensors, areas, links, budgets).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from hierarchy.spec import rules
from hierarchy.errors import SpecError
from hierarchy.spec.model import (
    PREDICTION,
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
from hierarchy.spec.checks import _check_total, _covariance, _expand_pins, _known
from hierarchy.spec.keys import _BUDGET_KEYS, _LINK_KEYS, _LINK_PIN_KEYS, _PIN_KEYS, _TOP_KEYS
from hierarchy.spec.kinds import SPEC_VERSION, _Fields, _read_table
from hierarchy.spec.positions import _At, _child
from hierarchy.spec.units import PRESETS, RADIO_DISTANCE, Units, radio_energy_per_bit

__all__ = []


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
    (:func:`hierarchy.spec.rules.check_costs`), named at its place in the file."""
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
