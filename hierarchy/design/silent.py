"""Silent links: switching fading links off, waking silent links and whole
silent streams, and the honest reason each silent link gives.
"""

from __future__ import annotations

import numpy as np

from hierarchy.loop.evaluate import link_covariances, link_powers
from hierarchy.design.problem import Problem
from hierarchy.design.quasinewton import F_FLOOR, minimise
from hierarchy.design.result import Options
from hierarchy.design.subcircuit import embed

__all__ = ['SILENT_FRACTION', 'FADING', 'WAKE_DELTAS', 'SCREEN_MIN', 'WAKE_GAIN', 'SCREEN_FLOOR', 'STREAM_ITER', 'MAX_STREAMS', 'STREAM_SCALES']


#: A link sending less than this fraction of its noise power (or of its
#: source's power, on a noiseless channel) counts as silent.
SILENT_FRACTION = 1e-6
#: A link sending less than this fraction of its noise power is tried switched off.
FADING = 1.0
#: Sizes of the trial signal that tests whether a silent link should wake.
WAKE_DELTAS = (1e-2, 1e-1)
#: Screen fully silent links together once there are more than this many.
SCREEN_MIN = 4
#: A wake-up must lower the objective by more than this (relative) to count.
WAKE_GAIN = 1e-12
#: The screen sends a link to the exact test only if the most its receiver
#: step can win back (its quadratic model, before the signal's cost) is at
#: least this fraction of ``WAKE_GAIN``: a trial direction in which the
#: sender's area holds no signal costs nothing and buys nothing. At 91
#: generated areas 583 of the 643 screened tests of one pass were such, their
#: possible gain below 1e-30 of the objective (the smallest of the other 60
#: was 1e-12; 7 of those woke), and the pass took 54 s.
SCREEN_FLOOR = 1e-3
#: Iterations a stream switched on gets to show that it pays.
STREAM_ITER = 150
#: Streams tried per wake-up pass (shortest first); links on streams beyond
#: this are reported as not tested.
MAX_STREAMS = 12
#: Sender gains of a woken stream, relative to the informed start's (SNR
#: near one): also a weak excursion, for a stream that only pays at a power
#: well below its noise (a tight budget or a high price).
STREAM_SCALES = (1.0, 0.1)


def _switch_off_fading(prob: Problem, best):
    """A link whose optimum is silence fades only slowly under any gradient
    method (its sender and receiver gains shrink together, a flat valley).
    Links far below their noise are switched off exactly, sender and
    receiver side (for a prediction into a sensor, the residual's ``P``),
    when that does not raise the objective: zero is then a stationary point
    that the solver keeps.

    The links are group-tested: all of them are switched off in one value
    evaluation, and a group is split in halves only when switching it off
    raises the objective, so a pass costs about ``2 r log(n / r)`` values
    for ``r`` links that must stay out of ``n`` fading ones instead of
    ``n`` (each half is tested with the links already switched off, as one
    by one in spec order would)."""
    powers = _link_powers(prob, best.x)
    fading = [sender + _receivers(prob, link) for link in prob.spec.links
              if (sender := prob.sender_slices(link.id))
              and powers[link.id] <= FADING * _silence_floor(prob, link) / SILENT_FRACTION * link.dim]
    bar = best.f + 1e-12 * max(abs(best.f), F_FLOOR)

    def switch_off(theta, group):
        trial = theta.copy()
        for slices in group:
            for sl in slices:
                trial[sl] = 0.0
        if not np.any(trial != theta):
            return theta
        f = prob.value(trial)
        if np.isfinite(f) and f <= bar:
            return trial
        if len(group) == 1:
            return theta
        half = len(group) // 2
        return switch_off(switch_off(theta, group[:half]), group[half:])

    theta = switch_off(best.x, fading) if fading else best.x
    return theta if np.any(theta != best.x) else None


def _receivers(prob: Problem, link) -> list:
    """Slices of the gains that make use of a link's signal: its ``K`` (none
    for a prediction into a sensor, which has no state) and, for a
    prediction, the ``P`` of the residual that subtracts it. Switching a
    link off must zero all of them: a ``P`` left alone keeps feeding the
    prediction's channel noise onwards, its gradient regrows the sender, and
    the link flips on and off from round to round."""
    slices = prob.receiver_slices(link.id)
    if link.kind == "prediction":
        slices = slices + prob.slices(f"{link.target}->{link.source}", "P")
    return slices


def _link_powers(prob: Problem, theta) -> dict:
    """Power of every link at ``theta`` (``inf`` for all if the loop is unstable)."""
    powers = link_powers(prob.layout, prob.unpack(theta))
    if powers is None:
        powers = np.full(len(prob.spec.links), np.inf)
    return {l.id: float(p) for l, p in zip(prob.spec.links, powers)}


def _silence_floor(prob: Problem, link) -> float:
    """Power per signal dimension below which a link (or one of its modes) is silent."""
    per_dim = float(np.trace(link.noise)) / link.dim or prob.node_scale[link.source] ** 2
    return SILENT_FRACTION * per_dim


def _silent_ids(prob: Problem, powers: dict) -> list:
    return [l.id for l in prob.spec.links
            if prob.sender_slices(l.id) and powers[l.id] <= _silence_floor(prob, l) * l.dim]


def _wake_silent(prob: Problem, best, every: bool = False, narrow=None):
    """Try to wake silent links and silent modes of vector links.

    Returns the point of the first wake-up that lowers the objective, or
    with ``every``, the point after waking, one after another, every link
    whose test lowers the objective from the point the ones before it left
    (one pass instead of a pass per link; for the active-set design, whose
    every wake-up costs a round); ``None`` if nothing wakes.

    A zero signal is a saddle of the bilinear products (K*S, P*G): the
    gradient there says nothing. So give the sender a small signal along an
    unused direction, let the gradient choose the receiver, and keep the
    point if the objective falls (the sign of the curvature at zero).

    Testing every silent link on its own costs a few evaluations per link
    and trial, minutes per pass at 64 areas. But with every link silent in
    full (sender and receiver at zero, so its receiver sees pure channel
    noise, independent of all else) the second derivatives of the objective
    do not couple one such link with another. So all of them are screened
    together (two evaluations per trial direction, :func:`_screen`), and only
    the links whose own quadratic model may fall get the exact test.

    ``narrow(ids)``, if given, names the problem of a sub-circuit of
    ``prob`` that holds the links ``ids`` and every link not switched off
    (as :func:`_wake_streams` takes it): the exact tests of the screened
    links then run there, at the cost of the links that carry power (the
    other switched-off links are exactly zero, so each test's objective is
    the whole circuit's: the sub-circuit invariant), and the point found is
    embedded back (at 91 generated areas, 20,548 gains of which about 600
    are active, a whole-circuit pass took 64 s, 54 s this way)."""
    theta0, f0 = best.x, best.f
    covs = link_covariances(prob.layout, prob.unpack(theta0))
    if covs is None:
        return None
    rng = np.random.default_rng(12345)
    tests = []  # (sender slice, receiver slices, directions by trial, screened together)
    for cov, link in zip(covs, prob.spec.links):
        block = prob.sender_block(link.id)
        if block is None:
            continue
        sl, shape = block
        w, V = np.linalg.eigh(cov)
        dead = V[:, w <= _silence_floor(prob, link)]
        if dead.shape[1] == 0:
            continue
        dirs = []
        for trial in range(3):
            v = dead @ (rng.standard_normal(dead.shape[1]) if trial else np.ones(dead.shape[1]))
            r = rng.standard_normal(shape[1]) if trial else np.ones(shape[1])
            dirs.append(np.outer(v / np.linalg.norm(v), r / np.linalg.norm(r)).ravel())
        rsl = _receivers(prob, link)
        if rsl:
            # (A noiseless link's receiver curvature comes from the trial
            # signals themselves, which do couple links: tested alone.)
            tests.append((sl, rsl, dirs, dead.shape[1] == link.dim and np.trace(link.noise) > 0, link.id))
    full = [k for k, t in enumerate(tests) if t[3]]
    hopeful = None
    if len(full) > SCREEN_MIN:
        hopeful = _screen(prob, theta0, [tests[k] for k in full])
        if hopeful is not None:
            hopeful = {(full[k], trial, delta) for k, trial, delta in hopeful}
    screened_in = set() if hopeful is None else {key[0] for key in hopeful}
    chosen = [k for k, t in enumerate(tests) if not t[3] or hopeful is None or k in screened_in]
    p = prob
    if narrow is not None and chosen:
        p = narrow([tests[k][4] for k in chosen])
        theta0 = p.pack(prob.unpack(theta0))
        f0 = p.value(theta0)
    found = None
    for k in chosen:
        sl, rsl, dirs, in_full, lid = tests[k]
        if p is not prob:
            sl, rsl = p.sender_block(lid)[0], _receivers(p, p.spec.link(lid))
        for trial, direction in enumerate(dirs):
            for delta in WAKE_DELTAS:
                if in_full and hopeful is not None and (k, trial, delta) not in hopeful:
                    continue
                theta = theta0.copy()
                theta[sl] += delta * direction
                woken = _best_receiver_step(p, theta, rsl, f0)
                if woken is not None:
                    if not every:
                        if p is not prob:
                            prob.solves += p.solves
                        return _embedded(prob, p, woken)
                    found = theta0 = woken
                    f0 = p.value(woken)
                    break
            else:
                continue
            break  # this link woke: on to the next one
    if p is not prob:
        prob.solves += p.solves
    return None if found is None else _embedded(prob, p, found)


def _embedded(prob: Problem, p: Problem, theta):
    """``theta`` of ``p`` (``prob`` or a sub-circuit of it) as a point of ``prob``."""
    return theta if p is prob else prob.pack(embed(p.unpack(theta), p.spec, prob.spec))


def _flow(prob: Problem, silent: set):
    """Nodes that world information reaches along links that carry power
    (from the sensors) and nodes whose signal reaches a target that way."""
    import networkx as nx

    spec = prob.spec
    g = nx.DiGraph((l.source, l.target) for l in spec.links if l.id not in silent)
    informed = {s.name for s in spec.sensors}
    useful = {a.name for a in spec.areas if a.has_target and a.weight > 0}
    informed |= {n for s in informed if s in g for n in nx.descendants(g, s)}
    useful |= {n for t in useful if t in g for n in nx.ancestors(g, t)}
    return informed, useful


def _path(links, starts, goals, forward: bool):
    """Fewest ``links`` from a node in ``starts`` to one in ``goals`` (along
    the links' direction if ``forward``, else against it), or ``None``."""
    if starts & goals:
        return []
    step = {}
    for l in links:
        a, b = (l.source, l.target) if forward else (l.target, l.source)
        step.setdefault(a, []).append((b, l))
    seen, frontier = set(starts), [(n, []) for n in starts]
    while frontier:
        nxt = []
        for node, path in frontier:
            for other, l in step.get(node, ()):
                if other in seen:
                    continue
                if other in goals:
                    return path + [l]
                seen.add(other)
                nxt.append((other, path + [l]))
        frontier = nxt
    return None


def _streams(prob: Problem, powers: dict):
    """Streams of silent links that only pay when all of them are on.

    A silent link whose sender hears nothing of the world (no carrying path
    from a sensor reaches it) or whose receiver passes nothing on to a target
    cannot show its worth alone: a small signal on it changes no error. Nor
    can a link into an area that hears nothing else (its memory is
    arbitrary until something arrives). Its
    stream is the link with the fewest silent links that bring the world to
    its sender and carry its signal on to a target.

    Returns ``(streams, dead)``: the distinct streams (tuples of link ids,
    shortest first) and the orphan links that no stream can serve."""
    silent = set(_silent_ids(prob, powers))
    informed, useful = _flow(prob, silent)
    quiet = [l for l in prob.spec.links if l.id in silent]
    streams, dead = {}, []
    for l in quiet:
        # A link into an area that hears nothing else is a stream of one: that
        # area's memory is flat while it hears nothing, so a small signal
        # tested at whatever memory it has can miss what the link is worth.
        if not prob.sender_slices(l.id) or (l.source in informed and l.target in useful
                                            and l.target in informed):
            continue
        before = _path(quiet, {l.source}, informed, forward=False)
        after = _path(quiet, {l.target}, useful, forward=True)
        if before is None or after is None:
            dead.append(l.id)
            continue
        ids = tuple(sorted({l.id} | {x.id for x in before} | {x.id for x in after}))
        streams.setdefault(ids, None)
    return sorted(streams, key=len), dead


def _wake_streams(prob: Problem, best, opts: Options, budget: int = STREAM_ITER * MAX_STREAMS, narrow=None):
    """Switch whole silent streams on and see whether they pay.

    Along a stream of two or more silent links the objective is flat to
    every order a one-link test can see (the first link's signal reaches no
    target until the next one carries it). Near zero the curvature along the
    stream only turns negative once the downstream gains have a finite size,
    so the test is a finite excursion: every gain of the stream (and the
    memory ``M`` of the areas it passes through that hear nothing else) is
    set to the informed start's values, near an SNR of one, and the quasi-
    Newton method gets ``STREAM_ITER`` iterations to bring the rest of the
    design along, within ``budget`` iterations in all. Returns the lowest
    point that beats ``best`` (or ``None``) and the iterations used.

    ``narrow(ids)``, if given, names the problem of a sub-circuit of
    ``prob`` that holds the stream ``ids`` (the active-set design passes the
    active links plus the stream): the excursion runs there, on the links
    that can carry power, and a winner is embedded back."""
    powers = _link_powers(prob, best.x)
    streams, dead = _streams(prob, powers)
    prob.stream_cover = {lid: None for lid in dead}
    used = 0
    if not streams:
        return None, used
    if getattr(prob, "_informed_theta", None) is None:
        prob._informed_theta = prob.pack(prob.informed_start())
    silent = set(_silent_ids(prob, powers))
    informed, _ = _flow(prob, silent)
    winner, winner_x = None, None
    subs = {}  # a stream's sub-circuit problem, built once for all its scales
    trials = [(ids, scale) for ids in streams[:MAX_STREAMS] for scale in STREAM_SCALES]
    for ids, scale in trials:
        if budget - used < 1:
            break
        if narrow is not None and tuple(ids) not in subs:
            subs[tuple(ids)] = narrow(ids)
        p = prob if narrow is None else subs[tuple(ids)]
        theta = best.x.copy() if p is prob else p.pack(prob.unpack(best.x))
        ref = prob._informed_theta if p is prob else p.pack(prob.unpack(prob._informed_theta))
        links = [prob.spec.link(lid) for lid in ids]
        for link in links:
            for sl in p.slices(link.id) + _receivers(p, link):
                theta[sl] = ref[sl]
            for sl in p.sender_slices(link.id):
                theta[sl] *= scale
        for node in {l.source for l in links} | {l.target for l in links}:
            if node not in informed:
                for sl in p.slices(node, "M"):
                    theta[sl] = ref[sl]
        for _ in range(12):  # the woken receivers must leave the loop stable
            if np.isfinite(p.value(theta)):
                break
            for link in links:
                for sl in p.receiver_slices(link.id):
                    theta[sl] *= 0.5
        else:
            continue
        solves = p.solves
        out = minimise(p.value_and_grad, theta, max_iter=min(STREAM_ITER, budget - used), gtol=opts.gtol,
                       ftol=opts.ftol, unit=p.units(theta), value=p.value)
        used += out.iterations
        if p is not prob:
            prob.solves += p.solves - solves
        for lid in ids:
            prob.stream_cover.setdefault(lid, ids)
        bar = best.f if winner is None else winner.f
        if np.isfinite(out.f) and out.f < bar - 1e-9 * max(abs(bar), F_FLOOR):
            winner = out
            winner_x = _embedded(prob, p, out.x)
    return winner_x, used


def _tested_links(prob: Problem, best) -> dict:
    """How each silent link at ``best`` was tested by the wake-up pass that
    found nothing: ``"alone"``, a stream (tuple of ids) or ``None`` (no
    stream from a sensor to a target can pass through it)."""
    powers = _link_powers(prob, best.x)
    cover = getattr(prob, "stream_cover", {})
    out = {}
    streams, dead = _streams(prob, powers)
    orphans = {lid for s in streams for lid in s} | set(dead)
    for lid in _silent_ids(prob, powers):
        if lid in orphans:
            if lid in cover:
                out[lid] = cover[lid]
        else:
            out[lid] = "alone"
    return out


def _screen(prob: Problem, theta0, tests):
    """``(test, trial, delta)`` of the fully silent links whose quadratic
    model along the trial direction may fall; ``None`` if it cannot tell.

    For each trial direction ``E_l`` of every link at once: the gradient at
    ``theta0 + delta E`` gives each link's sender curvature ``a_l`` (the
    power's price and error cost) and its receiver gradient ``g_l``; a
    second gradient, with every receiver stepped along ``-g_l``, gives each
    receiver curvature ``c_l``. A link is hopeful when the best receiver step
    could win back half of what the signal costs: ``|g_l|^2 / c_l >= a_l
    delta^2 / 2`` (the exact test then decides), and that step's gain
    ``|g_l|^2 / (2 c_l)`` is at least ``SCREEN_FLOOR`` of the exact test's bar."""
    f0, g0 = prob.value_and_grad(theta0)
    if g0 is None:
        return None
    out, step = set(), 1e-3
    floor = SCREEN_FLOOR * WAKE_GAIN * max(abs(f0), F_FLOOR)
    for trial in range(len(tests[0][2])):
        for delta in WAKE_DELTAS:
            E = np.zeros_like(theta0)
            for sl, rsl, dirs, *_ in tests:
                E[sl] = dirs[trial]
            _, gp = prob.value_and_grad(theta0 + delta * E)
            if gp is None:
                return None
            norms = [np.sqrt(sum(float(np.sum((gp[r] - g0[r]) ** 2)) for r in rsl)) for _, rsl, *_ in tests]
            D = np.zeros_like(theta0)
            for (_, rsl, *_), n in zip(tests, norms):
                for r in rsl:
                    D[r] = -(gp[r] - g0[r]) / n if n > 0 else 0.0
            _, gq = prob.value_and_grad(theta0 + delta * E + step * D)
            if gq is None:
                return None
            for k, ((sl, rsl, dirs, *_), n) in enumerate(zip(tests, norms)):
                if n == 0:
                    continue
                c = sum(float((gq[r] - gp[r]) @ D[r]) for r in rsl) / step
                a = float((gp[sl] - g0[sl]) @ dirs[trial]) / delta
                if c > 0 and n * n / (2 * c) < floor:
                    continue  # cannot win back even the exact test's bar
                if c <= 0 or a <= 0 or n * n / c >= 0.5 * a * delta * delta:
                    out.add((k, trial, delta))
    return out


def _best_receiver_step(prob: Problem, theta, receiver_slices, f0):
    """Along minus the receiver gradient, step to the minimum of a parabola
    fitted through the objective; return the point if it beats ``f0``."""
    if not receiver_slices:  # every gain that could use the signal is pinned
        return None
    f, g = prob.value_and_grad(theta)
    if g is None:
        return None
    d = np.zeros_like(theta)
    for sl in receiver_slices:
        d[sl] = -g[sl]
    norm = np.linalg.norm(d)
    if norm == 0:
        return None
    d /= norm
    slope, t = -norm, 1e-3
    ft = prob.value(theta + t * d)
    if not np.isfinite(ft):
        return None
    curvature = 2 * (ft - f - slope * t) / t ** 2
    step = -slope / curvature if curvature > 0 else 10 * t
    for s in (step, 0.5 * step, 0.1 * step):
        fs = prob.value(theta + s * d)
        if np.isfinite(fs) and fs < f0 - WAKE_GAIN * max(abs(f0), F_FLOOR):
            return theta + s * d
    return None


def _silence_reasons(prob: Problem, powers, tested=None, shadow=None) -> dict:
    """For each silent link, why: what the wake-up pass at this very design
    tested and found (``tested``, from :func:`_tested_links`), or that it was
    not tested there, in which case nothing is claimed. In budget form,
    ``shadow`` says per link which shadow prices make up its price."""
    tested, shadow = tested or {}, shadow or {}
    out = {}
    for lid in _silent_ids(prob, powers):
        i = prob.layout.link_index[lid]
        price = float(prob.prices[i])
        how = tested.get(lid, "untested")
        cost = (f"each unit of power costs {price:.4g}" + (f" ({shadow[lid]})" if lid in shadow else "")
                + " and buys less than that in error" if price > 0 else "it buys no lower error")
        if how == "alone":
            reason, verdict = f"no small signal on this link lowers the objective: {cost}", "not worth sending"
        elif how is None:
            reason = "no path of links from a sensor to a target passes through it: it has nothing useful to carry"
            verdict = "not worth sending"
        elif how == "untested":
            reason = ("silent at this design, but the wake-up test did not run here (iteration limit or test "
                      "budget): it may yet be worth sending")
            verdict = "untested"
        else:
            reason = (f"its stream ({', '.join(how)}) only pays with all of it on; switched on together and "
                      f"re-designed, it did not lower the objective: {cost}")
            verdict = "not worth sending"
        out[lid] = {"price": price, "noise_power": float(np.trace(prob.spec.link(lid).noise)),
                    "verdict": verdict, "tested": "stream" if isinstance(how, tuple) else
                    ("unreachable" if how is None else how),
                    "stream": list(how) if isinstance(how, tuple) else None, "reason": reason}
    return out
