"""An area graph imported as a spec skeleton.

A directed graph of areas (GraphML, GML, or an edge-list CSV, all read with
NetworkX's readers) becomes a spec that ``hierarchy check`` accepts and that
the user then edits:

* **which edge is which.** An edge's ``kind`` (also read from ``direction``,
  ``type`` or ``label``) says feedforward (``feedforward``, ``ff``, ``up``,
  ``bottom-up``, ``ascending``, ``residual``), feedback (``feedback``,
  ``fb``, ``down``, ``top-down``, ``descending``, ``prediction``) or
  ``lateral``. Without a label, the nodes' ``level`` attributes decide: an
  edge up the levels is feedforward, down is feedback, along a level lateral.
  Feedforward and lateral edges become residual links (residuals go up),
  feedback edges prediction links (predictions come down).
* **names.** A node is named by its ``label`` (or ``name``) attribute when
  every node has one, as graph editors write them; else by its id.
* **sensors.** A node whose ``role`` is ``sensor``, or whose ``level`` is 0;
  failing both, every node that no feedforward edge enters (``--sensors``
  names them instead). Levels of areas are written as ``level:``: the given
  ones, else the length of the shortest chain of feedforward edges from a
  sensor (the rule ``hierarchy check`` uses).
* **costs from distances and weights.** An edge's ``distance`` (any unit, e.g.
  millimetres of axon) sets its price: ``price = base price x distance /
  mean distance``, so a link twice as long as the average costs twice as much
  per unit of power (the energy of a spike grows with the length of axon it
  travels). An edge's ``weight`` (a connection strength, e.g. the fraction of
  labelled neurons) sets its channel noise: ``noise = base noise x mean weight
  / weight``: a projection with twice the fibres averages twice as many
  independent noisy fibres, halving the noise variance. Edges without one of
  them take the base value. With ``--budget TOTAL`` every link also joins one
  budget ``total``.
* **the world and sensors skeleton.** One world block per sensor
  (``SENSOR-input``, dim 1, dynamics 0.9, noise 0.1) and a slow shared cause
  ``common`` (dynamics 0.95, noise 0.05) that drives every sensor's block by
  0.3; each sensor reads its block with noise 0.05. An area on the top level
  (of two or more) tracks ``common``; any other area tracks the blocks of the
  sensors that reach it through feedforward edges. These numbers are placeholders: edit them (or
  fit the world from a recording with ``hierarchy fit-world``).

Examples
--------
>>> text = import_graph("specs/graphs/two-senses-areas.graphml")
>>> from hierarchy.spec import parse_spec
>>> parse_spec(text).name
'two senses, six areas'
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from hierarchy.errors import InputError

__all__ = ["AreaGraph", "read_area_graph", "skeleton", "skeleton_yaml", "import_graph", "write_skeleton",
           "FEEDFORWARD", "FEEDBACK", "LATERAL"]

FEEDFORWARD, FEEDBACK, LATERAL = "feedforward", "feedback", "lateral"
_KIND_WORDS = {
    FEEDFORWARD: ("feedforward", "feed-forward", "ff", "up", "bottom-up", "bottomup", "ascending", "residual"),
    FEEDBACK: ("feedback", "feed-back", "fb", "down", "top-down", "topdown", "descending", "prediction"),
    LATERAL: ("lateral", "horizontal", "same"),
}
_WORD_KIND = {w: k for k, ws in _KIND_WORDS.items() for w in ws}
_KIND_KEYS = ("kind", "direction", "type", "label")
#: Largest graph file read (bytes).
MAX_FILE = 20_000_000
#: Placeholder numbers of the skeleton (edit them in the written spec).
SENSOR_DYNAMICS, SENSOR_NOISE, COMMON_DYNAMICS, COMMON_NOISE, DRIVE, READ_NOISE = 0.9, 0.1, 0.95, 0.05, 0.3, 0.05
COMMON = "common"


def _bad(place, message, fix):
    raise InputError(message, place=place, fix=fix)


@dataclass(frozen=True)
class AreaGraph:
    """An imported graph: ``edges`` maps ``(source, target)`` to ``(kind,
    distance, weight)`` (``None`` when absent); ``levels`` maps every node
    to its level (sensors 0)."""

    name: str
    nodes: tuple
    sensors: tuple
    levels: dict
    edges: dict
    path: str = "graph"


def _read(path: str):
    import networkx as nx

    from hierarchy.io import ReadRefused, read_bytes

    try:
        raw = read_bytes(path, MAX_FILE)
    except ReadRefused as exc:
        _bad(path, f"cannot read the graph: {exc}", "give the path of a .graphml, .gml or .csv file")
    ext = os.path.splitext(path)[1].lower()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        _bad(path, "the file is not UTF-8 text", "save the graph as UTF-8 GraphML, GML or CSV")
    try:
        if ext == ".graphml":
            return nx.parse_graphml(text)
        if ext == ".gml":
            return nx.parse_gml(text)
        if ext in (".csv", ".tsv", ".edgelist", ".txt"):
            return _parse_edge_csv(path, text, "\t" if ext == ".tsv" else ",")
    except InputError:
        raise
    except Exception as exc:  # NetworkX's readers raise many kinds (XML, GML, value errors)
        _bad(path, f"NetworkX could not read this file ({exc.__class__.__name__}: "
                   f"{' '.join(str(exc).split())[:200]})", "check the file's format, or export it again")
    _bad(path, f"cannot tell the format from the extension `{ext or '(none)'}`",
         "name the file *.graphml, *.gml or *.csv (an edge list with a header row)")


def _parse_edge_csv(path, text, delimiter):
    """An edge list with a header row: ``source,target[,attribute...]``, read
    with :func:`networkx.parse_edgelist` (one edge a line)."""
    import networkx as nx

    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        _bad(path, "the edge list is empty", "write a header row `source,target,kind,distance` and one edge a line")
    header = [h.strip() for h in lines[0].split(delimiter)]
    if len(header) < 2:
        _bad(f"{path}: header", "the header names fewer than two columns",
             "start the file with a header row such as `source,target,kind,distance`")
    for n, ln in enumerate(lines[1:], start=2):
        if len(ln.split(delimiter)) != len(header):
            _bad(f"{path}: edge line {n}", f"this edge has {len(ln.split(delimiter))} field(s) but the header names "
                                           f"{len(header)}", "give every edge one field per column (leave a field "
                                                             "empty for no value)")
    return nx.parse_edgelist(lines[1:], delimiter=delimiter, create_using=nx.DiGraph, nodetype=str,
                             data=[(h, str) for h in header[2:]])


def _check_name(name, path):
    name = str(name)
    if not name.strip() or any(f in name for f in ("->", "[", "]", ".")):
        _bad(f"{path}: node `{name}`", "this node's name cannot name a sensor or area (names are not blank and "
                                       "hold no `->`, `[`, `]` or `.`)", "rename the node in the graph file")
    return name


def _number(value, place, what):
    if value is None or (isinstance(value, str) and not value.strip()):
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        _bad(place, f"the {what} `{value}` is not a number", f"give the {what} as a number, or leave it out")
    if not (np.isfinite(v) and v > 0):
        _bad(place, f"the {what} must be a finite number above 0; got {v:g}",
             f"give a positive {what}, or leave it out")
    return v


def read_area_graph(path, sensors=None) -> AreaGraph:
    """Read a directed area graph and classify its nodes and edges (see the
    module docstring).

    Raises
    ------
    InputError
        For an unreadable file, an undirected graph or one with repeated
        edges, an unknown edge label, an edge whose kind cannot be told,
        a feedback edge out of a sensor or a feedforward edge into one, a
        bad level, distance or weight. Each names the node or edge.
    """
    import networkx as nx

    path = os.fspath(path)
    g = _read(path)
    if not g.is_directed():
        _bad(path, "the graph is undirected, but the direction of each connection decides what it carries",
             "write a directed graph (GraphML: edgedefault=\"directed\"; GML: `directed 1`)")
    if g.is_multigraph():
        if any(g.number_of_edges(u, v) > 1 for u, v in set(g.edges())):
            u, v = next((u, v) for u, v in g.edges() if g.number_of_edges(u, v) > 1)
            _bad(f"{path}: edge {u}->{v}", "two edges join the same ordered pair of nodes; a spec has at most one "
                                           "link per pair", "merge them into one edge")
        g = nx.DiGraph(g)
    if g.number_of_nodes() == 0:
        _bad(path, "the graph has no nodes", "give a graph with sensors and areas")
    # Editors that write GraphML give nodes ids such as n0 and put the name in `label` (or `name`).
    shown = {n: d.get("label", d.get("name")) for n, d in g.nodes(data=True)}
    if all(isinstance(v, str) and v.strip() for v in shown.values()):
        seen = {}
        for n, v in shown.items():
            if v in seen:
                _bad(f"{path}: node `{n}`", f"two nodes (`{seen[v]}` and `{n}`) are both labelled `{v}`",
                     "give every node its own label")
            seen[v] = n
        g = nx.relabel_nodes(g, shown)
    for u, v in g.edges():
        if u == v:
            _bad(f"{path}: edge {u}->{u}", "an edge from a node to itself; an area's own memory is its M gain, "
                                           "not a link", "remove the self-loop")
    names = {n: _check_name(n, path) for n in g.nodes()}
    given = {}
    for n, d in g.nodes(data=True):
        if "level" in d:
            lv = d["level"]
            try:
                ok = float(lv) == int(float(lv)) and int(float(lv)) >= 0
            except (TypeError, ValueError):
                ok = False
            if not ok:
                _bad(f"{path}: node `{n}`.level", f"a level is a whole number, 0 for a sensor; got `{lv}`",
                     "give the node a level 0, 1, 2, ...")
            given[n] = int(float(lv))
    kinds = {}
    for u, v, d in g.edges(data=True):
        label = next((d[k] for k in _KIND_KEYS if k in d and str(d[k]).strip()), None)
        place = f"{path}: edge {u}->{v}"
        if label is not None:
            kind = _WORD_KIND.get(str(label).strip().lower())
            if kind is None:
                _bad(place, f"the label `{label}` is not a kind of connection",
                     "label it feedforward (ff, up), feedback (fb, down) or lateral")
        elif u in given and v in given:
            kind = FEEDFORWARD if given[u] < given[v] else FEEDBACK if given[u] > given[v] else LATERAL
        else:
            _bad(place, "cannot tell whether this edge is feedforward or feedback: it has no `kind` label and "
                        "its ends have no `level`", "label the edge (kind: feedforward / feedback / lateral) or "
                                                    "give every node a level")
        kinds[(u, v)] = kind
    if sensors:
        sensor_set = set(sensors)
        for s in sensor_set:
            if s not in g:
                _bad(f"--sensors {s}", f"the graph has no node `{s}`", "name nodes of the graph")
    else:
        roles = {n for n, d in g.nodes(data=True) if str(d.get("role", "")).lower() == "sensor"}
        sensor_set = roles or {n for n, lv in given.items() if lv == 0}
        if not sensor_set:
            entered = {v for (u, v), k in kinds.items() if k == FEEDFORWARD}
            sensor_set = {n for n in g.nodes() if n not in entered}
    if not sensor_set:
        _bad(path, "no node is a sensor: every node receives a feedforward edge",
             "give the sensors `role: sensor` or `level: 0`, or name them with --sensors")
    for (u, v), k in kinds.items():
        if u in sensor_set and k == FEEDBACK:
            _bad(f"{path}: edge {u}->{v}", f"a feedback edge out of the sensor `{u}`: a sensor sends only what it "
                                           "reads", "turn the edge round, or label it feedforward")
        if v in sensor_set:
            if k != FEEDBACK:
                _bad(f"{path}: edge {u}->{v}", f"a {k} edge into the sensor `{v}`: residuals go up, from a sensor "
                                               "or area to an area", "label it feedback (a prediction of the "
                                                                    "sensor's reading), or remove it")
    for n in sensor_set:
        if n in given and given[n] != 0:
            _bad(f"{path}: node `{n}`.level", f"the sensor `{n}` has level {given[n]}; sensors sit at level 0",
                 "give sensors level 0, or do not make this node a sensor")
    # Levels: given, else the shortest chain of feedforward edges from a sensor or a node with a given level.
    ff = nx.DiGraph([e for e, k in kinds.items() if k == FEEDFORWARD])
    levels = {n: 0 for n in sensor_set}
    levels.update({n: lv for n, lv in given.items() if n not in sensor_set})
    frontier = sorted(levels, key=lambda n: levels[n])
    for src in frontier:
        if src not in ff:
            continue
        for n, hops in nx.single_source_shortest_path_length(ff, src).items():
            if n not in given and n not in sensor_set:
                levels[n] = min(levels.get(n, 10 ** 9), levels[src] + hops)
    for n in g.nodes():
        if n not in levels:
            levels[n] = 1 + max([levels[u] for u, v in kinds if v == n and u in levels] or [0])
    for n in g.nodes():
        if n not in sensor_set and levels[n] < 1:
            _bad(f"{path}: node `{n}`.level", f"the area `{n}` has level {levels[n]}; level 0 is for sensors",
                 "give areas a level of 1 or more")
    edges = {}
    for (u, v), k in kinds.items():
        d = g.edges[u, v]
        place = f"{path}: edge {u}->{v}"
        edges[(names[u], names[v])] = (k, _number(d.get("distance"), place + ".distance", "distance"),
                                       _number(d.get("weight"), place + ".weight", "weight"))
    name = str(g.graph.get("name") or os.path.splitext(os.path.basename(path))[0])
    return AreaGraph(name, tuple(names[n] for n in g.nodes()), tuple(names[n] for n in g.nodes() if n in sensor_set),
                     {names[n]: lv for n, lv in levels.items()}, edges, path)


def skeleton(graph: AreaGraph, *, price=0.05, noise=0.02, budget=None) -> dict:
    """The spec skeleton of ``graph`` as plain data (see the module docstring).

    Parameters
    ----------
    price : float
        Base price of a link (the price of a link of mean distance).
    noise : float
        Base channel noise (that of a link of mean weight).
    budget : float, optional
        A total: every link joins one budget ``total`` of this size.

    Raises
    ------
    InputError
        When the links would have noise but neither a price nor a budget.
    """
    if price < 0 or noise < 0 or (budget is not None and budget < 0):
        _bad("--price/--noise/--budget", "prices, noises and budgets are at least 0", "give numbers of 0 or more")
    if noise > 0 and price == 0 and budget is None:
        _bad("--price", "noisy links with price 0 and no budget have no best design (louder is free)",
             "give --price above 0, or a --budget")
    sensors = list(graph.sensors)
    areas = [n for n in graph.nodes if n not in sensors]
    if not areas:
        _bad(graph.path, "the graph has no area: every node is a sensor", "add the areas the sensors report to")
    blocks = {s: f"{s}-input" for s in sensors}  # (state names live apart from node names)
    ff = {}
    for (u, v), (k, _, _) in graph.edges.items():
        if k == FEEDFORWARD:
            ff.setdefault(u, []).append(v)
    reach = {}
    for s in sensors:
        seen, stack = {s}, [s]
        while stack:
            for v in ff.get(stack.pop(), []):
                if v not in seen:
                    seen.add(v)
                    stack.append(v)
        for n in seen:
            reach.setdefault(n, []).append(s)
    top = max(graph.levels[a] for a in areas)
    world = {COMMON: {"dim": 1, "dynamics": COMMON_DYNAMICS, "noise": COMMON_NOISE}}
    for s in sensors:
        world[blocks[s]] = {"dim": 1, "dynamics": SENSOR_DYNAMICS, "noise": SENSOR_NOISE,
                            "driven_by": {COMMON: [[DRIVE]]}}
    out_sensors = {s: {"observes": {blocks[s]: "identity"}, "noise": READ_NOISE} for s in sensors}
    out_areas = {}
    for a in areas:
        if graph.levels[a] == top and top > 1:
            tracks = [COMMON]
        else:
            tracks = [blocks[s] for s in sensors if s in reach.get(a, [])] or [COMMON]
        out_areas[a] = {"tracks": tracks[0] if len(tracks) == 1 else tracks, "level": int(graph.levels[a])}
    dists = [d for _, d, _ in graph.edges.values() if d is not None]
    weights = [w for _, _, w in graph.edges.values() if w is not None]
    mean_d = float(np.mean(dists)) if dists else None
    mean_w = float(np.mean(weights)) if weights else None
    links = []
    for (u, v), (k, d, w) in graph.edges.items():
        link = {"from": u, "to": v, "kind": "prediction" if k == FEEDBACK else "residual",
                "noise": float(noise * mean_w / w) if w is not None else float(noise)}
        p = price * d / mean_d if d is not None else price
        if p:
            link["price"] = float(p)
        links.append(link)
    spec = {"spec": 1, "name": graph.name, "world": {"states": world}, "sensors": out_sensors, "areas": out_areas,
            "links": links}
    if budget is not None:
        spec["budgets"] = [{"name": "total", "links": "all", "total": float(budget)}]
    return spec


def skeleton_yaml(graph: AreaGraph, **kw) -> str:
    """:func:`skeleton` as YAML, with a header comment on where it came from
    and what to edit."""
    import yaml

    data = skeleton(graph, **kw)
    counts = {}
    for k, _, _ in graph.edges.values():
        counts[k] = counts.get(k, 0) + 1
    head = [f"# spec skeleton imported by `hierarchy import-graph` from {os.path.basename(graph.path)}",
            f"# {len(graph.sensors)} sensor(s), {len(graph.nodes) - len(graph.sensors)} area(s); "
            + ", ".join(f"{v} {k}" for k, v in sorted(counts.items())) + " edge(s)",
            "# feedforward and lateral edges are residual links, feedback edges prediction links",
            "# price = base price x distance / mean distance; noise = base noise x mean weight / weight",
            "# the world, the sensors and the areas' targets are placeholders: edit them"]
    return "\n".join(head) + "\n" + yaml.safe_dump(data, sort_keys=False, default_flow_style=None, width=110)


def import_graph(path, *, sensors=None, **kw) -> str:
    """The spec skeleton (YAML text) of the area graph in ``path``."""
    return skeleton_yaml(read_area_graph(path, sensors=sensors), **kw)


def write_skeleton(text: str, path, force=False) -> None:
    """Write ``text`` to ``path`` atomically; an existing file only with ``force``."""
    from hierarchy.io import atomic_write_text, refuse_existing

    refuse_existing(path, force)
    atomic_write_text(os.fspath(path), text)
