"""Sub-circuits: the same nodes with fewer links, and how a design of one
becomes a design of the whole.

A circuit that holds every link of another (same world, sensors and areas,
the extra links added) can always silence its extra links: a design of the
smaller circuit, with the extra links' gains at zero, is a design of the
larger one with exactly the same scores. So the larger circuit's optimum is
never worse (``docs/model.md``, "Sub-circuit invariant"). The designer uses this as a
start (the circuit with every prediction off) and studies use it so that an
architecture never loses to one it contains.
"""

from __future__ import annotations

from dataclasses import fields, is_dataclass, replace

import numpy as np

from hierarchy.loop.gains import Gains, gain_shapes
from hierarchy.spec.model import PREDICTION, Spec

__all__ = ["without_links", "without_predictions", "embed", "contains", "narrowed", "widen"]


def without_links(spec: Spec, drop) -> Spec:
    """``spec`` without the links ``drop`` (ids); budgets lose them too, and a
    budget left with no link is dropped.

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> spec = load_spec("specs/compare-predictive.yaml")
    >>> [l.id for l in without_links(spec, ["deck-view->tilt"]).links]
    ['tilt->deck-view', 'deck-view->swell-view', 'swell-view->deck-view']
    """
    drop = set(drop)
    links = tuple(l for l in spec.links if l.id not in drop)
    budgets = []
    for b in spec.budgets:
        kept = tuple(lid for lid in b.links if lid not in drop)
        if kept:
            budgets.append(replace(b, links=kept))
    return replace(spec, links=links, budgets=tuple(budgets))


def without_predictions(spec: Spec) -> Spec | None:
    """The feed-forward sub-circuit (every prediction link removed), or
    ``None`` when there is no prediction to remove or one is pinned (a pinned
    prediction cannot be switched off, so the smaller circuit is not a
    design of this one).

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> sub = without_predictions(load_spec("specs/compare-predictive.yaml"))
    >>> [l.kind for l in sub.links]
    ['residual', 'residual']
    """
    drop = [l for l in spec.links if l.kind == PREDICTION]
    if not drop or any(l.pin for l in drop):
        return None
    # A residual that subtracts a removed prediction loses its P: that P must
    # not be pinned to something other than zero either.
    ids = {l.id for l in drop}
    for l in spec.links:
        if f"{l.target}->{l.source}" in ids and "P" in l.pin and np.any(np.asarray(l.pin["P"]) != 0):
            return None
    return without_links(spec, ids)


def embed(gains: Gains, sub: Spec, spec: Spec) -> Gains:
    """A design of ``spec`` equal to ``gains`` (a design of its sub-circuit
    ``sub``) with every extra gain at zero: the extra links are silent and
    every score is the same.

    Examples
    --------
    >>> from hierarchy import load_spec, load_gains
    >>> spec = load_spec("specs/compare-predictive.yaml")
    >>> sub = without_predictions(spec)
    >>> g = embed(Gains(), sub, spec)
    >>> float(abs(g.links["deck-view->tilt"]["G"]).sum())
    0.0
    """
    shapes = gain_shapes(spec)
    out = Gains()
    for kind in ("areas", "links"):
        have = getattr(gains, kind)
        for owner, blocks in shapes[kind].items():
            table = getattr(out, kind).setdefault(owner, {})
            for name, shape in blocks.items():
                given = have.get(owner, {}).get(name)
                table[name] = np.array(given, dtype=float) if given is not None else np.zeros(shape)
    return out


def narrowed(spec: Spec, link_id: str):
    """``spec`` with one vector link narrowed by one channel, and the basis
    that puts the narrow link back into the wide one.

    A link of ``d`` channels can always send on only ``d - 1`` of them: a
    design that sends along the ``d - 1`` directions of least channel noise
    (``U``, orthonormal columns) is a design of the narrow link whose noise is
    ``U' N U``. So the narrow circuit is a sub-circuit (its optimum is never
    better), and its optimum can lie in a basin that a search of the wide
    circuit does not find (a rank-one residual that leaves one reading to
    the receiver's memory is a measured case: docs/search.md).

    Returns ``(sub, U)``, or ``None`` when the link has one channel or it, or
    a residual that subtracts its prediction, pins a gain.

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> spec = load_spec("specs/two-level.yaml")
    >>> sub, U = narrowed(spec, "probe->station-view")
    >>> sub.link("probe->station-view").dim, U.shape
    (1, (2, 1))
    """
    link = spec.link(link_id)
    if link.dim < 2 or link.pin:
        return None
    back = f"{link.target}->{link.source}"
    if link.kind == PREDICTION and any(l.id == back and "P" in l.pin for l in spec.links):
        return None
    w, V = np.linalg.eigh(np.asarray(link.noise, dtype=float))
    U = V[:, : link.dim - 1]
    thin = replace(link, dim=link.dim - 1, noise=np.diag(w[: link.dim - 1]))
    return replace(spec, links=tuple(thin if l.id == link_id else l for l in spec.links)), U


def widen(gains: Gains, sub: Spec, spec: Spec, link_id: str, U) -> Gains:
    """A design of ``spec`` equal to ``gains``, a design of ``sub =
    narrowed(spec, link_id)[0]``: the narrow link's signal is sent along
    ``U`` and read back through ``U'`` (and a residual that subtracts the
    narrow prediction reads it through ``U'``), so every score is the same.

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> from hierarchy.loop.evaluate import evaluate
    >>> from hierarchy.design.problem import Problem
    >>> spec = load_spec("specs/two-level.yaml")
    >>> sub, U = narrowed(spec, "probe->station-view")
    >>> g = Problem(sub).informed_start()
    >>> a, b = evaluate(sub, g).objective, evaluate(spec, widen(g, sub, spec, "probe->station-view", U)).objective
    >>> bool(abs(a - b) < 1e-12 * a)
    True
    """
    out = embed(gains, sub, spec)
    U = np.asarray(U, dtype=float)
    link = spec.link(link_id)
    blocks = out.links[link_id]
    for name in list(blocks):
        given = gains.links.get(link_id, {}).get(name)
        if given is None:
            continue
        given = np.asarray(given, dtype=float)
        # Rows of G, S and P are the link's channels; columns of K read them.
        blocks[name] = U @ given if name in "GSP" else given @ U.T
    if link.kind == PREDICTION:
        back = f"{link.target}->{link.source}"
        given = gains.links.get(back, {}).get("P")
        if given is not None:
            out.links[back]["P"] = np.asarray(given, dtype=float) @ U.T
    return out


def _same(a, b) -> bool:
    """Deep equality of model objects (dataclasses, mappings, arrays)."""
    if is_dataclass(a) and not isinstance(a, type):
        return type(a) is type(b) and all(_same(getattr(a, f.name), getattr(b, f.name))
                                          for f in fields(a) if f.name not in ("path", "warnings"))
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return np.shape(a) == np.shape(b) and np.array_equal(a, b)
    if isinstance(a, dict) or hasattr(a, "keys"):
        return set(a) == set(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (tuple, list)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b


def contains(big: Spec, small: Spec) -> bool:
    """Whether ``big`` is ``small`` plus some links that can be silenced: the
    same world, sensors and areas, every link of ``small`` in ``big`` with the
    same settings (a residual may gain the ``P`` of an added prediction), and
    no added link pinned. Budgets are not compared: whether ``small``'s design
    meets ``big``'s budgets is checked on the design itself.

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> flat = load_spec("specs/compare-flat.yaml")
    >>> pred = load_spec("specs/compare-predictive.yaml")
    >>> contains(pred, flat), contains(flat, pred)
    (True, False)
    """
    if not (_same(big.world, small.world) and _same(big.sensors, small.sensors) and _same(big.areas, small.areas)):
        return False
    mine = {l.id: l for l in big.links}
    for l in small.links:
        other = mine.pop(l.id, None)
        if other is None or not _same(replace(other, pin={}), replace(l, pin={})):
            return False
        if not _same(dict(other.pin), dict(l.pin)):
            return False
    return not any(l.pin for l in mine.values())
