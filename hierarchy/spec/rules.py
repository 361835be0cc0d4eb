"""The rules of a well-posed circuit, on the typed objects of :mod:`hierarchy.spec.model`.

This is the one home of every rule about a :class:`~hierarchy.spec.model.Spec`
that does not need the positions of a YAML file: the numeric limits, the
stability margin, covariances, matrix shapes, the world's stationarity and
the costs of noisy links. The spec reader (:mod:`hierarchy.spec`) calls these
checks with the place and line of the file; value-path edits in
:mod:`hierarchy.studies` and specs built in Python call :func:`check_spec`.
So a rule is written once and refuses the same thing, with the same words,
wherever a spec comes from.

Every check raises :class:`~hierarchy.errors.SpecError` (or, when asked,
:class:`~hierarchy.errors.InputError`) with a place and a fix.
"""

from __future__ import annotations

import difflib
import math

import numpy as np

from hierarchy.errors import InputError, SpecError
from hierarchy.spec.model import LINK_KINDS, PREDICTION, RESIDUAL, Link, Spec, World

__all__ = [
    "STABLE_RADIUS",
    "MAX_TOTAL_DIM",
    "MAX_LAG",
    "MAX_DELAY",
    "MAX_LEVEL",
    "MAX_NUMBER",
    "suggest",
    "eigenvalues",
    "positive_definite",
    "sender_pinned",
    "check_known",
    "check_whole",
    "check_number",
    "check_total",
    "check_shape",
    "check_covariance",
    "check_world",
    "check_area",
    "check_lag_depth",
    "check_link_ends",
    "check_delay_states",
    "check_pin",
    "check_costs",
    "check_spec",
]

#: A world (and a closed loop, see :mod:`hierarchy.loop.evaluate`) is stable when
#: its spectral radius is below this: a margin keeps rounding from deciding.
STABLE_RADIUS = 1.0 - 1e-9
#: Limit on the world's total size, on the sum of sensor, area and link sizes.
MAX_TOTAL_DIM = 5000
#: Largest lag of an area.
MAX_LAG = 50
#: Longest conduction delay of a link, in steps.
MAX_DELAY = 50
#: Highest drawing level an area may be given (more than any real hierarchy).
MAX_LEVEL = 1000
#: Largest size of any number in a spec. The tool squares and multiplies
#: them (powers, prices times powers); this keeps every product far from
#: overflowing double precision.
MAX_NUMBER = 1e12


def _refuse(message, fix, place, line=None, error=SpecError):
    """Raise ``error`` (:class:`SpecError` or :class:`InputError`)."""
    if error is InputError:
        raise InputError(message, place=place, fix=fix, line=line)
    raise SpecError(message, place=place, fix=fix, line=line)


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def suggest(word, known) -> str:
    """A fix sentence pointing at the nearest known word, or listing them all.

    Examples
    --------
    >>> suggest("prob", ["probe", "top"])
    'did you mean `probe`? (known here: probe, top)'
    """
    known = [str(k) for k in known]
    close = difflib.get_close_matches(str(word), known, n=1)
    listing = ", ".join(known) if known else "(none)"
    if close:
        return f"did you mean `{close[0]}`? (known here: {listing})"
    return f"use one of: {listing}"


def check_known(name, known, what: str, place, line=None, error=SpecError) -> None:
    """Refuse a reference to a ``what`` (state, sensor or area, link) that does not exist."""
    if name not in known:
        _refuse(f"there is no {what} called `{name}`", suggest(name, known), place, line, error)


def check_whole(x: int, minimum: int, maximum, place, line=None, error=SpecError, written=None) -> int:
    """Refuse a whole number (a size, a lag, a level) out of its range."""
    text = written if written is not None else str(x)
    if x < minimum:
        _refuse(f"must be at least {minimum}, got {text}", f"use a whole number of {minimum} or more",
                place, line, error)
    if maximum is not None and x > maximum:
        _refuse(f"too large: {text}; the limit is {maximum}", f"use at most {maximum}", place, line, error)
    return x


def eigenvalues(cov: np.ndarray) -> np.ndarray:
    """Eigenvalues of a symmetric matrix, in ascending order.

    A diagonal matrix (every shorthand but a list of lists) needs no
    decomposition, which matters at size 5000.

    Examples
    --------
    >>> eigenvalues(np.diag([2.0, 1.0]))
    array([1., 2.])
    """
    diagonal = np.diagonal(cov)
    if np.count_nonzero(cov) == np.count_nonzero(diagonal):
        return np.sort(diagonal)
    return np.linalg.eigvalsh(cov)


def positive_definite(cov: np.ndarray) -> bool:
    """Whether a covariance is positive definite (relative to its scale).

    Examples
    --------
    >>> positive_definite(np.diag([1.0, 1e-3])), positive_definite(np.diag([1.0, 0.0]))
    (True, False)
    """
    if cov.size == 0:
        return False
    eig = eigenvalues(cov)
    return bool(eig.max() > 0 and eig.min() > 1e-12 * eig.max())


def sender_pinned(link: Link, links_by_id: dict) -> bool:
    """Whether every gain that sets the power of ``link`` is pinned.

    A noisy link whose sender is pinned cannot be made louder, so it needs no
    price: its power is not a design choice.
    """
    if link.kind == PREDICTION:
        return "G" in link.pin
    pair = links_by_id.get(f"{link.target}->{link.source}")
    has_pair = pair is not None and pair.kind == PREDICTION
    return "S" in link.pin and ("P" in link.pin or not has_pair)


def check_number(x, place, line=None, error=SpecError, minimum=None, written=None) -> float:
    """Refuse a number that is not finite, too large for the computations
    that follow (above :data:`MAX_NUMBER` in size), or below ``minimum``.

    ``written`` is the number as the user wrote it, for the message.
    """
    text = written if written is not None else f"{x:g}"
    if not math.isfinite(x):
        _refuse(f"expected a finite number, got {text}", "write an ordinary number (no .inf or .nan)",
                place, line, error)
    if abs(x) > MAX_NUMBER:
        _refuse(f"the number {text} is too large: numbers in a spec are at most {MAX_NUMBER:g} in size",
                "rescale the model (for example measure in other units) so that its numbers are moderate",
                place, line, error)
    if minimum is not None and x < minimum:
        _refuse(f"must be at least {minimum:g}, got {text}", f"use a value of {minimum:g} or more",
                place, line, error)
    return x


def _check_entries(matrix: np.ndarray, place, error) -> None:
    """Every entry of a matrix is finite and at most MAX_NUMBER in size."""
    if matrix.size and not (np.isfinite(matrix).all() and np.abs(matrix).max() <= MAX_NUMBER):
        bad = matrix.flat[int(np.argmax(~np.isfinite(matrix.ravel()) | (np.abs(matrix.ravel()) > MAX_NUMBER)))]
        check_number(float(bad), place, None, error)


def check_total(sizes, what: str, place, line=None, error=SpecError) -> None:
    """Refuse circuits too big to build, before any big matrix is made."""
    total = sum(sizes)
    if total > MAX_TOTAL_DIM:
        _refuse(f"too large: {what} add up to {total}; the limit is {MAX_TOTAL_DIM}",
                "make the blocks smaller", place, line, error)


def check_shape(matrix: np.ndarray, rows: int, cols: int, why: str, place, line=None,
                error=SpecError) -> np.ndarray:
    """Refuse a matrix that is not ``rows x cols``; ``why`` says where the
    shape comes from."""
    got = np.shape(matrix)
    if got != (rows, cols):
        shape = f"{rows} x {cols}"
        got = tuple(got) + (1,) * (2 - len(got))
        _refuse(f"expected a {shape} matrix ({why}), got {got[0]} x {got[1]}",
                f"give {_plural(rows, 'row')} of {_plural(cols, 'number')} each", place, line, error)
    return matrix


def check_covariance(cov: np.ndarray, place, line=None, error=SpecError) -> np.ndarray:
    """Refuse a covariance that is not symmetric and positive semidefinite
    (both up to rounding, relative to the matrix's scale)."""
    if cov.size == 0:
        return cov
    scale = np.abs(cov).max()
    if np.abs(cov - cov.T).max() > 1e-9 * scale:
        _refuse("a covariance must be symmetric, and this one is not",
                "make entry [i][j] equal to entry [j][i]", place, line, error)
    eig = eigenvalues(cov)
    # Relative to the largest eigenvalue, at any scale (1e-12 noises too).
    if eig.min() < -1e-10 * np.abs(eig).max():
        _refuse(f"a covariance must be positive semidefinite, and this one has the negative eigenvalue "
                f"{eig.min():.3g}",
                "check the signs and make the off-diagonal entries smaller than the diagonal ones",
                place, line, error)
    return cov


def check_world(world: World, place="world", line=None, error=SpecError) -> float:
    """Refuse a world with no stationary regime: its spectral radius must be
    below :data:`STABLE_RADIUS`. Returns the radius."""
    A = world.A
    radius = float(np.abs(np.linalg.eigvals(A)).max()) if A.size else 0.0
    if not radius < STABLE_RADIUS:
        _refuse(f"the world's dynamics have spectral radius {radius:.12g}; a stationary regime needs < 1",
                "shrink the dynamics (and driven_by blocks) so that every mode decays, e.g. 0.99 instead "
                "of 1 for a slow drift", place, line, error)
    return radius


def check_area(area, sizes: dict, where=None, error=SpecError) -> None:
    """An area holds what it tracks, and only an area that tracks something
    has an error to weigh and a lag.

    ``sizes`` maps state names to their sizes; ``where(key) -> (place, line)``
    names the area's keys (default ``areas[NAME].KEY``).
    """
    if where is None:
        def where(key):
            return f"areas[{area.name}].{key}", None
    tracked = sum(sizes[name] for name in area.tracks)
    if area.dim < tracked:
        _refuse(f"the area tracks {tracked} state dimensions, so its dim must be at least {tracked}; "
                f"got {area.dim}", f"use dim: {tracked} or more (the extra coordinates are private memory)",
                *where("dim"), error)
    if area.weight > 0 and not area.tracks:
        _refuse("an area that tracks nothing has no error to weigh",
                "remove `weight`, or add `tracks: STATE`", *where("weight"), error)
    if area.lag > 0 and not area.tracks:
        _refuse("a lag only applies to an area that tracks something",
                "remove `lag`, or add `tracks: STATE`", *where("lag"), error)


def check_lag_depth(world_dim: int, lag: int, place, line=None, error=SpecError) -> None:
    """A lag L keeps L delayed copies of the whole world in the closed loop:
    world size x (L + 1) is at most :data:`MAX_TOTAL_DIM`."""
    if world_dim * (lag + 1) > MAX_TOTAL_DIM:
        _refuse(f"too large: lag {lag} keeps {lag} delayed copies of the world (size {world_dim}), "
                f"{world_dim * (lag + 1)} numbers in all; the limit is {MAX_TOTAL_DIM}",
                f"use a lag of at most {MAX_TOTAL_DIM // world_dim - 1}, or a smaller world",
                place, line, error)


def check_link_ends(source: str, target: str, kind: str, sensor_names, where, error=SpecError) -> None:
    """A link joins two different nodes; predictions start at areas and
    residuals end at areas. ``where(key) -> (place, line)`` names ``from``
    and ``to``."""
    if source == target:
        _refuse("a link cannot go from a node to itself",
                "an area's own memory is its gain M; remove this link", *where("to"), error)
    if kind == PREDICTION and source in sensor_names:
        _refuse(f"a prediction link starts at an area, and `{source}` is a sensor",
                "a signal going up from a sensor is a residual: write `kind: residual`", *where("from"), error)
    if kind == RESIDUAL and target in sensor_names:
        _refuse(f"a residual link ends at an area, and `{target}` is a sensor",
                "a signal going down to a sensor is a prediction: write `kind: prediction`", *where("to"), error)


def check_delay_states(links, where=None, error=SpecError) -> None:
    """A link of delay k keeps k - 1 copies of its signal in the closed
    loop; refuse delays whose copies together pass the size limit.
    ``where(link) -> (place, line)`` names a link's delay."""
    total = 0
    for link in links:
        total += (link.delay - 1) * link.dim
        if total > MAX_TOTAL_DIM:
            place, line = where(link) if where else (f"links[{link.id}].delay", None)
            _refuse(f"too large: the links' delays keep {total} delayed signal numbers in the closed loop so "
                    f"far (each link of delay k keeps k - 1 copies of its signal); the limit is {MAX_TOTAL_DIM}",
                    "use shorter delays or narrower links", place, line, error)


def _link_place(link, key):
    return (f"links[{link.id}].{key}" if key else f"links[{link.id}]"), None


def check_costs(links, budgets, where=_link_place, error=SpecError) -> None:
    """Every noisy link needs a cost, and every costed link needs noise.

    Without noise, energy is free (shrink the sender, grow the receiver);
    without a price or budget, a louder noisy link is always better. Either
    way the optimum does not exist. A noisy link whose sender is pinned
    (:func:`sender_pinned`) needs no cost.

    Parameters
    ----------
    links, budgets : sequence of Link, sequence of Budget
    where : callable, optional
        ``where(link, key) -> (place, line)``: the place of a link (``key``
        ``""``) or of one of its keys (``"noise"``) in messages.
    error : type
        :class:`SpecError` (default) or :class:`InputError`.
    """
    budget_of = {}
    for budget in budgets:
        for link_id in budget.links:
            # A link that costs nothing in its budget and has no cap there
            # is not limited by it.
            if budget.weight(link_id) > 0 or link_id in budget.caps:
                budget_of.setdefault(link_id, budget.name)
    ids = {link.id: link for link in links}
    for link in links:
        if link.price > 0 or link.id in budget_of:
            why = (f"has price {link.price:g}" if link.price > 0
                   else f"is in budget `{budget_of[link.id]}`")
            if not positive_definite(link.noise):
                _refuse(f"this link {why}, but its channel noise is not positive definite; on a noiseless "
                        f"channel energy is free, so no optimum exists",
                        "give the channel noise, e.g. `noise: 0.01`", *where(link, "noise"), error)
        elif np.any(link.noise) and not sender_pinned(link, ids):
            _refuse("this link is noisy but has no price and is in no budget: sending louder is then always "
                    "better and free, so no optimum exists",
                    "give it a price (e.g. `price: 0.1`) or put it in a budget", *where(link, ""), error)


def check_pin(kind: str, gain: str, source: str, target: str, sensor_names, paired: bool, place, line=None,
              error=SpecError) -> None:
    """A link pins only the gains of its kind; a prediction into a sensor has
    no receiving gain K, and a residual has a gain P only when a prediction
    link goes back the other way (``paired``)."""
    own = ("G", "K") if kind == PREDICTION else ("S", "P", "K")
    if gain not in own:
        _refuse(f"a {kind} link has no gain {gain}",
                f"a {kind} link pins only {', '.join(own)}; remove {gain} or change the kind", place, line, error)
    if gain == "K" and target in sensor_names:
        _refuse(f"a prediction into sensor `{target}` has no receiving gain K: a sensor keeps no state",
                "remove K", place, line, error)
    if gain == "P" and not paired:
        _refuse(f"there is no prediction link {target}->{source} for this residual to subtract, so it has "
                f"no gain P", f"remove P, or add the prediction link {target}->{source}", place, line, error)


def _check_link_pins(link, ids, dims, sensor_names, place, error) -> None:
    """The pinned gains of a link built in Python: :func:`check_pin`, and
    their shapes (the reader checks the shapes while it expands them)."""
    src, dst, dim = link.source, link.target, link.dim
    pair = ids.get(f"{dst}->{src}")
    paired = pair is not None and pair.kind == PREDICTION
    for gain, matrix in link.pin.items():
        check_pin(link.kind, gain, src, dst, sensor_names, paired, place(gain), None, error)
        if gain == "K":
            shape = (dims[dst], dim, f"rows: `{dst}` has size {dims[dst]}; columns: the link's dim {dim}")
        elif gain == "P":
            shape = (dim, pair.dim, f"rows: the link's dim {dim}; columns: the dim of {pair.id}, {pair.dim}")
        else:
            shape = (dim, dims[src], f"rows: the link's dim {dim}; columns: `{src}` has size {dims[src]}")
        check_shape(matrix, *shape, place(gain), None, error)
        _check_entries(matrix, place(gain), error)


def check_spec(spec: Spec, place=None, error=SpecError) -> Spec:
    """Check a whole circuit against every rule of this module.

    This is what a spec built in Python (the dataclasses of
    :mod:`hierarchy.spec.model`) or edited by a study goes through; the spec
    reader applies the same rules section by section.

    Parameters
    ----------
    spec : Spec
    place : str, optional
        What was done to the spec, e.g. ``world.states[x].dynamics = 0.99``:
        messages then say ``PLACE (PART)``, where PART is the part of the spec
        that breaks a rule (``world``, ``links[a->b].noise``). Without it
        they name the part alone.
    error : type
        :class:`SpecError` (default) or :class:`InputError`.

    Returns
    -------
    Spec
        ``spec`` itself, when it is well posed.

    Examples
    --------
    >>> from hierarchy.spec.model import StateBlock, World, Sensor, Area, Spec, frozen_array
    >>> world = World((StateBlock("x", 1, frozen_array([[1.0]]), frozen_array([[1.0]])),))
    >>> check_spec(Spec("drift", world, (Sensor("eye", {"x": frozen_array([[1.0]])}, frozen_array([[0.1]])),),
    ...                 (Area("v", 1, ("x",)),)))
    Traceback (most recent call last):
    ...
    hierarchy.errors.SpecError: world: the world's dynamics have spectral radius 1; a stationary regime needs < 1
      fix: shrink the dynamics (and driven_by blocks) so that every mode decays, e.g. 0.99 instead of 1 for a slow drift
    """
    def at(part):
        return f"{place} ({part})" if place else part

    world = spec.world
    check_total([b.dim for b in world.states], "the sizes of the world's state blocks", at("world"), None, error)
    check_total([s.dim for s in spec.sensors], "the sensors' sizes", at("sensors"), None, error)
    check_total([a.dim for a in spec.areas], "the areas' sizes", at("areas"), None, error)
    check_total([link.dim for link in spec.links], "the links' sizes", at("links"), None, error)
    sizes = {b.name: b.dim for b in world.states}
    nodes = [s.name for s in spec.sensors] + [a.name for a in spec.areas]
    for what, items in (("states", world.states), ("sensors", spec.sensors), ("areas", spec.areas),
                        ("links", spec.links)):
        for item in items:
            name = item.id if what == "links" else item.name
            check_whole(item.dim, 1, MAX_TOTAL_DIM, at(f"{'world.' if what == 'states' else ''}{what}[{name}].dim"),
                        None, error)
    for b in world.states:
        for other in b.driven_by:
            check_known(other, sizes, "state", at(f"world.states[{b.name}].driven_by"), None, error)
    for s in spec.sensors:
        for state in s.observes:
            check_known(state, sizes, "state", at(f"sensors[{s.name}].observes"), None, error)
    for a in spec.areas:
        for state in a.tracks:
            check_known(state, sizes, "state", at(f"areas[{a.name}].tracks"), None, error)
        check_whole(a.lag, 0, MAX_LAG, at(f"areas[{a.name}].lag"), None, error)
        if a.level is not None:
            check_whole(a.level, 1, MAX_LEVEL, at(f"areas[{a.name}].level"), None, error)
        check_area(a, sizes, lambda key, a=a: (at(f"areas[{a.name}].{key}"), None), error)
    if spec.areas:
        deepest = max(spec.areas, key=lambda a: a.lag)
        check_lag_depth(world.dim, deepest.lag, at(f"areas[{deepest.name}].lag"), None, error)
    for link in spec.links:
        check_whole(link.delay, 1, MAX_DELAY, at(f"links[{link.id}].delay"), None, error)
    check_delay_states(spec.links, lambda link: (at(f"links[{link.id}].delay"), None), error)
    sensor_names = {s.name for s in spec.sensors}
    dims = {s.name: s.dim for s in spec.sensors} | {a.name: a.dim for a in spec.areas}
    ids = {link.id: link for link in spec.links}
    for link in spec.links:
        if link.kind not in LINK_KINDS:
            got = f"the text '{link.kind}'" if isinstance(link.kind, str) else repr(link.kind)
            _refuse(f"expected one of {', '.join(LINK_KINDS)}, got {got}",
                    suggest(link.kind, LINK_KINDS), at(f"links[{link.id}].kind"), None, error)
        for end in (link.source, link.target):
            check_known(end, nodes, "sensor or area", at(f"links[{link.id}]"), None, error)
        check_link_ends(link.source, link.target, link.kind, sensor_names,
                        lambda key, link=link: (at(f"links[{link.id}].{key}"), None), error)
        _check_link_pins(link, ids, dims, sensor_names, lambda gain, link=link: at(f"links[{link.id}].pin.{gain}"),
                         error)
    for a in spec.areas:
        if "M" in a.pin:
            check_shape(a.pin["M"], a.dim, a.dim, f"area `{a.name}` has size {a.dim}", at(f"areas[{a.name}].pin.M"),
                        None, error)
    link_ids = [link.id for link in spec.links]
    for b in spec.budgets:
        for link_id in b.links:
            check_known(link_id, link_ids, "link", at(f"budgets[{b.name}].links"), None, error)
    for b in world.states:
        why = f"the state `{b.name}` has size {b.dim}"
        for key, matrix in (("dynamics", b.dynamics), ("noise", b.noise)):
            where = at(f"world.states[{b.name}].{key}")
            check_shape(matrix, b.dim, b.dim, why, where, None, error)
            _check_entries(matrix, where, error)
        for other, matrix in b.driven_by.items():
            where = at(f"world.states[{b.name}].driven_by.{other}")
            check_shape(matrix, b.dim, sizes[other], f"rows: `{b.name}` has size {b.dim}; columns: "
                                                     f"`{other}` has size {sizes[other]}", where, None, error)
            _check_entries(matrix, where, error)
        check_covariance(b.noise, at(f"world.states[{b.name}].noise"), None, error)
    for s in spec.sensors:
        for state, matrix in s.observes.items():
            where = at(f"sensors[{s.name}].observes.{state}")
            check_shape(matrix, s.dim, sizes[state], f"rows: sensor `{s.name}` has size {s.dim}; columns: "
                                                     f"state `{state}` has size {sizes[state]}",
                        where, None, error)
            _check_entries(matrix, where, error)
        _check_entries(s.noise, at(f"sensors[{s.name}].noise"), error)
        check_covariance(s.noise, at(f"sensors[{s.name}].noise"), None, error)
    for a in spec.areas:
        for key in ("weight", "activity_price"):
            check_number(float(getattr(a, key)), at(f"areas[{a.name}].{key}"), None, error, minimum=0.0)
    for link in spec.links:
        where = at(f"links[{link.id}].noise")
        check_shape(link.noise, link.dim, link.dim, f"the link carries {link.dim} numbers", where, None, error)
        _check_entries(link.noise, where, error)
        check_covariance(link.noise, where, None, error)
        check_number(float(link.price), at(f"links[{link.id}].price"), None, error, minimum=0.0)
    area_names = [a.name for a in spec.areas]
    for b in spec.budgets:
        check_number(float(b.total), at(f"budgets[{b.name}].total"), None, error, minimum=0.0)
        for key in ("costs", "caps"):
            for link_id, x in getattr(b, key).items():
                check_known(link_id, b.links, "link", at(f"budgets[{b.name}].{key}"), None, error)
                check_number(float(x), at(f"budgets[{b.name}].{key}.{link_id}"), None, error, minimum=0.0)
        for area, x in b.activity.items():
            check_known(area, area_names, "area", at(f"budgets[{b.name}].activity"), None, error)
            check_number(float(x), at(f"budgets[{b.name}].activity.{area}"), None, error, minimum=0.0)
    check_world(world, at("world"), None, error)

    def link_place(link, key):
        place_, _ = _link_place(link, key)
        return at(place_), None

    check_costs(spec.links, spec.budgets, link_place, error)
    return spec
