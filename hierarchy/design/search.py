"""The designer's entry point: the searches it runs, the best of them, the
sub-circuit invariant and the information floor beside the design.
"""

from __future__ import annotations

import time
from dataclasses import replace

import numpy as np

from hierarchy.loop.gains import Gains
from hierarchy.spec.model import Spec
from hierarchy.design.quasinewton import F_FLOOR
from hierarchy.design.subcircuit import embed, narrowed, widen, without_predictions
from hierarchy.design.budgets import design_budgets
from hierarchy.design.prices import design_prices
from hierarchy.design.result import AGREE_RTOL, DesignResult, Options

__all__ = ['NARROW_MAX_GAINS', 'MAX_NARROW', 'NARROW_RESTARTS', 'FLOOR_MAX_DIM', 'FLOOR_RTOL', 'design', 'floor_of', 'without_pins']


#: Circuits with at most this many free gains also get the narrow-link
#: searches of :func:`design` (one more design per vector link, at most
#: ``MAX_NARROW`` of them, the widest and dearest first).
NARROW_MAX_GAINS = 400
MAX_NARROW = 6
#: Starts of each narrow circuit's design (the informed start and one more).
NARROW_RESTARTS = 2
#: Largest world (state dimensions) whose information floor :func:`design`
#: computes by default: the floor's semidefinite blocks are world-sized (about
#: 10 s at 32 dimensions, docs/floor.md), small beside a design of that size.
FLOOR_MAX_DIM = 40
#: A bound above the achieved objective by more than this (relative) is a
#: contradiction, reported as such (the floor solver's own margin is 1e-6).
FLOOR_RTOL = 1e-6


def design(spec: Spec, options: Options | None = None, start: Gains | None = None,
           compare_unpinned: bool = True, floor: bool = True) -> DesignResult:
    """Design a circuit: budget form if the spec has budgets, else price form.

    Two searches are run and the better design kept. The first starts from
    ``start`` or from several starts (see :class:`Options`); the second
    designs the feed-forward sub-circuit (every prediction off) and carries
    that design on in the whole circuit, so the design is never worse than
    the best feed-forward one (the sub-circuit invariant). Both wake silent
    links, alone and in streams, before they stop. ``result.searches`` says
    what each search reached and ``result.agreement`` how many agree.

    When the spec pins gains and ``compare_unpinned`` is true, the same
    circuit with every gain free is designed too and kept as
    ``result.reference``, so a hand-built circuit is shown beside the optimum.

    With ``floor`` (the default) the information floor of the spec, a lower
    bound no circuit beats, is computed apart from the search and kept as
    ``result.floor`` with the gap ``result.gap`` (worlds of at most
    ``FLOOR_MAX_DIM`` dimensions; larger ones are reported as skipped).

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> res = design(load_spec("specs/single-loop.yaml"))
    >>> res.status, res.agreement    # both searches (multistart, feed-forward first) agree
    ('converged', (2, 2))
    """
    opts = options or Options()
    run = design_budgets if spec.budgets else design_prices
    t0 = time.perf_counter()
    result = run(spec, opts, start)
    searches = [("given start" if start is not None else "multistart", result)]
    sub = without_predictions(spec)
    if sub is not None:
        # A design of the sub-circuit is a design of this circuit with the
        # predictions silent; carried on from there, it can only improve.
        # (The sub-circuit gets the whole search, narrow links included, so
        # that no design of it, however found, beats this circuit's.)
        part = design(sub, opts, compare_unpinned=False, floor=False)
        if np.isfinite(part.objective):
            searches.append(("feed-forward first", run(spec, opts, embed(part.gains, sub, spec))))
    for lid in _narrowable(spec):
        # A vector link narrowed by one channel is a sub-circuit too; its
        # optimum can sit in a basin the wide search misses. Carried on only
        # where it beats every search so far (else it adds nothing).
        sub, U = narrowed(spec, lid)
        part = run(sub, replace(opts, restarts=min(opts.restarts, NARROW_RESTARTS)))
        best = min(r.objective for _, r in searches if _usable(r)) if any(_usable(r) for _, r in searches) \
            else np.inf
        if _usable(part) and part.objective < best - AGREE_RTOL * max(abs(best), F_FLOOR):
            searches.append((f"narrow {lid} first", run(spec, opts, widen(part.gains, sub, spec, lid, U))))
    result = _best_of(searches)
    result.seconds = time.perf_counter() - t0
    result.searches = [{"search": name, "objective": float(r.objective), "status": r.status}
                       for name, r in searches]
    free = without_pins(spec)
    if compare_unpinned and free is not None:
        result.reference = run(free, opts)
    if floor:
        result.floor = floor_of(result)
    return result


def floor_of(result: DesignResult, max_dim: int | None = FLOOR_MAX_DIM):
    """The information floor of a design's spec, checked against the design.

    The bound is computed from the spec alone (never from the design), so a
    bound above the achieved objective would mean a fault in one of the two:
    it is then reported as ``"contradicted"`` with both numbers, never as a
    gap.

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> res = design(load_spec("specs/single-loop.yaml"), floor=False)
    >>> f = floor_of(res)
    >>> f.status, bool(f.objective <= res.objective)
    ('optimal', True)
    """
    from hierarchy.design.floor import information_floor

    floor = information_floor(result.spec, max_dim=max_dim)
    if floor.ok and np.isfinite(result.objective) and \
            floor.objective > result.objective + FLOOR_RTOL * max(abs(result.objective), F_FLOOR):
        floor = replace(floor, status="contradicted",
                        message=f"the bound {floor.objective:.9g} lies above the design's objective "
                                f"{result.objective:.9g}: one of the two is wrong; please report it")
    return floor


def _narrowable(spec: Spec) -> list:
    """Vector links worth a narrow-link search: only in small circuits
    (free gains at most ``NARROW_MAX_GAINS``), at most ``MAX_NARROW``."""
    from hierarchy.loop.gains import gain_shapes

    shapes = gain_shapes(spec)
    free = sum(int(np.prod(shape)) for kind in ("areas", "links") for blocks in shapes[kind].values()
               for shape in blocks.values())
    if free > NARROW_MAX_GAINS:
        return []
    links = [l.id for l in spec.links if narrowed(spec, l.id) is not None]
    return links[:MAX_NARROW]


def _usable(result) -> bool:
    return np.isfinite(result.objective) and all(b.met for b in result.budgets.values())


def _best_of(searches) -> DesignResult:
    """The lowest objective among the searches whose designs are usable
    (finite, budgets met), preferring a converged one on a tie.

    The lowest design is kept even when its search did not converge (its
    objective is exact and its budgets are met, so it is the better
    circuit), but its message then says so and names the best converged
    search with its objective: the status stays the unconverged one's, so
    nothing calls the kept design a local optimum."""
    results = [r for _, r in searches]
    usable = [r for r in results if _usable(r)] or results
    best = min(usable, key=lambda r: (r.objective, not r.converged))
    if not best.converged:
        done = [(name, r) for name, r in searches if r.converged and _usable(r)]
        if done:
            name, r = min(done, key=lambda nr: nr[1].objective)
            own = next(n for n, x in searches if x is best)
            gap = (r.objective - best.objective) / max(abs(best.objective), F_FLOOR)
            best.message = (f"{best.message}; this is the lowest objective found (search '{own}'), "
                            f"not a confirmed local optimum; the best converged search ('{name}') "
                            f"reached {r.objective:.9g} ({gap:.2g} higher, relative)")
    best.iterations = sum(r.iterations for r in results)
    best.evaluations = sum(r.evaluations for r in results)
    best.restarts = sum(r.restarts for r in results)
    return best


def without_pins(spec: Spec):
    """The same circuit with every gain free, or ``None`` when the spec pins
    nothing or freeing the pins would leave a noisy, unpriced, unbudgeted link
    (whose optimum does not exist)."""
    if not (any(a.pin for a in spec.areas) or any(l.pin for l in spec.links)):
        return None
    budgeted = {lid for b in spec.budgets for lid in b.links}
    for l in spec.links:
        if l.pin and l.price == 0 and l.id not in budgeted and np.trace(l.noise) > 0:
            return None
    return replace(spec, areas=tuple(replace(a, pin={}) for a in spec.areas),
                   links=tuple(replace(l, pin={}) for l in spec.links))
