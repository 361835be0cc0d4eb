"""The price form: multistart quasi-Newton over every free gain, polished in rounds
with the silent-link passes between them; above ``ACTIVE_GAINS`` free gains,
the active-set design on the links that carry power.
"""

from __future__ import annotations

import time

import numpy as np

from hierarchy.loop.closedloop import assemble
from hierarchy.loop.evaluate import loop_radius, score
from hierarchy.loop.gains import Gains, with_pins
from hierarchy.spec.model import Spec
from hierarchy.design.problem import Problem
from hierarchy.design.quasinewton import (
    CONVERGED,
    DENSE_LIMIT,
    F_FLOOR,
    FAILED,
    ITERATION_LIMIT,
    Outcome,
    STALL_GTOL,
    _Dense,
    _relative,
    minimise,
)
from hierarchy.design.result import DesignResult, Options
from hierarchy.design.subcircuit import embed, without_links
from hierarchy.design.silent import (
    MAX_STREAMS,
    STREAM_ITER,
    _link_powers,
    _receivers,
    _silence_reasons,
    _switch_off_fading,
    _tested_links,
    _wake_silent,
    _wake_streams,
)

__all__ = ['CHUNK', 'BALANCE_SNR', 'PRECONDITION_GAINS', 'ACTIVE_GAINS', 'ACTIVE_ROUNDS', 'ACTIVE_GAIN', 'WHOLE_SETTLES',
           'design_prices',
           'raise_unstable_pins']


#: Iterations between checks for links fading away.
CHUNK = 300
#: SNR above which a link's sender/receiver balance is walked directly.
BALANCE_SNR = 1e3
#: Above this many free gains the price form designs the active sub-circuit
#: (:func:`_solve_active`): the whole circuit would run on limited-memory
#: BFGS (``quasinewton.DENSE_LIMIT``), whose iterations there crawl, while
#: the links that carry power are few enough for the dense update.
ACTIVE_GAINS = DENSE_LIMIT
#: Rounds of the active-set design (sub-circuit design, then wake-up tests
#: in the whole circuit) before it stops changing links anyway.
ACTIVE_ROUNDS = 12
#: A round after a wake-up must lower the objective by more than this
#: (relative), or the active-set design stops there: waking modes that buy
#: 1e-8 of the objective each would otherwise take every round.
ACTIVE_GAIN = 1e-7
#: Free gains from which the dense quasi-Newton starts from the block-diagonal
#: Hessian (:func:`_preconditioner`).
PRECONDITION_GAINS = 300
#: Whole-circuit polishes of the active-set design: after one that lowers
#: the objective but is cut short (at 64 areas it woke a link in each of its
#: 8 wake-up passes and ended at the iteration limit), the rounds start
#: again from its design.
WHOLE_SETTLES = 3


def _solve_prices(prob: Problem, opts: Options, starts=None, polish_iter=None, wake=True):
    """Best L-BFGS outcome over the starts, polished (by default with the rest
    of the iteration budget; not at all with ``polish_iter=0``), then
    wake-up tests for silent links."""
    rng = np.random.default_rng(opts.seed)
    if starts is None:
        starts = [prob.pack(prob.informed_start())]
        starts += [prob.random_start(rng) for _ in range(max(0, opts.restarts - 1))]
    fun = prob.value_and_grad
    probes = []
    for x0 in starts:
        out = minimise(fun, x0, max_iter=min(opts.probe_iter, opts.max_iter), gtol=opts.gtol, ftol=opts.ftol,
                       unit=prob.units(x0), value=prob.value)
        probes.append(out)
    usable = [o for o in probes if np.isfinite(o.f)]
    if not usable:
        return probes[0], sum(o.iterations for o in probes), len(starts)
    best = min(usable, key=lambda o: o.f)
    iterations = sum(o.iterations for o in probes)
    if polish_iter is None:
        polish_iter = max(opts.max_iter - best.iterations, 1)
    if polish_iter > 0:
        more, extra = _polish(prob, best.x, opts, polish_iter, wake)
        iterations += extra
        best = more if more.f <= best.f else best
    return best, iterations, len(starts)


def _switched_off(prob: Problem, theta) -> list:
    """Links of ``prob`` whose every gain (and, for a prediction, the ``P``
    that subtracts it) is exactly zero at ``theta`` and none pinned: a
    design without them is this very design (the sub-circuit invariant)."""
    pinned = {l.id for l in prob.spec.links if l.pin}
    out = []
    for link in prob.spec.links:
        if link.id in pinned or (link.kind == "prediction" and f"{link.target}->{link.source}" in pinned):
            continue
        slices = prob.slices(link.id) + _receivers(prob, link)
        if slices and all(not np.any(theta[sl]) for sl in slices):
            out.append(link.id)
    return out


def _solve_active(prob: Problem, opts: Options, starts=None):
    """:func:`_solve_prices` for large circuits, on the links that carry power.

    After the starts' probes and one round on the whole circuit, the links
    that fade are switched off (group-tested) and the rest, the active
    sub-circuit, is designed on its own (with its own switch-off and wake-up
    tests, and ``opts.max_iter`` iterations). Its design, embedded with the
    switched-off links at zero, is a design of the whole circuit with the
    same scores (the sub-circuit invariant); there every silent link is
    tested for a profitable wake-up (alone, screened jointly, and in
    streams). A link that wakes joins the next active sub-circuit, and the
    cycle repeats until no link changes state (or a wake-up bought less than
    ``ACTIVE_GAIN`` of the objective). The result counts as
    converged in the whole circuit when its relative gradient there is no
    larger than in the sub-circuit (zero is a stationary point of a
    switched-off link, so the two agree unless such a link pulls); else the
    whole circuit is polished from it, and if that polish lowers the
    objective but is cut short, the rounds start again from its design (at
    most ``WHOLE_SETTLES`` polishes and ``ACTIVE_ROUNDS`` rounds in all).
    Same return as :func:`_solve_prices`."""
    best, iterations, nstarts = _solve_prices(prob, opts, starts, polish_iter=CHUNK, wake=False)
    if not np.isfinite(best.f):
        return best, iterations, nstarts
    off = _switch_off_fading(prob, best)
    theta = best.x if off is None else off
    rounds = 0
    for settle in range(WHOLE_SETTLES):
        best, theta, used, part, tiny, rounds = _active_rounds(prob, opts, best, theta, rounds)
        iterations += used
        # (A sub-circuit that converged by the stall rule, its objective no
        # longer falling at a relative gradient above gtol, leaves the whole
        # circuit converged by the same rule wherever its gradient there is
        # within STALL_GTOL: same point, same objective.)
        pulls = not (best.grad_norm <= part.grad_norm * 1.01 + opts.gtol
                     or (part.grad_norm > opts.gtol and best.grad_norm <= STALL_GTOL))
        if not (np.isfinite(best.f) and best.status == CONVERGED and (pulls or tiny)):
            break
        # The whole circuit's gradient is larger than the sub-circuit's (a
        # switched-off link pulls after all), or the rounds stopped trading
        # places: carry on in the whole circuit.
        more, used = _polish(prob, best.x, opts, opts.max_iter)
        iterations += used
        if not more.f <= best.f or (more.status == FAILED and not more.f < best.f and not pulls):
            # (A polish that fails without lowering the objective, from a
            # design already converged in the whole circuit (the rounds
            # stopped only because waking bought too little), says nothing
            # new: at 16 areas / 158 links, a line search at a badly
            # conditioned area M.)
            break
        best = more
        if more.status == CONVERGED or rounds >= ACTIVE_ROUNDS or settle == WHOLE_SETTLES - 1:
            break
        # Cut short in the whole circuit (where limited-memory BFGS creeps)
        # after lowering the objective: the links it woke join the active
        # sub-circuit, where the rounds can converge.
        off = _switch_off_fading(prob, best)
        theta = best.x if off is None else off
    return best, iterations, nstarts


def _active_rounds(prob: Problem, opts: Options, best, theta, rounds: int):
    """The rounds of :func:`_solve_active` from ``theta`` (``best``, the
    outcome it came from): design the active sub-circuit, wake-test the
    whole circuit, repeat. Returns ``(best, theta, iterations, last
    sub-circuit outcome, whether the rounds stopped trading places, rounds
    done so far)``."""
    spec = prob.spec
    iterations = 0
    before = None  # the last sub-circuit's problem and final curvature
    woken, tiny, part = None, False, best
    while rounds < ACTIVE_ROUNDS:
        rounds += 1
        sub = without_links(spec, _switched_off(prob, theta))
        keep = [prob.layout.link_index[l.id] for l in sub.links]
        subprob = Problem(sub, prob.prices[keep])
        x0 = subprob.pack(prob.unpack(theta))
        # A round after a wake-up starts with what the last one learnt about
        # the gains both sub-circuits share (from scratch it would need
        # about as many iterations as the first round).
        curvature = None if before is None else _carry_curvature(*before, subprob, x0)
        part, used = _polish(subprob, x0, opts, opts.max_iter, curvature=curvature)
        iterations += used
        if part.status == FAILED and curvature is not None:
            # The carried model can mislead where the new links change the
            # landscape (it may lead to where no step helps): start afresh.
            part, used = _polish(subprob, x0, opts, opts.max_iter)
            iterations += used
        before = (subprob, part.curvature)
        prob.solves += subprob.solves
        theta = prob.pack(embed(subprob.unpack(part.x), sub, spec))
        last, best = best, _outcome(prob, theta, part)
        if not np.isfinite(best.f) or best.status == FAILED:
            break
        tiny = woken is not None and not best.f < last.f - ACTIVE_GAIN * max(abs(last.f), F_FLOOR)
        narrow = _narrower(prob, {l.id for l in sub.links})
        woken = _wake_silent(prob, best, every=True, narrow=narrow)
        if woken is None:
            woken, used = _wake_streams(prob, best, opts, narrow=narrow)
            iterations += used
        if woken is None:
            # Nothing wakes at this design: its silent links are tested
            # here, whatever the last wake-up bought.
            prob.silence_checked = (best.f, _tested_links(prob, best))
            tiny = False
            break
        if tiny:
            # The last wake-up bought next to nothing and another one is on
            # offer: stop trading places; the whole circuit settles it below
            # (its polish tests the silent links at the design it returns).
            break
        theta = woken
    return best, theta, iterations, part, tiny, rounds


def _narrower(prob: Problem, active: set):
    """``narrow(ids)`` for the wake-up tests of the active-set design: the
    problem of the sub-circuit of ``prob`` on the links ``active`` plus
    ``ids``, at ``prob``'s prices."""
    spec = prob.spec

    def narrow(ids):
        keep = active | set(ids)
        return Problem(without_links(spec, [l.id for l in spec.links if l.id not in keep]),
                       prob.prices[[prob.layout.link_index[l.id] for l in spec.links if l.id in keep]])

    return narrow


def _carry_curvature(old: Problem, curvature, new: Problem, x0):
    """The curvature model ``curvature`` of ``old`` (as an outcome holds it:
    model and units) brought onto the gains of ``new`` at ``x0``: gains the
    two share keep what was learnt, new ones start uncoupled at a typical
    size; ``None`` if there is nothing to carry."""
    if curvature is None or not isinstance(curvature[0], _Dense) or curvature[0].H is None or new.size > DENSE_LIMIT:
        return None
    curv, unit = curvature
    where = {(owner, name): sl for owner, blocks in old.by_owner.items() for name, sl, _ in blocks}
    src, dst = [np.zeros(0, int)], [np.zeros(0, int)]
    for owner, blocks in new.by_owner.items():
        for name, sl, _ in blocks:
            was = where.get((owner, name))
            if was is not None and was.stop - was.start == sl.stop - sl.start:
                src.append(np.arange(was.start, was.stop))
                dst.append(np.arange(sl.start, sl.stop))
    src, dst = np.concatenate(src), np.concatenate(dst)
    if not len(src):
        return None
    H = np.triu(curv.H) + np.triu(curv.H, 1).T  # only the upper triangle is kept
    carried = _Dense()
    out = np.eye(new.size) * float(np.mean(np.diag(H)[src]))
    out[np.ix_(dst, dst)] = H[np.ix_(src, src)]
    carried.H = np.asfortranarray(out)
    units = new.units(x0)
    units[dst] = unit[src]
    return carried, units


def _outcome(prob: Problem, theta, like=None) -> Outcome:
    """An :class:`~hierarchy.design.quasinewton.Outcome` of ``prob`` at ``theta`` (status
    and message from ``like``, the search that reached it)."""
    f, g = prob.value_and_grad(theta)
    grel = float("inf") if g is None else _relative(f, g * prob.units(theta))
    if like is None:
        return Outcome(theta, f, grel, 0, CONVERGED, "")
    return Outcome(theta, f, grel, like.iterations, like.status, like.message)

def _polish(prob: Problem, x0, opts: Options, max_iter: int, wake: bool = True, settled: float = 0.0,
            curvature=None, precondition: bool = True):
    """Minimise from ``x0`` in rounds of at most ``CHUNK`` iterations. Between
    rounds, switch off links that are fading away, rebalance high-SNR links
    once a round ended on its own, and try to wake silent links or modes
    after any round that did not fail (unless ``wake`` is false). With ``settled``,
    also stop after a round that lowers the objective by at most that much
    (relative). The quasi-Newton curvature is carried from round to round
    (and starts from ``curvature``, as an outcome holds it, if given).
    Returns the best outcome and the iterations (stream trials included).

    ``max_iter`` bounds the descent; the stream trials have their own
    bound (``STREAM_ITER`` per stream, ``MAX_STREAMS`` streams, at most
    ``max_iter`` per pass, at most 8 passes), so that a test pass cannot use
    up the descent's allowance and leave the design unconverged for want of
    iterations (at 16 areas one pass took 3,000 of the 3,180 iterations).
    With ``precondition`` (the default) a fresh curvature model starts from
    the block-diagonal Hessian (:func:`_preconditioner`)."""
    best, x, iterations, wakes, balances = None, x0, 0, 0, 0
    trials0 = prob.trial_iterations  # stream trials count there, not against the descent
    last = prob.value(x0) if settled else None
    converged_f = np.inf  # objective at the last converged round
    while (descent := iterations - (prob.trial_iterations - trials0)) < max_iter:
        out = minimise(prob.value_and_grad, x, max_iter=min(CHUNK, max_iter - descent),
                       gtol=opts.gtol, ftol=opts.ftol, unit=prob.units(x), curvature=curvature, value=prob.value,
                       precondition=_preconditioner(prob) if precondition else None)
        iterations += out.iterations
        curvature = out.curvature
        # (Switching a link off may cost rounding, which the test allows.)
        if best is not None and not out.f <= best.f + 1e-12 * max(abs(best.f), F_FLOOR):
            break
        if best is not None and out.status != CONVERGED and not out.f < best.f:
            break  # a round without progress (a line search that cannot move) would repeat
        best = out
        if not np.isfinite(best.f):
            break
        if settled and last - best.f <= settled * abs(last):
            break
        last = best.f
        moved = _switch_off_fading(prob, best)
        if moved is None and best.status != ITERATION_LIMIT and balances < 20:
            moved = _balance_links(prob, best)
            balances += 1
        # Wake tests also after a round cut by the iteration limit: a link can
        # sit silent (a saddle) while the rest of the design still creeps.
        if wake and moved is None and best.status != FAILED and wakes < 8:
            moved = _wake_silent(prob, best)
            if moved is None and iterations - (prob.trial_iterations - trials0) < max_iter:
                moved, used = _wake_streams(prob, best, opts, min(STREAM_ITER * MAX_STREAMS, max_iter))
                iterations += used
                prob.trial_iterations += used
            if moved is None:
                prob.silence_checked = (best.f, _tested_links(prob, best))
            wakes += 1
        if best.status == CONVERGED:
            # Switching links off (or waking them) and converging again must
            # not raise the objective beyond rounding; otherwise the two only
            # trade places. (Wakes are also counted: each one lowers it.)
            if moved is None or best.f > converged_f + 1e-12 * max(abs(best.f), F_FLOOR):
                break
            converged_f = best.f
        if moved is not None and curvature is not None:
            # Gains set from outside (switched off, woken, rebalanced): their
            # old curvature would pull them straight back.
            curvature[0].forget(np.flatnonzero(moved != best.x))
        x = best.x if moved is None else moved
    return best, iterations


def _preconditioner(prob: Problem):
    """``minimise``'s ``precondition`` for ``prob``: the block-diagonal
    Hessian (:meth:`~hierarchy.design.problem.Problem.preconditioner`) for
    problems of ``PRECONDITION_GAINS`` to ``DENSE_LIMIT`` free gains, else
    ``None`` (below, a scaled identity learns the curvature in fewer
    evaluations than the blocks cost; above, the update is limited-memory)."""
    return prob.preconditioner if PRECONDITION_GAINS <= prob.size <= DENSE_LIMIT else None


def _balance_links(prob: Problem, best):
    """Rebalance links sent far above their noise.

    Scaling a link's sender gains by ``c`` and the gains that use its signal
    by ``1/c`` keeps every signal path and changes only the channel noise
    let through against the power paid. At high SNR this direction is a long
    flat valley beside a very steep one, where quasi-Newton steps stall and
    the objective's rounding hides the slope. So walk it directly: a parabola
    in ``log c`` through three evaluations per link, kept if it lowers the
    objective."""
    powers = _link_powers(prob, best.x)
    theta, f = best.x.copy(), best.f
    moved = False
    for link in prob.spec.links:
        noise = float(np.trace(link.noise))
        sender, receivers = prob.sender_slices(link.id), _receivers(prob, link)
        if noise <= 0 or powers[link.id] < BALANCE_SNR * noise or not sender or not receivers:
            continue

        def at(t):
            trial = theta.copy()
            for sl in sender:
                trial[sl] *= np.exp(t)
            for sl in receivers:
                trial[sl] *= np.exp(-t)
            return prob.value(trial), trial

        h = 0.05
        (fp, _), (fm, _) = at(h), at(-h)
        curvature = (fp - 2 * f + fm) / (2 * h * h)
        if not (np.isfinite(fp) and np.isfinite(fm)) or curvature <= 0:
            continue
        ft, trial = at(float(np.clip(-(fp - fm) / (4 * h * curvature), -2.0, 2.0)))
        if np.isfinite(ft) and ft < f - 1e-12 * max(abs(f), F_FLOOR):
            theta, f, moved = trial, ft, True
    return theta if moved else None


def design_prices(spec: Spec, options: Options | None = None, start: Gains | None = None,
                  prices=None) -> DesignResult:
    """Optimal gains under the spec's link prices (the price form).

    Parameters
    ----------
    spec : Spec
    options : Options, optional
    start : Gains, optional
        Warm start (free blocks are read from it; pins always win).
    prices : array_like, optional
        Per-link prices overriding the spec's (used by the budget form).

    Examples
    --------
    >>> from hierarchy import load_spec
    >>> res = design_prices(load_spec("specs/single-loop.yaml"))   # doctest: +SKIP
    >>> res.status                                                  # doctest: +SKIP
    'converged'
    """
    opts = options or Options()
    t0 = time.perf_counter()
    prob = Problem(spec, prices)
    starts = None
    if start is not None:
        base = with_pins(spec, start)
        starts = [prob.pack(base)]
    solve = _solve_active if prob.size > ACTIVE_GAINS else _solve_prices
    best, iterations, nstarts = solve(prob, opts, starts)
    return _finish(prob, best.x, best, iterations, nstarts, time.perf_counter() - t0, "price")


def _finish(prob: Problem, theta, best, iterations, nstarts, seconds, form, shadow=None) -> DesignResult:
    """Score ``theta`` exactly under the spec's own prices and wrap it up."""
    spec = prob.spec
    gains = prob.unpack(theta)
    status, message = best.status, best.message
    if not np.isfinite(best.f):
        raise_unstable_pins(prob)
        status, message = FAILED, "no stable design was found from any start"
    scores = score(prob.layout, gains)
    powers = {k: v.power for k, v in scores.links.items()}
    checked = getattr(prob, "silence_checked", None)
    tested = checked[1] if checked is not None and checked[0] == best.f else None
    silent = _silence_reasons(prob, powers, tested, shadow)
    return DesignResult(spec, status, message, gains, scores, scores.objective, form,
                        iterations=iterations, restarts=nstarts, evaluations=prob.solves,
                        seconds=seconds, grad_norm=best.grad_norm, silent=silent)


def raise_unstable_pins(prob: Problem):
    """If the pinned gains alone leave no usable loop, say why: scoring them
    names an unstable or too badly conditioned loop; what is left is a loop
    within ``SEARCH_MARGIN`` of the edge."""
    from hierarchy.errors import UnstableError

    if prob.size == 0:
        score(prob.layout, prob.pins)
        radius = loop_radius(assemble(prob.layout, prob.pins))
        raise UnstableError(f"the pinned gains make the closed loop unstable (spectral radius {radius:.4g})",
                            place="pin", fix="change the pinned matrices (for example a smaller M or K)")
