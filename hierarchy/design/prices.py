"""The price form: multistart quasi-Newton over every free gain, polished in rounds
with the silent-link passes between them.
"""

from __future__ import annotations

import time

import numpy as np

from hierarchy.loop.closedloop import assemble
from hierarchy.loop.evaluate import loop_radius, score
from hierarchy.loop.gains import Gains, with_pins
from hierarchy.spec.model import Spec
from hierarchy.design.problem import Problem
from hierarchy.design.quasinewton import CONVERGED, F_FLOOR, FAILED, ITERATION_LIMIT, minimise
from hierarchy.design.result import DesignResult, Options
from hierarchy.design.silent import (
    _link_powers,
    _receivers,
    _silence_reasons,
    _switch_off_fading,
    _tested_links,
    _wake_silent,
    _wake_streams,
)

__all__ = ['CHUNK', 'BALANCE_SNR', 'design_prices', 'raise_unstable_pins']


#: Iterations between checks for links fading away.
CHUNK = 300
#: SNR above which a link's sender/receiver balance is walked directly.
BALANCE_SNR = 1e3


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


def _polish(prob: Problem, x0, opts: Options, max_iter: int, wake: bool = True, settled: float = 0.0):
    """Minimise from ``x0`` in rounds of at most ``CHUNK`` iterations. Between
    rounds, switch off links that are fading away, rebalance high-SNR links
    once a round ended on its own, and try to wake silent links or modes
    after any round that did not fail (unless ``wake`` is false). With ``settled``,
    also stop after a round that lowers the objective by at most that much
    (relative). The quasi-Newton curvature is carried from round to round.
    Returns the best outcome and the iterations."""
    best, x, iterations, wakes, balances = None, x0, 0, 0, 0
    last = prob.value(x0) if settled else None
    converged_f = np.inf  # objective at the last converged round
    curvature = None
    while iterations < max_iter:
        out = minimise(prob.value_and_grad, x, max_iter=min(CHUNK, max_iter - iterations),
                       gtol=opts.gtol, ftol=opts.ftol, unit=prob.units(x), curvature=curvature, value=prob.value)
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
            if moved is None and iterations < max_iter:
                moved, used = _wake_streams(prob, best, opts, max_iter - iterations)
                iterations += used
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
    best, iterations, nstarts = _solve_prices(prob, opts, starts)
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
    """If the pinned gains alone make the loop unstable, say which."""
    from hierarchy.errors import UnstableError

    if prob.size == 0:
        radius = loop_radius(assemble(prob.layout, prob.pins))
        raise UnstableError(f"the pinned gains make the closed loop unstable (spectral radius {radius:.4g})",
                            place="pin", fix="change the pinned matrices (for example a smaller M or K)")
