"""Optimal gains for a circuit: price form and budget form.

Price form minimises ``J`` of model.md with a stability-keeping L-BFGS over
all free gain blocks, using the exact adjoint gradient (two Lyapunov solves
per evaluation), from several deterministic starts. Budget form turns each
budget into a price (its Lagrange multiplier) and finds the multipliers at
which every budget is met: each round fits a convex model of how the error
falls with each link's power to the current design and solves the allocation
in CVXPY; the duals of that model's budget rows are the next multipliers.
The final design is re-scored exactly; budgets are checked, not assumed.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from .closedloop import assemble
from .evaluate import Scores, loop_radius, score
from .gains import Gains, check_gains, with_pins
from .model import Spec
from .problem import Problem
from .solver import CONVERGED, FAILED, ITERATION_LIMIT, minimise

#: A link sending less than this fraction of its noise power (or of its
#: source's power, on a noiseless channel) counts as silent.
SILENT_FRACTION = 1e-6
#: A link sending less than this fraction of its noise power is tried switched off.
FADING = 1.0
#: Iterations between checks for links fading away.
CHUNK = 300
#: Budgets are met when used <= total * (1 + BUDGET_TOL).
BUDGET_TOL = 1e-6


@dataclass
class Options:
    """Knobs of the designer.

    Attributes
    ----------
    restarts : int
        Starts tried (the informed start plus seeded random ones).
    max_iter : int
        L-BFGS iterations for the best start.
    probe_iter : int
        Iterations each start gets before the best one is carried on.
    seed : int
        Seed of the random starts (same seed, same design).
    gtol, ftol : float
        Convergence tolerances on the relative objective.
    budget_rounds : int
        Rounds of the multiplier search in budget form.
    budget_rtol : float
        How close to its total an active budget must come before the final
        exact adjustment.
    """

    restarts: int = 4
    max_iter: int = 3000
    probe_iter: int = 60
    seed: int = 0
    gtol: float = 1e-7
    ftol: float = 1e-12
    budget_rounds: int = 40
    budget_rtol: float = 1e-3


@dataclass
class BudgetUse:
    name: str
    total: float
    used: float
    shadow_price: float
    links: tuple

    @property
    def met(self) -> bool:
        return self.used <= self.total * (1 + BUDGET_TOL) + 1e-300


@dataclass
class DesignResult:
    """The outcome of a design: gains, exact scores and honest status.

    Attributes
    ----------
    status : str
        ``"converged"``, ``"iteration limit"`` or ``"failed"``.
    message : str
        Why the solver stopped, and any check that failed.
    gains : Gains
        The full design (pins included).
    scores : Scores
        Exact stationary scores of ``gains`` under the spec's own prices.
    objective : float
        ``scores.objective`` (price form) or the constrained objective
        (budget form: error plus priced terms, without multiplier terms).
    budgets : dict
        :class:`BudgetUse` by budget name (budget form only).
    silent : dict
        Link id -> the reason it is not worth sending.
    """

    spec: Spec
    status: str
    message: str
    gains: Gains
    scores: Scores
    objective: float
    form: str
    iterations: int = 0
    restarts: int = 0
    evaluations: int = 0
    seconds: float = 0.0
    grad_norm: float = float("nan")
    budgets: dict = field(default_factory=dict)
    silent: dict = field(default_factory=dict)
    reference: "DesignResult | None" = None

    @property
    def converged(self) -> bool:
        return self.status == CONVERGED

    def to_dict(self) -> dict:
        from .results import result_to_dict

        return result_to_dict(self)


# ---------------------------------------------------------------------------
# price form


def _solve_prices(prob: Problem, opts: Options, starts=None):
    """Best L-BFGS outcome over the starts, then wake-up tests for silent links."""
    rng = np.random.default_rng(opts.seed)
    if starts is None:
        starts = [prob.pack(prob.informed_start())]
        starts += [prob.random_start(rng) for _ in range(max(0, opts.restarts - 1))]
    fun = prob.value_and_grad
    probes = []
    for x0 in starts:
        out = minimise(fun, x0, max_iter=min(opts.probe_iter, opts.max_iter), gtol=opts.gtol, ftol=opts.ftol)
        probes.append(out)
    usable = [o for o in probes if np.isfinite(o.f)]
    if not usable:
        return probes[0], sum(o.iterations for o in probes), len(starts)
    best = min(usable, key=lambda o: o.f)
    iterations = sum(o.iterations for o in probes)
    more, extra = _polish(prob, best.x, opts, max(opts.max_iter - best.iterations, 1))
    iterations += extra
    best = more if more.f <= best.f else best
    return best, iterations, len(starts)


def _polish(prob: Problem, x0, opts: Options, max_iter: int):
    """Minimise from ``x0`` in rounds of at most ``CHUNK`` iterations. Between
    rounds, switch off links that are fading away; once converged, try to
    wake silent links or modes. Returns the best outcome and the iterations."""
    best, x, iterations, wakes = None, x0, 0, 0
    while iterations < max_iter:
        out = minimise(prob.value_and_grad, x, max_iter=min(CHUNK, max_iter - iterations),
                       gtol=opts.gtol, ftol=opts.ftol)
        iterations += out.iterations
        if best is not None and not out.f <= best.f:
            break
        best = out
        if not np.isfinite(best.f):
            break
        moved = _switch_off_fading(prob, best)
        if moved is None and best.status == CONVERGED and wakes < 8:
            moved = _wake_silent(prob, best)
            wakes += 1
        if moved is None and best.status == CONVERGED:
            break
        x = best.x if moved is None else moved
    return best, iterations


def _switch_off_fading(prob: Problem, best):
    """A link whose optimum is silence fades only slowly under any gradient
    method (its sender and receiver gains shrink together, a flat valley).
    Links far below their noise are switched off exactly, sender and
    receiver side (for a prediction into a sensor, the residual's ``P``),
    when that does not raise the objective: zero is then a stationary point
    that the solver keeps."""
    powers = _link_powers(prob, best.x)
    theta = best.x.copy()
    changed = False
    for link in prob.spec.links:
        sender = prob.sender_slices(link.id)
        if not sender or powers[link.id] > FADING * _silence_floor(prob, link) / SILENT_FRACTION * link.dim:
            continue
        pair = f"{link.target}->{link.source}"
        receivers = prob.receiver_slices(link.id)
        if link.kind == "prediction" and prob.spec.is_sensor(link.target):
            receivers = prob.slices(pair, "P")
        trial = theta.copy()
        for sl in sender + receivers:
            trial[sl] = 0.0
        if np.any(trial != theta):
            f, _ = prob.value_and_grad(trial)
            if np.isfinite(f) and f <= best.f + 1e-12 * max(1.0, abs(best.f)):
                theta, changed = trial, True
    return theta if changed else None


def _loop_covariance(prob: Problem, theta):
    from .evaluate import joint_covariance, stationary_covariance

    loop = assemble(prob.layout, prob.unpack(theta))
    return loop, joint_covariance(prob.layout, stationary_covariance(loop))


def _link_powers(prob: Problem, theta) -> dict:
    loop, Cq = _loop_covariance(prob, theta)
    return {ll.id: float(np.einsum("ij,ij->", loop.sent[ll.index] @ Cq, loop.sent[ll.index]))
            for ll in prob.layout.links}


def _silence_floor(prob: Problem, link) -> float:
    """Power per signal dimension below which a link (or one of its modes) is silent."""
    per_dim = float(np.trace(link.noise)) / link.dim or prob.node_scale[link.source] ** 2
    return SILENT_FRACTION * per_dim


def _silent_ids(prob: Problem, powers: dict) -> list:
    return [l.id for l in prob.spec.links
            if prob.sender_slices(l.id) and powers[l.id] <= _silence_floor(prob, l) * l.dim]


def _wake_silent(prob: Problem, best):
    """Try to wake silent links and silent modes of vector links.

    A zero signal is a saddle of the bilinear products (K*S, P*G): the
    gradient there says nothing. So give the sender a small signal along an
    unused direction, let the gradient choose the receiver, and keep the
    point if the objective falls (the sign of the curvature at zero)."""
    theta0, f0 = best.x, best.f
    loop, Cq = _loop_covariance(prob, theta0)
    rng = np.random.default_rng(12345)
    for ll, link in zip(prob.layout.links, prob.spec.links):
        block = prob.sender_block(link.id)
        if block is None:
            continue
        sl, shape = block
        H = loop.sent[ll.index]
        w, V = np.linalg.eigh(H @ Cq @ H.T)
        dead = V[:, w <= _silence_floor(prob, link)]
        if dead.shape[1] == 0:
            continue
        rsl = prob.receiver_slices(link.id)
        for trial in range(3):
            v = dead @ (rng.standard_normal(dead.shape[1]) if trial else np.ones(dead.shape[1]))
            r = rng.standard_normal(shape[1]) if trial else np.ones(shape[1])
            for delta in (1e-2, 1e-1):
                theta = theta0.copy()
                theta[sl] += delta * np.outer(v / np.linalg.norm(v), r / np.linalg.norm(r)).ravel()
                woken = _best_receiver_step(prob, theta, rsl, f0)
                if woken is not None:
                    return woken
    return None


def _best_receiver_step(prob: Problem, theta, receiver_slices, f0):
    """Along minus the receiver gradient, step to the minimum of a parabola
    fitted through the objective; return the point if it beats ``f0``."""
    f, g = prob.value_and_grad(theta)
    if g is None or not receiver_slices:
        return None
    d = np.zeros_like(theta)
    for sl in receiver_slices:
        d[sl] = -g[sl]
    norm = np.linalg.norm(d)
    if norm == 0:
        return None
    d /= norm
    slope, t = -norm, 1e-3
    ft, _ = prob.value_and_grad(theta + t * d)
    if not np.isfinite(ft):
        return None
    curvature = 2 * (ft - f - slope * t) / t ** 2
    step = -slope / curvature if curvature > 0 else 10 * t
    for s in (step, 0.5 * step, 0.1 * step):
        fs, _ = prob.value_and_grad(theta + s * d)
        if np.isfinite(fs) and fs < f0 - 1e-12 * max(1.0, abs(f0)):
            return theta + s * d
    return None


    return None


def _silence_reasons(prob: Problem, powers) -> dict:
    """For each silent link, the numbers that say why: what a small signal
    would buy per unit of power, against what a unit of power costs."""
    out = {}
    for lid in _silent_ids(prob, powers):
        i = prob.layout.link_index[lid]
        price = float(prob.prices[i])
        out[lid] = {
            "price": price,
            "noise_power": float(np.trace(prob.spec.link(lid).noise)),
            "reason": (
                f"no small signal on this link lowers the objective: each unit of power costs {price:.3g} "
                "and buys less than that in error"
                if price > 0 else
                "no small signal on this link lowers the error"
            ),
        }
    return out


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


def _finish(prob: Problem, theta, best, iterations, nstarts, seconds, form) -> DesignResult:
    """Score ``theta`` exactly under the spec's own prices and wrap it up."""
    spec = prob.spec
    gains = prob.unpack(theta)
    status, message = best.status, best.message
    if not np.isfinite(best.f):
        raise_unstable_pins(prob)
        status, message = FAILED, "no stable design was found from any start"
    scores = score(prob.layout, gains)
    powers = {k: v.power for k, v in scores.links.items()}
    silent = _silence_reasons(prob, powers)
    return DesignResult(spec, status, message, gains, scores, scores.objective, form,
                        iterations=iterations, restarts=nstarts, evaluations=prob.evaluations,
                        seconds=seconds, grad_norm=best.grad_norm, silent=silent)


def raise_unstable_pins(prob: Problem):
    """If the pinned gains alone make the loop unstable, say which."""
    from .errors import UnstableError

    if prob.size == 0:
        radius = loop_radius(assemble(prob.layout, prob.pins))
        raise UnstableError(f"the pinned gains make the closed loop unstable (spectral radius {radius:.4g})",
                            place="pin", fix="change the pinned matrices (for example a smaller M or K)")


# ---------------------------------------------------------------------------
# budget form


def _link_model(power, noise, price):
    """Fit ``a n / (n + P)`` (a Gaussian link of noise ``n`` carrying a source
    of variance ``a``) so that its slope at the current power equals minus
    the current price: at a price-form optimum, marginal error = price."""
    if power > SILENT_FRACTION * noise:
        return price * (noise + power) ** 2 / noise
    return 0.9 * price * noise  # silent: the first unit of power is worth less than its price


def _allocate(models, base_prices, groups, totals):
    """Convex allocation of power to links (CVXPY); returns the duals of the
    budget rows (the next multipliers), or ``None`` if the solve failed."""
    import cvxpy as cp

    n = len(models)
    P = cp.Variable(n, nonneg=True)
    terms = []
    for i, (a, noise) in enumerate(models):
        if a > 0:
            terms.append(a * noise * cp.inv_pos(noise + P[i]))
    cost = cp.sum(cp.hstack(terms)) if terms else 0
    cost = cost + base_prices @ P
    cons = [cp.sum(P[idx]) <= total for idx, total in zip(groups, totals)]
    prob = cp.Problem(cp.Minimize(cost), cons)
    try:
        prob.solve(solver=cp.CLARABEL)
    except cp.SolverError:
        prob.solve(solver=cp.SCS, eps=1e-9)
    if P.value is None:
        return None
    return np.array([max(float(c.dual_value), 0.0) for c in cons])


def design_budgets(spec: Spec, options: Options | None = None, start: Gains | None = None) -> DesignResult:
    """Optimal gains with every budget of the spec met (the budget form).

    Minimises the weighted error (plus any priced terms) subject to the
    spec's budgets and reports each budget's shadow price: the Lagrange
    multiplier at the returned design, i.e. how fast the objective would fall
    per unit of extra budget.

    Examples
    --------
    >>> res = design_budgets(load_spec("specs/two-senses.yaml"))   # doctest: +SKIP
    >>> res.budgets["total"].shadow_price                          # doctest: +SKIP
    0.031...
    """
    opts = options or Options()
    t0 = time.perf_counter()
    index = {l.id: i for i, l in enumerate(spec.links)}
    groups = [np.array([index[lid] for lid in b.links]) for b in spec.budgets]
    totals = np.array([b.total for b in spec.budgets], dtype=float)
    base = np.array([l.price for l in spec.links], dtype=float)
    noise = np.array([max(float(np.trace(l.noise)), 1e-300) for l in spec.links])

    def prices_for(mu):
        p = base.copy()
        for idx, m in zip(groups, mu):
            p[idx] += m
        return p

    # A first multiplier from a cheap guess: each link at its fair share.
    mu = np.array([1.0 / max(t, 1e-300) for t in totals])
    prob = Problem(spec, prices_for(mu))
    prob_ref = prob.reference
    mu = mu * prob_ref  # objective and budget in their own units
    prob.prices = prices_for(mu)
    starts = None if start is None else [prob.pack(with_pins(spec, start))]
    best, iterations, nstarts = _solve_prices(prob, opts, starts)
    message = ""
    history = []
    for _ in range(opts.budget_rounds):
        powers = np.array(list(_link_powers(prob, best.x).values()))
        used = np.array([powers[idx].sum() for idx in groups])
        history.append((mu.copy(), used.copy()))
        # KKT: every budget met; a budget with a positive multiplier spent in full.
        spent = np.abs(used - totals) <= opts.budget_rtol * totals
        if np.all((used <= totals * (1 + opts.budget_rtol)) & ((mu <= 1e-12 * prob_ref) | spent)):
            break
        prices = prices_for(mu)
        models = [(_link_model(powers[i], noise[i], prices[i]), noise[i]) for i in range(len(powers))]
        new_mu = _allocate(models, base, groups, totals)
        if new_mu is None:
            message = "the convex allocation step failed"
            break
        # Damp: a multiplier moves at most a factor 10 per round.
        new_mu = np.clip(new_mu, mu / 10.0, mu * 10.0)
        if len(history) >= 2:
            # Where a group keeps flipping between over and under budget, bisect in log space.
            for g in range(len(mu)):
                (m1, u1), (m2, u2) = history[-2], history[-1]
                if (u1[g] - totals[g]) * (u2[g] - totals[g]) < 0:
                    new_mu[g] = np.sqrt(m1[g] * m2[g]) if m1[g] > 0 and m2[g] > 0 else new_mu[g]
        mu = np.maximum(new_mu, 0.0)
        prob.prices = prices_for(mu)
        more, extra = _polish(prob, best.x, opts, opts.max_iter)
        iterations += extra
        best = more if np.isfinite(more.f) else best
    else:
        message = f"budgets not met within {opts.budget_rtol:g} after {opts.budget_rounds} rounds"

    theta = _meet_budgets(prob, best.x, groups, totals, mu)
    result = _finish(prob, theta, best, iterations, nstarts, time.perf_counter() - t0, "budget")
    powers = {k: v.power for k, v in result.scores.links.items()}
    for b, idx, m in zip(spec.budgets, groups, mu):
        used = float(sum(powers[spec.links[i].id] for i in idx))
        result.budgets[b.name] = BudgetUse(b.name, b.total, used, float(m), b.links)
    unmet = [b.name for b in result.budgets.values() if not b.met]
    if unmet:
        result.status = FAILED
        message = (message + "; " if message else "") + f"budget(s) not met: {', '.join(unmet)}"
    elif message:
        result.status = ITERATION_LIMIT if result.status == CONVERGED else result.status
    if message:
        result.message = message if not result.message else f"{result.message}; {message}"
    return result


def _meet_budgets(prob: Problem, theta, groups, totals, mu):
    """Spend every active budget (positive multiplier) in full and keep every
    budget within BUDGET_TOL, by scaling each link's sender gains by ``c_l``
    (and its receiver by ``1/c_l``). The multiplier search only gets within
    ``budget_rtol``. With ``c_l^2 = 1 + sum of alpha_g over the active groups
    holding l``, the group powers are linear in ``alpha``: a small linear
    solve per round, a few rounds because powers are only nearly quadratic
    in the scale."""
    theta = theta.copy()
    links = prob.spec.links
    member = np.zeros((len(groups), len(links)))
    for g, idx in enumerate(groups):
        member[g, idx] = 1.0
    for _ in range(12):
        powers = np.array(list(_link_powers(prob, theta).values()))
        used = member @ powers
        active = (mu > 0) | (used > totals)
        off = np.abs(used - totals) > 0.1 * BUDGET_TOL * totals
        if not np.any(active & off):
            break
        rows = member[active]
        alpha = np.linalg.lstsq((rows * powers) @ rows.T, (totals - used)[active], rcond=None)[0]
        factor = np.sqrt(np.clip(1.0 + rows.T @ alpha, 1e-4, None))
        _scale_links(prob, theta, factor)
    # Safety: whatever the rounds left, no budget may be exceeded.
    for _ in range(5):
        powers = np.array(list(_link_powers(prob, theta).values()))
        used = member @ powers
        if np.all(used <= totals * (1 + 0.5 * BUDGET_TOL)):
            break
        factor = np.ones(len(links))
        for g in np.flatnonzero(used > totals):
            factor[groups[g]] = np.minimum(factor[groups[g]], np.sqrt(totals[g] / used[g]) * (1 - 0.1 * BUDGET_TOL))
        _scale_links(prob, theta, factor)
    return theta


def _scale_links(prob: Problem, theta, factor):
    for link, c in zip(prob.spec.links, factor):
        if c == 1.0:
            continue
        for sl in prob.sender_slices(link.id):
            theta[sl] *= c
        for sl in prob.receiver_slices(link.id):
            theta[sl] /= c


# ---------------------------------------------------------------------------


def design(spec: Spec, options: Options | None = None, start: Gains | None = None,
           compare_unpinned: bool = True) -> DesignResult:
    """Design a circuit: budget form if the spec has budgets, else price form.

    When the spec pins gains and ``compare_unpinned`` is true, the same
    circuit with every gain free is designed too and kept as
    ``result.reference``, so a hand-built circuit is shown beside the optimum.

    Examples
    --------
    >>> import hierarchy
    >>> res = hierarchy.design(hierarchy.load_spec("specs/single-loop.yaml"))  # doctest: +SKIP
    >>> res.scores.areas["v1"].error                                           # doctest: +SKIP
    0.19...
    """
    run = design_budgets if spec.budgets else design_prices
    result = run(spec, options, start)
    free = without_pins(spec)
    if compare_unpinned and free is not None:
        result.reference = run(free, options)
    return result


def without_pins(spec: Spec):
    """The same circuit with every gain free, or ``None`` when the spec pins
    nothing or freeing the pins would leave a noisy, unpriced, unbudgeted link
    (whose optimum does not exist)."""
    from dataclasses import replace

    if not (any(a.pin for a in spec.areas) or any(l.pin for l in spec.links)):
        return None
    budgeted = {lid for b in spec.budgets for lid in b.links}
    for l in spec.links:
        if l.pin and l.price == 0 and l.id not in budgeted and np.trace(l.noise) > 0:
            return None
    return replace(spec, areas=tuple(replace(a, pin={}) for a in spec.areas),
                   links=tuple(replace(l, pin={}) for l in spec.links))
