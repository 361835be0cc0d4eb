"""The circuit as a NetworkX graph: sensors and areas are nodes, links are
edges (at most one per ordered pair, so an edge is named by ``FROM->TO``).

Levels: sensors sit at level 0; an area's level is the one its spec gives
(``level:``), else one more than the lowest level it receives a residual
from, following residuals upward (see :func:`levels`). Areas that no sensor
can reach get a warning: they can never beat their prior.
"""

from __future__ import annotations

import networkx as nx

from hierarchy.spec.model import RESIDUAL, Spec

__all__ = ['build_graph', 'levels', 'reach_warnings', 'by_level']


def build_graph(spec: Spec) -> nx.DiGraph:
    """A directed graph of the circuit with its attributes.

    Nodes carry ``role`` ("sensor" or "area"), ``dim`` and, for areas, the
    target; edges carry ``kind``, ``dim``, ``price``, ``noise_power`` and the
    link object under ``link``. Node attribute ``level`` is set by
    :func:`levels`.

    Examples
    --------
    >>> g = build_graph(spec)                        # doctest: +SKIP
    >>> g.edges["eye->v1".split("->")[0], "v1"]["kind"]   # doctest: +SKIP
    'residual'
    """
    g = nx.DiGraph(name=spec.name)
    for s in spec.sensors:
        g.add_node(s.name, role="sensor", dim=s.dim, observes=tuple(s.observes))
    for a in spec.areas:
        g.add_node(a.name, role="area", dim=a.dim, tracks=a.tracks, lag=a.lag, weight=a.weight,
                   given_level=a.level)
    for l in spec.links:
        g.add_edge(l.source, l.target, id=l.id, kind=l.kind, dim=l.dim, price=l.price,
                   noise_power=float(l.noise.trace()), link=l)
    for node, level in levels(g).items():
        g.nodes[node]["level"] = level
    return g


def levels(g: nx.DiGraph) -> dict:
    """Level of every node: where drawings and ``hierarchy check`` place it.

    Sensors are level 0. An area given ``level:`` in its spec (node
    attribute ``given_level``) sits there. Any other area is one above the
    lowest node that sends it a residual, following residuals up from the
    sensors and from the areas with a given level: the length of the shortest
    chain of residuals that reaches it. Areas fed only by predictions or
    laterals take the level of their lowest sender when that sender has one.
    Areas that nothing places get no level.

    ``hierarchy generate --levels`` writes every area's level into the spec,
    so a generated circuit is drawn on the levels it was generated with.

    Examples
    --------
    >>> g = nx.DiGraph()
    >>> g.add_node("eye", role="sensor"); g.add_node("v1", role="area"); g.add_node("v2", role="area")
    >>> g.add_edge("eye", "v1", kind="residual"); g.add_edge("v1", "v2", kind="residual")
    >>> levels(g)
    {'eye': 0, 'v1': 1, 'v2': 2}
    >>> g.nodes["v2"]["given_level"] = 4
    >>> levels(g)["v2"]
    4
    """
    given = {n: d["given_level"] for n, d in g.nodes(data=True)
             if d["role"] == "area" and d.get("given_level") is not None}
    starts = {n: 0 for n, d in g.nodes(data=True) if d["role"] == "sensor"}
    starts.update(given)
    # Shortest residual chain from a sensor or a placed area; nothing moves
    # an area whose level is given, so its incoming residuals are dropped.
    up = nx.DiGraph()
    up.add_nodes_from(g.nodes)
    up.add_edges_from((u, v) for u, v, d in g.edges(data=True) if d["kind"] == RESIDUAL and v not in starts)
    source = object()  # one source joined to every start by its level
    up.add_node(source)  # (with no sensor at all, as in a hand-edited result, every area is unreached)
    up.add_edges_from((source, n, {"w": k}) for n, k in starts.items())
    dist = nx.single_source_dijkstra_path_length(up, source, weight=lambda u, v, d: d.get("w", 1))
    level = {n: int(k) for n, k in dist.items() if n is not source}
    # Areas reached only through other links sit beside their sender.
    changed = True
    while changed:
        changed = False
        for u, v in g.edges:
            if v not in level and u in level and g.nodes[v]["role"] == "area":
                level[v] = level[u]
                changed = True
    return {n: level[n] for n in g.nodes if n in level}


def reach_warnings(g: nx.DiGraph) -> list:
    """Warnings for areas that no sensor's signal can reach."""
    sensors = [n for n, d in g.nodes(data=True) if d["role"] == "sensor"]
    reached = set(sensors)
    for s in sensors:
        reached |= nx.descendants(g, s)
    return [
        f"area '{n}' receives nothing that any sensor's signal reaches: it can never beat its prior"
        for n, d in g.nodes(data=True)
        if d["role"] == "area" and n not in reached
    ]


def by_level(g: nx.DiGraph) -> list:
    """Nodes grouped by level, lowest first; unreachable areas come last as
    level ``None``."""
    groups = {}
    for n, d in g.nodes(data=True):
        groups.setdefault(d.get("level"), []).append(n)
    keys = sorted(k for k in groups if k is not None)
    out = [(k, groups[k]) for k in keys]
    if None in groups:
        out.append((None, groups[None]))
    return out
