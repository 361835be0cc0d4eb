"""The budget form: every budget of the spec met, with its shadow price.
"""

from __future__ import annotations

import time

import numpy as np

from hierarchy.loop.evaluate import link_powers, score
from hierarchy.loop.gains import Gains, with_pins
from hierarchy.spec.model import Spec
from hierarchy.design.problem import Problem
from hierarchy.design.quasinewton import CONVERGED, DENSE_LIMIT, FAILED, ITERATION_LIMIT, STALL_GTOL, _relative, minimise
from hierarchy.design.prices import CHUNK, _finish, _polish, _solve_prices
from hierarchy.design.result import BUDGET_TOL, BudgetUse, DesignResult, Options
from hierarchy.design.silent import _link_powers, _receivers, _silence_floor

__all__ = ['design_budgets', 'BLOCK_ITER', 'BLOCK_SETTLED', 'BUDGET_ITER', 'LIMITED_BUDGET_ITER', 'SPREAD', 'COARSE_TOL', 'COARSE_STEPS', 'IDLE_STEPS', 'MU_SETTLED', 'BUDGET_FTOL']


def design_budgets(spec: Spec, options: Options | None = None, start: Gains | None = None) -> DesignResult:
    """Optimal gains with every budget of the spec met (the budget form).

    Minimises the weighted error (plus any priced terms) subject to the
    spec's budgets (linear constraints on link powers and areas' activity,
    see :mod:`hierarchy.design.allocation`) and reports each budget's shadow price:
    the Lagrange multiplier at the returned design, i.e. how fast the
    objective falls per unit of extra budget.

    Block coordinate descent over two blocks. The gains block is the price
    form's quasi-Newton on the Lagrangian, at link prices ``lambda = W' mu``
    (and activity prices ``V' mu``) set by the current multipliers,
    warm-started and cut after ``BLOCK_ITER`` iterations. The allocation
    block is a convex program over link powers
    (:class:`~hierarchy.design.allocation.Allocation`), calibrated at the current
    design by the exact slope of the objective in each link's power; its
    dual values are the next multipliers. Every step is cheap (a few dozen
    evaluations and one small conic solve). At a fixed point the design is
    stationary at prices ``W' mu`` and the budgets hold with complementary
    slackness: a KKT point of the budget form. The steps go on until the
    budgets are spent to ``budget_rtol`` at a converged gains block, and the
    links are then scaled to meet them exactly. When the gains stop
    answering the multipliers' changes (``IDLE_STEPS`` steps in a row need
    no iteration), or the multipliers settle (``IDLE_STEPS`` converged steps
    in a row move them by less than ``MU_SETTLED``) while the miss wanders
    at the gains' resolution, the scaling closes the miss left, and the
    design counts as converged only if its gains are then stationary to
    ``STALL_GTOL`` (the quasi-Newton's rule where no step helps; the
    settled exit is only taken where that holds); the message says so
    either way.

    A budget of total 0 switches its links off; its shadow price is the
    largest marginal value of power at zero over its links
    (:func:`_marginal_at_zero`).

    Examples
    --------
    >>> res = design_budgets(load_spec("specs/two-senses.yaml"))   # doctest: +SKIP
    >>> res.budgets["upward"].shadow_price                         # doctest: +SKIP
    0.031...
    """
    from hierarchy.design.allocation import constraints

    from dataclasses import replace

    opts = options or Options()
    opts = replace(opts, ftol=min(opts.ftol, BUDGET_FTOL))
    t0 = time.perf_counter()
    every = constraints(spec)
    zero = every.totals <= 0
    off = {spec.links[i].id for g in np.flatnonzero(zero) for i in np.flatnonzero(every.W[g])}
    work = _switched_off(spec, off)
    rows = every.subset(~zero)
    bcd = _BlockDescent(work, rows, opts)
    starts = None if start is None else [bcd.ref.pack(with_pins(work, start))]
    best, iterations, nstarts, message = bcd.run(starts)
    prob = bcd.prob
    if rows.has_activity:
        # Score under the spec's own activity prices, not the Lagrangian's.
        ref = bcd.ref
        ref.prices = prob.prices.copy()
        ref.evaluations, ref.values, ref.solves = prob.evaluations, prob.values, prob.solves
        for attr in ("silence_checked", "stream_cover"):
            if hasattr(prob, attr):
                setattr(ref, attr, getattr(prob, attr))
        prob = ref
    theta = _meet_budgets(prob, best.x, rows, bcd.mu)
    closing = ""  # said of a converged design too
    if bcd.stalled_at is not None:
        # Judged as the quasi-Newton judges a point where no step helps.
        f, g = bcd.prob.value_and_grad(theta)
        grel = np.inf if g is None else _relative(f, g * bcd.prob.units(theta))
        why = ("the block steps stalled" if bcd.stall_kind == "stalled" else
               f"the budgets' prices settled (within {MU_SETTLED:g} over {IDLE_STEPS} block steps)")
        closing = (f"{why} with the budgets missed by {bcd.stalled_at:.1e} (relative) and the "
                   f"links were scaled to meet them; the gains are stationary there to a relative gradient of "
                   f"{grel:.1e}")
        if grel > STALL_GTOL:
            message, closing = closing, ""
    result = _finish(prob, theta, best, iterations, nstarts, time.perf_counter() - t0, "budget",
                     shadow=_shadow_text(spec, rows, bcd.mu))
    result.spec = spec
    powers = np.array([result.scores.links[l.id].power for l in spec.links])
    activity = np.array([result.scores.areas[a.name].activity for a in spec.areas])
    mu_all = np.zeros(len(every.names))
    mu_all[~zero] = bcd.mu
    if np.any(zero):
        mu_all[zero] = _zero_prices(spec, result.gains, every, zero, mu_all)
    used = every.used(powers, activity)
    for g, (name, total, u, m, links) in enumerate(zip(every.names, every.totals, used, mu_all, every.links)):
        costs = {spec.links[i].id: float(every.W[g, i]) for i in np.flatnonzero(every.W[g])}
        areas = {a.name: float(every.V[g, k]) for k, a in enumerate(spec.areas) if every.V[g, k]}
        result.budgets[name] = BudgetUse(name, float(total), float(u), float(m), links, costs, areas,
                                         every.cap_of[g])
    for lid in off:
        result.silent[lid] = _off_reason(spec, lid, every, zero, mu_all)
    unmet = [b.name for b in result.budgets.values() if not b.met]
    if unmet:
        result.status = FAILED
        message = (message + "; " if message else "") + f"budget(s) not met: {', '.join(unmet)}"
    elif message and result.status == CONVERGED:
        result.status = ITERATION_LIMIT
    said = message or closing
    if said:
        result.message = f"{result.message}; {said}" if result.message else said
    return result


#: Gains-block iterations per step of the block coordinate descent at
#: first; doubled (up to CHUNK) after each step that moves the multipliers
#: by less than BLOCK_SETTLED (relative), since the design then only has to
#: follow small price changes and its own slow directions.
BLOCK_ITER = 40
BLOCK_SETTLED = 1e-2
#: The budget form may use this times ``max_iter`` iterations in all (the
#: price form's polish, plus the steps that follow the multipliers). At 16
#: generated areas the polish alone takes the whole ``max_iter``, and the
#: block steps after it need about 1,500 more (twice ``max_iter`` ended at
#: the limit there). Circuits whose gains block runs on limited-memory BFGS
#: (above ``DENSE_LIMIT`` free gains) get ``LIMITED_BUDGET_ITER``: at 32
#: areas four times ``max_iter`` doubled the time and still ended at the
#: limit.
BUDGET_ITER = 4
LIMITED_BUDGET_ITER = 2
#: The allocation's trust region: powers within [p / spread, p spread].
SPREAD = (1.05, 2.0, 8.0)  # (smallest, first, largest)
#: Budgets within this (relative) of their totals, or this many cheap
#: steps, call for the full polish with wake-up tests (the price form's own
#: polish, up to ``max_iter``) at the multipliers reached; the steps after
#: it follow the smaller price changes that remain.
COARSE_TOL = 1e-2
COARSE_STEPS = 25
#: Block steps in a row whose gains step needs no iteration at all before the
#: block descent leaves the rest of the budgets' miss to the exact scaling.
IDLE_STEPS = 3
#: Multipliers that move by less than this (relative) in IDLE_STEPS converged
#: block steps in a row have settled: the budgets' miss left is the gains'
#: own resolution, and the exact scaling is tried on it.
MU_SETTLED = 5e-3
#: The gains block's ``ftol`` in the budget form (at most). A gains step
#: that stops because the objective stopped falling is stationary only to
#: ``STALL_GTOL``, and a multiplier read from it is then off by about that
#: relative gradient times ``objective / (mu x total)``: on a generated
#: 4-area circuit whose budget is worth 1e-3 of the objective, 4e-4 at the
#: default ``ftol`` of 1e-12; at 1e-14 the steps end on the gradient
#: (8e-8) and the shadow prices agree with finite differences to 4e-5, in
#: the same time.
BUDGET_FTOL = 1e-14
#: (The gains block does not start from the block-diagonal Hessian that the
#: price form uses: in ``benchmarks/budgets.py`` it led the 8-area total
#: budget to a design 1.1e-3 higher and left the 16-area overlapping
#: budgets unconverged, while in ``benchmarks/scale.py`` it made 16 areas /
#: 111 links converge; on balance, not kept.)


class _BlockDescent:
    """State of the budget form's block coordinate descent (see
    :func:`design_budgets`): the problem at the current prices, the
    multipliers ``mu`` and the allocation program."""

    def __init__(self, spec: Spec, rows, opts: Options):
        from hierarchy.design.allocation import Allocation

        self.spec, self.rows, self.opts = spec, rows, opts
        self.ref = Problem(spec)  # the spec's own prices: the objective
        self.base = self.ref.prices.copy()
        self.kappa = np.array([a.activity_price for a in spec.areas])
        noise = np.array([float(np.trace(l.noise)) for l in spec.links])
        self.alloc = Allocation(rows, np.where(noise > 0, noise, 1.0))
        self.mu = np.zeros(len(rows.names))
        self.prob = self.ref
        self.settled = False  # whether the last gains step ended stationary
        self.stalled_at = None  # the budgets' miss the block steps left to the scaling
        self.stall_kind = ""  # why they left it: "stalled" or "settled"
        # A link in no budget row, or whose sender is pinned, keeps its power.
        self.fixed = ~np.any(rows.W > 0, axis=0) | np.array(
            [not self.ref.sender_slices(l.id) for l in spec.links])

    def set_prices(self, mu):
        """Make ``self.prob`` the Lagrangian at multipliers ``mu``."""
        self.mu = np.maximum(np.asarray(mu, float), 0.0)
        if self.rows.has_activity:
            from dataclasses import replace

            kappa = self.kappa + self.rows.V.T @ self.mu
            areas = tuple(replace(a, activity_price=float(k)) for a, k in zip(self.spec.areas, kappa))
            counts = self.prob.evaluations, self.prob.values, self.prob.solves, self.prob.trial_iterations
            self.prob = Problem(replace(self.spec, areas=areas))
            # One count over the whole design.
            self.prob.evaluations, self.prob.values, self.prob.solves, self.prob.trial_iterations = counts
        self.prob.prices = self.base + self.rows.W.T @ self.mu

    def measure(self, theta):
        """Powers, activity and slopes ``dJ/dP_l`` at ``theta``, or ``None``
        when the loop is unstable.

        The slope of link ``l`` is read along the direction that scales its
        sender by ``c`` and what uses its signal by ``1/c`` (the signal path
        stays, only its SNR moves): ``dL/dlog c / (2 P_l) - lambda_l``, with
        ``L`` the Lagrangian at the current prices. The other links' powers
        that this direction moves (a prediction's residual passes less of
        its noise) are thus valued at their prices, and at a stationary
        point the slope is exactly ``-lambda_l``."""
        from hierarchy.loop.evaluate import flat_cost_and_gradient

        key = (id(self.prob), theta.tobytes())
        if getattr(self, "_measured", (None,))[0] == key:
            return self._measured[1]
        prob, seen = self.prob, []

        def prices(powers):
            seen.append(np.asarray(powers, float))
            return prob.prices

        J, g, _ = flat_cost_and_gradient(prob.layout, prob.flat(theta), prices)
        if g is None:
            return None
        grad = prob.free_factor * g[prob.free_at]
        powers = seen[0]
        slopes = np.zeros(len(powers))
        for i, link in enumerate(self.spec.links):
            if self.fixed[i] or powers[i] <= _silence_floor(prob, link) * link.dim:
                continue
            d = sum(float(grad[sl] @ theta[sl]) for sl in prob.sender_slices(link.id))
            d -= sum(float(grad[sl] @ theta[sl]) for sl in _receivers(prob, link))
            slopes[i] = d / (2.0 * powers[i]) - prob.prices[i]
        activity = np.zeros(len(self.spec.areas))
        if self.rows.has_activity:
            sc = score(prob.layout, prob.unpack(theta))
            activity = np.array([sc.areas[a.name].activity for a in self.spec.areas])
        self._measured = (key, (powers, activity, slopes))
        self.value = J
        return powers, activity, slopes

    def allocate(self, theta, spread):
        """The allocation block at ``theta``: new multipliers (or ``None``)."""
        m = self.measure(theta)
        if m is None:
            return None
        powers, activity, slopes = m
        silent = np.array([p <= _silence_floor(self.prob, l) * l.dim for p, l in zip(powers, self.spec.links)])
        out = self.alloc.solve(powers, slopes, activity, spread, fixed=self.fixed | silent)
        if out is None:
            return None
        p, mu = out
        self.allocated = (theta, powers, p)
        # The trust region in prices: a multiplier moves by at most spread^2
        # (as the Gaussian-channel power p ~ lambda^-1/2 would for a change
        # of spread in power). Where the box, not the budget, binds (links at
        # the top of the region) the dual says nothing of the true price, so
        # a multiplier falls to zero only for a row the model leaves slack
        # with no link at the box.
        old = self.mu
        if spread >= 1e3:
            return mu
        at_top = (p >= (1 - 1e-6) * spread * powers) & (powers > 0)
        boxed = np.array([np.any(at_top[w > 0]) for w in self.rows.W])
        slack = self.rows.used(p, activity) < self.rows.totals * (1 - 1e-3)
        free = (mu == 0) & slack & ~boxed
        mu = np.where((old > 0) & ~free, np.clip(mu, old / spread ** 2, old * spread ** 2), mu)
        return self._secant(mu, powers, activity)

    def _predict(self, best):
        """Move the design to the allocated powers before the next gains
        step: scale each link's sender by ``sqrt(p_new / p)`` and what uses
        its signal by the inverse (the SNR direction the new prices push
        it along), kept only if it lowers the Lagrangian at the new prices.
        This is the allocation block's own move; without it the gains block
        would have to find the new powers along the slow gauge valleys."""
        theta, powers, p = getattr(self, "allocated", (None, None, None))
        if theta is None or theta is not best.x:
            return best
        ratio = np.where((powers > 0) & ~self.fixed, p / np.where(powers > 0, powers, 1.0), 1.0)
        factor = np.sqrt(np.clip(ratio, 0.25, 4.0))
        if np.all(np.abs(factor - 1.0) < 1e-12):
            return best
        f0 = self.prob.value(best.x)
        trial = best.x.copy()
        for link, c in zip(self.spec.links, factor):
            if c == 1.0:
                continue
            for sl in self.prob.sender_slices(link.id):
                trial[sl] *= c
            for sl in _receivers(self.prob, link):
                trial[sl] /= c
        f1 = self.prob.value(trial)
        if np.isfinite(f1) and f1 < f0:
            from dataclasses import replace

            return replace(best, x=trial, f=f1)
        return best

    def _secant(self, mu, powers, activity):
        """Scale each row's step by how far the last one got: the model's
        curvature is only the Gaussian channel's, and a row whose miss
        flipped sign at nearly its own size (the step twice too long) would
        otherwise swing about its total for many steps. The step of row g
        is ``alpha_g`` times the model's; ``alpha_g`` is divided by the
        ratio of the miss's actual change to the change the model promised
        (a secant estimate, Dennis and Schnabel, 1983, section 8.1, one row
        at a time)."""
        over = (self.rows.used(powers, activity) - self.rows.totals) / self.rows.totals
        if not hasattr(self, "_alpha"):
            self._alpha = np.ones(len(mu))
        last = getattr(self, "_last", None)
        # Only a stationary design's miss measures the step (before, the
        # design's own progress moves it too).
        if last is not None and self.settled:
            old_over, moved = last
            promised = -old_over
            actual = over - old_over
            ok = moved & (np.abs(promised) > 0) & np.isfinite(actual)
            ratio = np.where(ok, actual / np.where(ok, promised, 1.0), 1.0)
            good = ok & (ratio > 0.05)
            self._alpha = np.where(good, np.clip(self._alpha / np.where(good, ratio, 1.0), 0.1, 2.0), self._alpha)
        step = np.where(self.mu > 0, self._alpha, 1.0) * (mu - self.mu)
        new = np.maximum(self.mu + step, 0.0)
        new[mu == 0] = 0.0
        # Only a step from one stationary design to the next is measured.
        self._last = (over, (self.mu > 0) & (mu > 0) & (np.abs(step) > 0)) if self.settled else None
        return new

    def first_prices(self, theta):
        """Multipliers to start from: the allocation at the start, with a
        wide trust region, its slopes read at the spec's own prices."""
        self.set_prices(np.zeros(len(self.rows.names)))
        mu = self.allocate(theta, 1e3)
        if mu is None or not np.all(np.isfinite(mu)) or not np.any(mu > 0):
            # Fallback scale: one prior error per unit of total.
            mu = np.full(len(self.rows.names), self.ref.reference) / np.maximum(self.rows.totals, 1e-300)
        return mu

    def run(self, starts):
        """Starts, then block steps until a KKT point (or a limit); returns
        ``(best outcome, iterations, starts, message)``."""
        opts, rows = self.opts, self.rows
        if starts is None:
            starts = [self.ref.pack(self.ref.informed_start())]
            rng = np.random.default_rng(opts.seed)
            starts += [self.ref.random_start(rng) for _ in range(max(0, opts.restarts - 1))]
        self.set_prices(self.first_prices(starts[0]))
        if len(rows.names) == 0:
            best, iterations, nstarts = _solve_prices(self.prob, opts, starts)
            return best, iterations, nstarts, ""
        best, iterations, nstarts = _solve_prices(self.prob, opts, starts, polish_iter=0, wake=False)
        spread, polished, curvature, message = SPREAD[1], False, None, ""
        last_miss, block, idle, calm = np.inf, BLOCK_ITER, 0, 0
        allowance = (BUDGET_ITER if self.prob.size <= DENSE_LIMIT else LIMITED_BUDGET_ITER) * opts.max_iter
        left = allowance - iterations
        for step in range(opts.budget_rounds):
            if not np.isfinite(best.f) or left <= 0:
                break
            miss, slack = self._gaps(best.x)
            coarse = miss <= COARSE_TOL or step >= COARSE_STEPS
            if coarse and not polished:
                # Near the budgets: switch off fading links, wake silent ones.
                trials = self.prob.trial_iterations
                out, used = _polish(self.prob, best.x, opts, min(left, opts.max_iter), precondition=False)
                polished, curvature = True, None
                # Stream trials have their own bound: only the descent draws on the allowance.
                left += self.prob.trial_iterations - trials
            else:
                out = minimise(self.prob.value_and_grad, best.x, max_iter=min(block, left), gtol=opts.gtol,
                               ftol=opts.ftol, unit=self.prob.units(best.x), curvature=curvature,
                               value=self.prob.value)
                used, curvature = out.iterations, out.curvature
            iterations += used
            left -= used
            if not np.isfinite(out.f):
                break
            best = out
            self.settled = polished and best.status == CONVERGED
            miss, slack = self._gaps(best.x)
            mu = self.allocate(best.x, spread)
            if mu is None:
                message = "the allocation found no powers that meet the budgets near this design"
                break
            change = float(np.max(np.abs(mu - self.mu) / np.maximum(mu, 1e-300), initial=0.0))
            if polished and best.status == CONVERGED and miss <= opts.budget_rtol and slack:
                self.set_prices(mu)  # the shadow prices, and what the result is judged at
                return best, iterations, nstarts, ""
            near = polished and best.status == CONVERGED and slack and miss <= COARSE_TOL
            idle = idle + 1 if near and out.iterations == 0 else 0
            calm = calm + 1 if near and change < MU_SETTLED else 0
            if idle >= IDLE_STEPS or (calm >= IDLE_STEPS and self.closes(best.x, np.maximum(mu, 0.0))):
                # The gains no longer answer the multipliers' changes (each
                # step finds them stationary to gtol already), or the
                # multipliers have settled while the miss wanders at the
                # gains' resolution: the exact scaling of design_budgets
                # closes it, and the gains' stationarity is checked there.
                self.set_prices(mu)
                self.stalled_at = miss
                self.stall_kind = "stalled" if idle >= IDLE_STEPS else "settled"
                return best, iterations, nstarts, ""
            if calm >= IDLE_STEPS:
                calm = 0  # the scaled design is not stationary yet: carry on
            # The trust region widens while the budgets' miss shrinks, and
            # narrows when it grows (the model was trusted too far).
            spread = min(spread * 1.5, SPREAD[2]) if miss < last_miss else max(np.sqrt(spread), SPREAD[0])
            last_miss = miss
            block = min(2 * block, CHUNK) if change < BLOCK_SETTLED else BLOCK_ITER
            self.set_prices(mu)
            best = self._predict(best)
        else:
            message = f"budgets not spent to {opts.budget_rtol:g} at a stationary design after " \
                      f"{opts.budget_rounds} block steps"
        if not message:
            message = f"iteration limit ({allowance}) reached before a KKT point of the budgets"
        miss, slack = self._gaps(best.x)
        what = []
        if miss > opts.budget_rtol:
            what.append(f"budgets missed by {miss:.2g} (relative)")
        if not slack:
            what.append("complementary slackness fails (a budget with a positive price is not spent)")
        if best.status != CONVERGED:
            what.append("the gains are not stationary at the budgets' prices")
        return best, iterations, nstarts, message + (f" ({'; '.join(what)})" if what else "")

    def closes(self, theta, mu) -> bool:
        """Whether scaling the links to meet the budgets exactly
        (:func:`_meet_budgets`) from ``theta`` leaves the gains stationary
        for the Lagrangian at ``mu`` to ``STALL_GTOL`` (relative gradient)."""
        scaled = _meet_budgets(self.prob, theta, self.rows, mu)
        f, g = self.prob.value_and_grad(scaled)
        return g is not None and _relative(f, g * self.prob.units(scaled)) <= STALL_GTOL

    def _gaps(self, theta):
        """Largest relative miss of a row that must be spent (positive
        multiplier) or is overspent, and whether complementary slackness
        holds for the rest (each unspent row has a zero multiplier)."""
        m = self.measure(theta)
        if m is None:
            return np.inf, False
        powers, activity, _ = m
        over = (self.rows.used(powers, activity) - self.rows.totals) / self.rows.totals
        binding = self.mu > 0
        # A miss worth less than the solver's resolution in the objective
        # cannot be closed by prices (the gradient would not see them).
        below = self.mu * np.abs(over) * self.rows.totals <= self.opts.gtol * abs(self.value)
        miss = max(float(np.max(np.abs(over[binding & ~below]), initial=0.0)),
                   float(np.max(over[~below], initial=0.0)))
        return miss, bool(np.all(binding | (over <= self.opts.budget_rtol)))


def _switched_off(spec: Spec, off: set) -> Spec:
    """``spec`` with the links in ``off`` pinned silent (sender and receiver
    gains zero): a zero budget leaves them nothing to send."""
    if not off:
        return spec
    from dataclasses import replace

    from hierarchy.loop.gains import gain_shapes

    shapes = gain_shapes(spec)["links"]
    links = tuple(replace(l, pin={name: np.zeros(shape) for name, shape in shapes[l.id].items()})
                  if l.id in off else l for l in spec.links)
    return replace(spec, links=links)


def _shadow_text(spec: Spec, rows, mu) -> dict:
    """Link id -> what a unit of its power costs in the budget form, for
    the silent-link reasons: which budgets charge it, at what price."""
    out = {}
    for i, link in enumerate(spec.links):
        parts = [f"{rows.W[g, i]:g} x the shadow price {mu[g]:.4g} of budget `{name}`"
                 if rows.W[g, i] != 1 else f"the shadow price {mu[g]:.4g} of budget `{name}`"
                 for g, name in enumerate(rows.names) if rows.W[g, i] > 0]
        if link.price > 0:
            parts.append(f"its own price {link.price:.4g}")
        if parts:
            out[link.id] = " plus ".join(parts)
    return out


def _zero_prices(spec: Spec, gains: Gains, every, zero, mu_all) -> np.ndarray:
    """Shadow prices of the zero budgets: the largest marginal value of
    power at zero over each one's links, per unit of its cost weight, net of
    what the link already pays (its price and the other budgets' prices)."""
    prices = np.array([l.price for l in spec.links]) + every.W[~zero].T @ mu_all[~zero]
    prob = Problem(spec, prices)
    theta = prob.pack(gains)
    value = {}
    out = []
    for g in np.flatnonzero(zero):
        best = 0.0
        for i in np.flatnonzero(every.W[g]):
            lid = spec.links[i].id
            if lid not in value:
                value[lid] = _marginal_at_zero(prob, theta, spec.links[i])
            best = max(best, (value[lid] - prices[i]) / every.W[g, i])
        out.append(best)
    return np.array(out)


def _marginal_at_zero(prob: Problem, theta, link) -> float:
    """How fast the objective falls per unit of power on a silent link, at
    the best small signal: the second-order wake-up test made exact.

    With sender gains ``s`` and the gains that use the signal ``k`` both
    near zero, ``J = J0 + 2 k' C s + k' D k + (price terms in s)``; the best
    ``k`` gains ``s' C' D^-1 C s``, and the power is a quadratic form
    ``s' Pi s``. The marginal value is the largest generalised eigenvalue
    of ``(C' D^-1 C, Pi)``. ``C`` and ``D`` come from exact gradients
    (``C`` is exactly linear in ``s`` while ``k`` is zero; ``D`` by central
    differences), ``Pi`` by polarisation of the exact powers."""
    sender = prob.sender_slices(link.id)
    receivers = _receivers(prob, link)
    if not sender or not receivers:
        return 0.0
    s_at = np.concatenate([np.arange(sl.start, sl.stop) for sl in sender])
    k_at = np.concatenate([np.arange(sl.start, sl.stop) for sl in receivers])
    base = theta.copy()
    base[s_at] = 0.0
    base[k_at] = 0.0
    _, g0 = prob.value_and_grad(base)
    if g0 is None:
        return 0.0
    h = 1e-4
    C = np.empty((len(k_at), len(s_at)))
    for j, i in enumerate(s_at):
        x = base.copy()
        x[i] = h
        C[:, j] = (prob.value_and_grad(x)[1][k_at] - g0[k_at]) / h
    D = np.empty((len(k_at), len(k_at)))
    for j, i in enumerate(k_at):
        x = base.copy()
        x[i] = h
        gp = prob.value_and_grad(x)[1]
        x[i] = -h
        gm = prob.value_and_grad(x)[1]
        D[:, j] = (gp[k_at] - gm[k_at]) / (2 * h)
    D = 0.5 * (D + D.T)
    M = 0.5 * C.T @ np.linalg.solve(D, C) * prob.reference  # objective units
    idx = prob.layout.link_index[link.id]

    def power(v):
        x = base.copy()
        x[s_at] = v
        return float(link_powers(prob.layout, prob.unpack(x))[idx])

    n = len(s_at)
    E = np.eye(n)
    Pi = np.empty((n, n))
    diag = [power(E[i]) for i in range(n)]
    for i in range(n):
        Pi[i, i] = diag[i]
        for j in range(i):
            Pi[i, j] = Pi[j, i] = 0.5 * (power(E[i] + E[j]) - diag[i] - diag[j])
    w, V = np.linalg.eigh(Pi)
    keep = w > 1e-12 * max(float(w.max(initial=0.0)), 1e-300)
    if not np.any(keep):
        return 0.0
    R = V[:, keep] / np.sqrt(w[keep])  # Pi-orthonormal basis of what carries power
    return float(max(np.linalg.eigvalsh(R.T @ M @ R).max(), 0.0))


def _off_reason(spec: Spec, lid: str, every, zero, mu_all) -> dict:
    names = [n for g, n in enumerate(every.names) if zero[g] and every.W[g, spec.links.index(spec.link(lid))] > 0]
    prices = ", ".join(f"`{n}` (shadow price {mu_all[every.names.index(n)]:.4g})" for n in names)
    link = spec.link(lid)
    return {"price": float(link.price), "noise_power": float(np.trace(link.noise)), "verdict": "switched off",
            "tested": "zero budget", "stream": None,
            "reason": f"its budget {prices} has total 0, so it sends nothing; the shadow price is the most "
                      f"that a first unit of power on any of the budget's links would lower the objective"}


def _meet_budgets(prob: Problem, theta, rows, mu):
    """Spend every active budget row (positive multiplier) in full and keep
    every row within BUDGET_TOL, by scaling each link's sender gains by
    ``c_l`` (and its receiver by ``1/c_l``). The block steps get within
    ``budget_rtol``. With ``c_l^2 = 1 + sum of alpha_g over the active rows
    that charge l``, the rows' use is linear in ``alpha``: a small linear
    solve per round, a few rounds because powers are only nearly quadratic
    in the scale (areas' activity is held at its value)."""
    theta = theta.copy()
    W, totals = rows.W, rows.totals
    if len(totals) == 0:
        return theta
    charged = (W > 0).astype(float)

    def use(th):
        powers = _powers(prob, th)
        activity = np.zeros(rows.V.shape[1])
        if rows.has_activity and np.all(np.isfinite(powers)):
            from hierarchy.errors import UnstableError

            try:
                sc = score(prob.layout, prob.unpack(th))
            except UnstableError:  # badly conditioned: as good as unstable
                return powers, np.full(len(totals), np.inf)
            activity = np.array([sc.areas[a.name].activity for a in prob.spec.areas])
        return powers, rows.used(powers, activity)

    def usable(th):
        return bool(np.all(np.isfinite(use(th)[1])))

    for _ in range(12):
        powers, used = use(theta)
        active = (mu > 0) | (used > totals)
        away = np.abs(used - totals) > 0.1 * BUDGET_TOL * totals
        if not np.any(active & away) or not np.all(np.isfinite(used)):
            break
        A = charged[active]
        alpha = np.linalg.lstsq((W[active] * powers) @ A.T, (totals - used)[active], rcond=None)[0]
        # At most a factor 10 in power per round: a row that activity alone
        # overspends cannot be met by scaling links, and must not blow them up.
        if not _scale_stably(prob, theta, np.sqrt(np.clip(1.0 + A.T @ alpha, 0.1, 10.0)), usable):
            break
    # Safety: whatever the rounds left, no row may be exceeded.
    for _ in range(5):
        powers, used = use(theta)
        if not np.all(np.isfinite(used)) or np.all(used <= totals * (1 + 0.5 * BUDGET_TOL)):
            break
        factor = np.ones(len(prob.spec.links))
        for g in np.flatnonzero(used > totals):
            at = W[g] > 0
            factor[at] = np.minimum(factor[at], np.sqrt(max(totals[g] / used[g], 0.1)) * (1 - 0.1 * BUDGET_TOL))
        if not _scale_stably(prob, theta, factor, usable):
            break
    return theta


def _scale_stably(prob: Problem, theta, factor, usable) -> bool:
    """Scale the links by ``factor`` (in place), or by a root of it if the
    full scaling would leave the stable set (a pinned receiver does not
    scale back, so the loop gain changes) or make the design unusable
    (``usable(theta)`` false); ``False`` if no root keeps it usable."""
    for k in range(6):
        trial = theta.copy()
        _scale_links(prob, trial, np.asarray(factor, float) ** (0.5 ** k))
        if usable(trial):
            theta[:] = trial
            return True
    return False


def _powers(prob: Problem, theta) -> np.ndarray:
    return np.array(list(_link_powers(prob, theta).values()))


def _scale_links(prob: Problem, theta, factor):
    for link, c in zip(prob.spec.links, factor):
        if c == 1.0:
            continue
        for sl in prob.sender_slices(link.id):
            theta[sl] *= c
        for sl in prob.receiver_slices(link.id):
            theta[sl] /= c
