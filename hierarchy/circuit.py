"""The circuit as a NetworkX graph: sensors and areas are nodes, links are
edges (at most one per ordered pair, so an edge is named by ``FROM->TO``).

Levels: sensors sit at level 0; an area's level is one more than the lowest
level it receives a residual (or any feed-forward link) from, following links
upward from the sensors. Areas that no sensor can reach get no level and a
warning: they can never beat their prior.
"""

from __future__ import annotations

import networkx as nx

from .model import RESIDUAL, Spec


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
        g.add_node(a.name, role="area", dim=a.dim, tracks=a.tracks, lag=a.lag, weight=a.weight)
    for l in spec.links:
        g.add_edge(l.source, l.target, id=l.id, kind=l.kind, dim=l.dim, price=l.price,
                   noise_power=float(l.noise.trace()), link=l)
    for node, level in levels(g).items():
        g.nodes[node]["level"] = level
    return g


def levels(g: nx.DiGraph) -> dict:
    """Level of every node reachable from a sensor along residual links.

    Sensors are level 0; an area is one above the lowest node that sends it a
    residual. Areas fed only by predictions or laterals take the level of
    their lowest sender when that sender has one.

    Examples
    --------
    >>> levels(build_graph(spec))      # doctest: +SKIP
    {'eye': 0, 'v1': 1, 'v2': 2}
    """
    level = {n: 0 for n, d in g.nodes(data=True) if d["role"] == "sensor"}
    up = nx.DiGraph()
    up.add_nodes_from(g.nodes)
    up.add_edges_from((u, v) for u, v, d in g.edges(data=True) if d["kind"] == RESIDUAL)
    # Shortest residual path from any sensor gives the level (with no
    # sensor at all, as in a hand-edited result, every area is unreached).
    sources = set(level)
    for node, dist in (nx.multi_source_dijkstra_path_length(up, sources, weight=lambda u, v, d: 1).items()
                       if sources else ()):
        level[node] = dist
    # Areas reached only through other links sit beside their sender.
    changed = True
    while changed:
        changed = False
        for u, v in g.edges:
            if v not in level and u in level and g.nodes[v]["role"] == "area":
                level[v] = level[u]
                changed = True
    return level


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


class Circuit:
    """A loaded circuit: the spec, its graph, and the jobs one can run on it.

    This is the notebook entry point; the CLI calls the same methods.

    Parameters
    ----------
    spec : Spec

    Examples
    --------
    >>> import hierarchy
    >>> c = hierarchy.load("specs/single-loop.yaml")    # doctest: +SKIP
    >>> result = c.design()                             # doctest: +SKIP
    >>> result.scores.areas["v1"].error                 # doctest: +SKIP
    0.19...
    """

    def __init__(self, spec: Spec):
        self.spec = spec
        self.graph = build_graph(spec)

    @property
    def warnings(self) -> list:
        return list(self.spec.warnings) + reach_warnings(self.graph)

    def evaluate(self, gains=None):
        """Exact scores for ``gains`` (see :func:`hierarchy.evaluate.evaluate`)."""
        from .evaluate import evaluate

        return evaluate(self.spec, gains)

    def simulate(self, gains=None, **kwargs):
        """Monte-Carlo run (see :func:`hierarchy.simulate.simulate`)."""
        from .simulate import simulate

        return simulate(self.spec, gains, **kwargs)

    def design(self, options=None, start=None, compare_unpinned=True):
        """Optimal gains (see :func:`hierarchy.design.design`)."""
        from .design import design

        return design(self.spec, options, start, compare_unpinned)
