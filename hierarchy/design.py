"""Optimal gains for a circuit: price form and budget form.

Price form minimises ``J`` of model.md with a stability-keeping L-BFGS over
all free gain blocks, using the exact adjoint gradient (two Lyapunov solves
per evaluation), from several deterministic starts. Budget form is a block
coordinate descent: the same quasi-Newton on the Lagrangian at the prices
set by the budgets' multipliers, and a convex allocation of power over the
links under every budget (CVXPY, :mod:`hierarchy.allocation`) whose dual
values are the next multipliers (the shadow prices). The final design is
re-scored exactly; budgets are checked, not assumed.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace

import numpy as np

from .closedloop import assemble
from .evaluate import Scores, link_covariances, link_powers, loop_radius, score
from .gains import Gains, with_pins
from .model import Spec
from .problem import Problem
from .subcircuit import embed, narrowed, widen, without_predictions
from .solver import CONVERGED, F_FLOOR, FAILED, ITERATION_LIMIT, minimise

#: A link sending less than this fraction of its noise power (or of its
#: source's power, on a noiseless channel) counts as silent.
SILENT_FRACTION = 1e-6
#: A link sending less than this fraction of its noise power is tried switched off.
FADING = 1.0
#: Iterations between checks for links fading away.
CHUNK = 300
#: Budgets are met when used <= total * (1 + BUDGET_TOL).
BUDGET_TOL = 1e-6
#: Sizes of the trial signal that tests whether a silent link should wake.
WAKE_DELTAS = (1e-2, 1e-1)
#: SNR above which a link's sender/receiver balance is walked directly.
BALANCE_SNR = 1e3
#: Screen fully silent links together once there are more than this many.
SCREEN_MIN = 4
#: Iterations a stream switched on gets to show that it pays.
STREAM_ITER = 150
#: Streams tried per wake-up pass (shortest first); links on streams beyond
#: this are reported as not tested.
MAX_STREAMS = 12
#: Sender gains of a woken stream, relative to the informed start's (SNR
#: near one): also a weak excursion, for a stream that only pays at a power
#: well below its noise (a tight budget or a high price).
STREAM_SCALES = (1.0, 0.1)
#: Searches whose objectives are within this (relative) of the best agree.
AGREE_RTOL = 1e-6
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


@dataclass
class Options:
    """Knobs of the designer.

    Attributes
    ----------
    restarts : int
        Starts tried (the informed start plus seeded random ones).
    max_iter : int
        L-BFGS iterations for the best start (the budget form may use
        ``BUDGET_ITER`` times this over its block steps).
    probe_iter : int
        Iterations each start gets before the best one is carried on.
    seed : int
        Seed of the random starts (same seed, same design).
    gtol, ftol : float
        Convergence tolerances on the relative objective.
    budget_rounds : int
        Most block coordinate descent steps in budget form.
    budget_rtol : float
        At a stationary design whose budgets are within this (relative) of
        their totals, the block steps stop: the price changes that would
        close the rest move the gradient by less than ``gtol``. The
        allocation's multipliers there are the shadow prices (a Newton step
        to the exact totals on the calibrated model), and the exact scaling
        closes the design's last miss (which changes the objective by the
        multiplier times the miss, to first order).
    """

    restarts: int = 4
    max_iter: int = 3000
    probe_iter: int = 60
    seed: int = 0
    gtol: float = 1e-7
    ftol: float = 1e-12
    budget_rounds: int = 80
    budget_rtol: float = 3e-5


@dataclass
class BudgetUse:
    """One budget row at a design: a budget, or a cap on one of its links
    (``cap_of`` names the link). ``used`` counts each link's power times its
    cost weight (``costs``, default 1) plus the weighted ``activity``."""

    name: str
    total: float
    used: float
    shadow_price: float
    links: tuple
    costs: dict = field(default_factory=dict)
    activity: dict = field(default_factory=dict)
    cap_of: str | None = None

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
        Link id -> why it is silent: ``verdict`` ("not worth sending" only
        when the wake-up test at this design found nothing, alone or with its
        stream; else "untested"), ``tested``, ``stream`` and ``reason``.
    searches : list of dict
        What each search of :func:`design` reached (``search``,
        ``objective``, ``status``).
    floor : Floor or None
        The information floor of the spec (:mod:`hierarchy.floor`), computed
        apart from the search, or ``None`` when it was not asked for.
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
    searches: list = field(default_factory=list)
    floor: "Floor | None" = None

    @property
    def converged(self) -> bool:
        return self.status == CONVERGED

    @property
    def gap(self) -> float:
        """Relative gap ``(objective - floor) / objective`` to the
        information floor: at most what any better design could still gain;
        ``nan`` without a usable bound."""
        return float("nan") if self.floor is None else self.floor.gap(self.objective)

    @property
    def agreement(self) -> tuple:
        """``(k, n)``: ``k`` of the ``n`` searches reached this design's
        objective (within ``AGREE_RTOL``)."""
        if not self.searches:
            return (1, 1)
        tol = AGREE_RTOL * max(abs(self.objective), F_FLOOR)
        k = sum(1 for s in self.searches if abs(s["objective"] - self.objective) <= tol)
        return (k, len(self.searches))

    def to_dict(self) -> dict:
        from .results import result_to_dict

        return result_to_dict(self)

    def to_pandas(self):
        """The areas and links of this design as two pandas DataFrames.

        Returns
        -------
        hierarchy.notebook.DesignTables
            A named tuple ``(areas, links)``: ``areas`` indexed by area name
            (exact errors, priors, activities, weights, lags, relay flag and
            drawing level), ``links`` indexed by link id (kind, power, noise
            power, SNR, bits, price, identifiability, through gain, silence
            and budget shares). Columns are listed in
            :func:`hierarchy.notebook.design_tables`.

        Examples
        --------
        >>> import hierarchy
        >>> result = hierarchy.load("specs/single-loop.yaml").design()
        >>> areas, links = result.to_pandas()
        >>> float(areas.loc["estimate", "error"]) == result.scores.areas["estimate"].error
        True
        >>> list(links.index)
        ['thermometer->estimate', 'estimate->thermometer']
        """
        from .notebook import design_tables

        return design_tables(self)

    def __repr__(self) -> str:
        from .notebook import design_repr

        return design_repr(self)

    def _repr_html_(self) -> str:
        from .notebook import design_html

        return design_html(self)


# ---------------------------------------------------------------------------
# price form


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
                       unit=prob.units(x0))
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
    last = prob.value_and_grad(x0)[0] if settled else None
    converged_f = np.inf  # objective at the last converged round
    curvature = None
    while iterations < max_iter:
        out = minimise(prob.value_and_grad, x, max_iter=min(CHUNK, max_iter - iterations),
                       gtol=opts.gtol, ftol=opts.ftol, unit=prob.units(x), curvature=curvature)
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
            return prob.value_and_grad(trial)[0], trial

        h = 0.05
        (fp, _), (fm, _) = at(h), at(-h)
        curvature = (fp - 2 * f + fm) / (2 * h * h)
        if not (np.isfinite(fp) and np.isfinite(fm)) or curvature <= 0:
            continue
        ft, trial = at(float(np.clip(-(fp - fm) / (4 * h * curvature), -2.0, 2.0)))
        if np.isfinite(ft) and ft < f - 1e-12 * max(abs(f), F_FLOOR):
            theta, f, moved = trial, ft, True
    return theta if moved else None


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
        receivers = _receivers(prob, link)
        trial = theta.copy()
        for sl in sender + receivers:
            trial[sl] = 0.0
        if np.any(trial != theta):
            f, _ = prob.value_and_grad(trial)
            if np.isfinite(f) and f <= best.f + 1e-12 * max(abs(best.f), F_FLOOR):
                theta, changed = trial, True
    return theta if changed else None


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


def _wake_silent(prob: Problem, best):
    """Try to wake silent links and silent modes of vector links.

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
    the links whose own quadratic model may fall get the exact test."""
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
            tests.append((sl, rsl, dirs, dead.shape[1] == link.dim and np.trace(link.noise) > 0))
    full = [k for k, t in enumerate(tests) if t[3]]
    hopeful = None
    if len(full) > SCREEN_MIN:
        hopeful = _screen(prob, theta0, [tests[k] for k in full])
        if hopeful is not None:
            hopeful = {(full[k], trial, delta) for k, trial, delta in hopeful}
    for k, (sl, rsl, dirs, in_full) in enumerate(tests):
        for trial, direction in enumerate(dirs):
            for delta in WAKE_DELTAS:
                if in_full and hopeful is not None and (k, trial, delta) not in hopeful:
                    continue
                theta = theta0.copy()
                theta[sl] += delta * direction
                woken = _best_receiver_step(prob, theta, rsl, f0)
                if woken is not None:
                    return woken
    return None


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


def _wake_streams(prob: Problem, best, opts: Options, budget: int = STREAM_ITER * MAX_STREAMS):
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
    point that beats ``best`` (or ``None``) and the iterations used."""
    powers = _link_powers(prob, best.x)
    streams, dead = _streams(prob, powers)
    prob.stream_cover = {lid: None for lid in dead}
    used = 0
    if not streams:
        return None, used
    if getattr(prob, "_informed_theta", None) is None:
        prob._informed_theta = prob.pack(prob.informed_start())
    ref = prob._informed_theta
    silent = set(_silent_ids(prob, powers))
    informed, _ = _flow(prob, silent)
    winner = None
    trials = [(ids, scale) for ids in streams[:MAX_STREAMS] for scale in STREAM_SCALES]
    for ids, scale in trials:
        if budget - used < 1:
            break
        theta = best.x.copy()
        links = [prob.spec.link(lid) for lid in ids]
        for link in links:
            for sl in prob.slices(link.id) + _receivers(prob, link):
                theta[sl] = ref[sl]
            for sl in prob.sender_slices(link.id):
                theta[sl] *= scale
        for node in {l.source for l in links} | {l.target for l in links}:
            if node not in informed:
                for sl in prob.slices(node, "M"):
                    theta[sl] = ref[sl]
        for _ in range(12):  # the woken receivers must leave the loop stable
            if np.isfinite(prob.value_and_grad(theta)[0]):
                break
            for link in links:
                for sl in prob.receiver_slices(link.id):
                    theta[sl] *= 0.5
        else:
            continue
        out = minimise(prob.value_and_grad, theta, max_iter=min(STREAM_ITER, budget - used), gtol=opts.gtol,
                       ftol=opts.ftol, unit=prob.units(theta))
        used += out.iterations
        for lid in ids:
            prob.stream_cover.setdefault(lid, ids)
        bar = best.f if winner is None else winner.f
        if np.isfinite(out.f) and out.f < bar - 1e-9 * max(abs(bar), F_FLOOR):
            winner = out
    return (None if winner is None else winner.x), used


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
    delta^2 / 2`` (the exact test then decides)."""
    _, g0 = prob.value_and_grad(theta0)
    if g0 is None:
        return None
    out, step = set(), 1e-3
    for trial in range(len(tests[0][2])):
        for delta in WAKE_DELTAS:
            E = np.zeros_like(theta0)
            for sl, rsl, dirs, _ in tests:
                E[sl] = dirs[trial]
            _, gp = prob.value_and_grad(theta0 + delta * E)
            if gp is None:
                return None
            norms = [np.sqrt(sum(float(np.sum((gp[r] - g0[r]) ** 2)) for r in rsl)) for _, rsl, _, _ in tests]
            D = np.zeros_like(theta0)
            for (_, rsl, _, _), n in zip(tests, norms):
                for r in rsl:
                    D[r] = -(gp[r] - g0[r]) / n if n > 0 else 0.0
            _, gq = prob.value_and_grad(theta0 + delta * E + step * D)
            if gq is None:
                return None
            for k, ((sl, rsl, dirs, _), n) in enumerate(zip(tests, norms)):
                if n == 0:
                    continue
                c = sum(float((gq[r] - gp[r]) @ D[r]) for r in rsl) / step
                a = float((gp[sl] - g0[sl]) @ dirs[trial]) / delta
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
    ft, _ = prob.value_and_grad(theta + t * d)
    if not np.isfinite(ft):
        return None
    curvature = 2 * (ft - f - slope * t) / t ** 2
    step = -slope / curvature if curvature > 0 else 10 * t
    for s in (step, 0.5 * step, 0.1 * step):
        fs, _ = prob.value_and_grad(theta + s * d)
        if np.isfinite(fs) and fs < f0 - 1e-12 * max(abs(f0), F_FLOOR):
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


def design_budgets(spec: Spec, options: Options | None = None, start: Gains | None = None) -> DesignResult:
    """Optimal gains with every budget of the spec met (the budget form).

    Minimises the weighted error (plus any priced terms) subject to the
    spec's budgets (linear constraints on link powers and areas' activity,
    see :mod:`hierarchy.allocation`) and reports each budget's shadow price:
    the Lagrange multiplier at the returned design, i.e. how fast the
    objective falls per unit of extra budget.

    Block coordinate descent over two blocks. The gains block is the price
    form's quasi-Newton on the Lagrangian, at link prices ``lambda = W' mu``
    (and activity prices ``V' mu``) set by the current multipliers,
    warm-started and cut after ``BLOCK_ITER`` iterations. The allocation
    block is a convex program over link powers
    (:class:`~hierarchy.allocation.Allocation`), calibrated at the current
    design by the exact slope of the objective in each link's power; its
    dual values are the next multipliers. Every step is cheap (a few dozen
    evaluations and one small conic solve). At a fixed point the design is
    stationary at prices ``W' mu`` and the budgets hold with complementary
    slackness: a KKT point of the budget form. The steps go on until the
    budgets are spent to ``budget_rtol`` at a converged gains block, and the
    links are then scaled to meet them exactly.

    A budget of total 0 switches its links off; its shadow price is the
    largest marginal value of power at zero over its links
    (:func:`_marginal_at_zero`).

    Examples
    --------
    >>> res = design_budgets(load_spec("specs/two-senses.yaml"))   # doctest: +SKIP
    >>> res.budgets["upward"].shadow_price                         # doctest: +SKIP
    0.031...
    """
    from .allocation import constraints

    opts = options or Options()
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
        ref.evaluations = prob.evaluations
        for attr in ("silence_checked", "stream_cover"):
            if hasattr(prob, attr):
                setattr(ref, attr, getattr(prob, attr))
        prob = ref
    theta = _meet_budgets(prob, best.x, rows, bcd.mu)
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
    if message:
        result.message = f"{result.message}; {message}" if result.message else message
    return result


#: Gains-block iterations per step of the block coordinate descent at
#: first; doubled (up to CHUNK) after each step that moves the multipliers
#: by less than BLOCK_SETTLED (relative), since the design then only has to
#: follow small price changes and its own slow directions.
BLOCK_ITER = 40
BLOCK_SETTLED = 1e-2
#: The budget form may use this times ``max_iter`` iterations in all (the
#: price form's polish, plus the steps that follow the multipliers).
BUDGET_ITER = 2
#: The allocation's trust region: powers within [p / spread, p spread].
SPREAD = (1.05, 2.0, 8.0)  # (smallest, first, largest)
#: Budgets within this (relative) of their totals, or this many cheap
#: steps, call for the full polish with wake-up tests (the price form's own
#: polish, up to ``max_iter``) at the multipliers reached; the steps after
#: it follow the smaller price changes that remain.
COARSE_TOL = 1e-2
COARSE_STEPS = 25


class _BlockDescent:
    """State of the budget form's block coordinate descent (see
    :func:`design_budgets`): the problem at the current prices, the
    multipliers ``mu`` and the allocation program."""

    def __init__(self, spec: Spec, rows, opts: Options):
        from .allocation import Allocation

        self.spec, self.rows, self.opts = spec, rows, opts
        self.ref = Problem(spec)  # the spec's own prices: the objective
        self.base = self.ref.prices.copy()
        self.kappa = np.array([a.activity_price for a in spec.areas])
        noise = np.array([float(np.trace(l.noise)) for l in spec.links])
        self.alloc = Allocation(rows, np.where(noise > 0, noise, 1.0))
        self.mu = np.zeros(len(rows.names))
        self.prob = self.ref
        self.settled = False  # whether the last gains step ended stationary
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
            count = self.prob.evaluations
            self.prob = Problem(replace(self.spec, areas=areas))
            self.prob.evaluations = count  # one count over the whole design
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
        from .evaluate import flat_cost_and_gradient

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
        f0, _ = self.prob.value_and_grad(best.x)
        trial = best.x.copy()
        for link, c in zip(self.spec.links, factor):
            if c == 1.0:
                continue
            for sl in self.prob.sender_slices(link.id):
                trial[sl] *= c
            for sl in _receivers(self.prob, link):
                trial[sl] /= c
        f1, _ = self.prob.value_and_grad(trial)
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
        last_miss, block = np.inf, BLOCK_ITER
        left = BUDGET_ITER * opts.max_iter - iterations
        for step in range(opts.budget_rounds):
            if not np.isfinite(best.f) or left <= 0:
                break
            miss, slack = self._gaps(best.x)
            coarse = miss <= COARSE_TOL or step >= COARSE_STEPS
            if coarse and not polished:
                # Near the budgets: switch off fading links, wake silent ones.
                out, used = _polish(self.prob, best.x, opts, min(left, opts.max_iter))
                polished, curvature = True, None
            else:
                out = minimise(self.prob.value_and_grad, best.x, max_iter=min(block, left), gtol=opts.gtol,
                               ftol=opts.ftol, unit=self.prob.units(best.x), curvature=curvature)
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
                self.mu = np.maximum(mu, 0.0)
                return best, iterations, nstarts, ""
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
            message = f"iteration limit ({BUDGET_ITER * opts.max_iter}) reached before a KKT point of the budgets"
        miss, slack = self._gaps(best.x)
        what = []
        if miss > opts.budget_rtol:
            what.append(f"budgets missed by {miss:.2g} (relative)")
        if not slack:
            what.append("complementary slackness fails (a budget with a positive price is not spent)")
        if best.status != CONVERGED:
            what.append("the gains are not stationary at the budgets' prices")
        return best, iterations, nstarts, message + (f" ({'; '.join(what)})" if what else "")

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

    from .gains import gain_shapes

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
            from .errors import UnstableError

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

# ---------------------------------------------------------------------------


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
    >>> res.status, res.agreement
    ('converged', (1, 1))
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
    >>> f.status, f.objective <= res.objective
    ('optimal', True)
    """
    from .floor import information_floor

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
    from .gains import gain_shapes

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
    (finite, budgets met), preferring a converged one on a tie."""
    results = [r for _, r in searches]
    usable = [r for r in results if _usable(r)] or results
    best = min(usable, key=lambda r: (r.objective, not r.converged))
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
