"""Optimal gains for a circuit: price form and budget form.

Price form minimises ``J`` of model.md with a stability-keeping L-BFGS over
all free gain blocks, using the exact adjoint gradient (two Lyapunov solves
per evaluation), from several deterministic starts. Budget form adds each
budget as an augmented-Lagrangian penalty whose gradient is a priced
gradient (prices set by the design's own powers), so it costs no more per
iteration than the price form; rounds of polishing and multiplier updates
find the multipliers (the shadow prices) at which every budget is met.
The final design is re-scored exactly; budgets are checked, not assumed.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from .closedloop import assemble
from .evaluate import Scores, link_covariances, link_powers, loop_radius, score
from .gains import Gains, with_pins
from .model import Spec
from .problem import BudgetPenalty, Problem
from .subcircuit import embed, without_predictions
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
#: The budget form's first penalty weight: missing a budget by its whole
#: total costs this times the weighted prior error.
PENALTY_START = 10.0
#: Penalty weights grow at most to this times the smallest one (beyond, the
#: solver's problem becomes too badly conditioned).
MAX_PENALTY = 1e6
#: In the budget form, a design is settled under given multipliers once a
#: round of CHUNK iterations lowers the penalised objective by at most this
#: (relative); its powers then guide the next multipliers.
SETTLED = 1e-4
#: A budget left partly unspent counts as slack when its multiplier times
#: the unspent power is at most this fraction of the objective.
SLACK_GAP = 1e-6
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
#: Searches whose objectives are within this (relative) of the best agree.
AGREE_RTOL = 1e-6


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
        Link id -> why it is silent: ``verdict`` ("not worth sending" only
        when the wake-up test at this design found nothing, alone or with its
        stream; else "untested"), ``tested``, ``stream`` and ``reason``.
    searches : list of dict
        What each search of :func:`design` reached (``search``,
        ``objective``, ``status``).
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

    @property
    def converged(self) -> bool:
        return self.status == CONVERGED

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
    cannot show its worth alone: a small signal on it changes no error. Its
    stream is the link with the fewest silent links that bring the world to
    its sender and carry its signal on to a target.

    Returns ``(streams, dead)``: the distinct streams (tuples of link ids,
    shortest first) and the orphan links that no stream can serve."""
    silent = set(_silent_ids(prob, powers))
    informed, useful = _flow(prob, silent)
    quiet = [l for l in prob.spec.links if l.id in silent]
    streams, dead = {}, []
    for l in quiet:
        if not prob.sender_slices(l.id) or (l.source in informed and l.target in useful):
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
    for ids in streams[:MAX_STREAMS]:
        if budget - used < 1:
            break
        theta = best.x.copy()
        links = [prob.spec.link(lid) for lid in ids]
        for link in links:
            for sl in prob.slices(link.id) + _receivers(prob, link):
                theta[sl] = ref[sl]
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


def _silence_reasons(prob: Problem, powers, tested=None) -> dict:
    """For each silent link, why: what the wake-up pass at this very design
    tested and found (``tested``, from :func:`_tested_links`), or that it was
    not tested there, in which case nothing is claimed."""
    tested = tested or {}
    out = {}
    for lid in _silent_ids(prob, powers):
        i = prob.layout.link_index[lid]
        price = float(prob.prices[i])
        how = tested.get(lid, "untested")
        cost = (f"each unit of power costs {price:.3g} and buys less than that in error" if price > 0
                else "it buys no lower error")
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
    checked = getattr(prob, "silence_checked", None)
    tested = checked[1] if checked is not None and checked[0] == best.f else None
    silent = _silence_reasons(prob, powers, tested)
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
    spec's budgets and reports each budget's shadow price: the Lagrange
    multiplier at the returned design, i.e. how fast the objective would fall
    per unit of extra budget.

    The budgets enter as an augmented-Lagrangian penalty (see
    :class:`~hierarchy.problem.BudgetPenalty`); each round polishes the
    design a little under the current multipliers, then updates them,
    ``mu <- max(0, mu + rho (used - total))``, raising ``rho`` for a budget
    whose excess did not shrink. Once the budgets are met, one full polish
    follows, and the link gains are scaled to meet every budget exactly.

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
    member = np.zeros((len(groups), len(spec.links)))
    for g, idx in enumerate(groups):
        member[g, idx] = 1.0
    prob = Problem(spec)
    # Multipliers start at zero; missing a budget by its whole total first
    # costs PENALTY_START times the weighted prior error.
    mu = np.zeros(len(groups))
    scale = np.maximum(totals, 1e-9 * max(float(totals.max(initial=0.0)), 1.0))
    rho = PENALTY_START * prob.reference / scale ** 2
    prob.penalty = BudgetPenalty(member, totals, mu, rho)
    starts = None if start is None else [prob.pack(with_pins(spec, start))]
    # Under provisional multipliers a round needs a settled design, not a
    # converged one, and no wake-up tests: those come in the final polish.
    best, iterations, nstarts = _solve_prices(prob, opts, starts, polish_iter=0, wake=False)
    message = ""
    excess = np.full(len(groups), np.inf)
    # The rounds and the final polish share one budget of max_iter iterations.
    left = opts.max_iter
    for _ in range(opts.budget_rounds):
        if left <= 0:
            message = f"iteration limit ({opts.max_iter}) reached before the budgets settled"
            break
        # Multipliers are updated from a design settled under the current ones
        # (an unsettled design's powers would send them astray).
        more, extra = _polish(prob, best.x, opts, left, wake=False, settled=SETTLED)
        iterations += extra
        left -= extra
        best = more if np.isfinite(more.f) else best
        over = member @ _powers(prob, best.x) - totals
        new_mu = np.maximum(0.0, mu + rho * over)
        # KKT: every budget met; a budget with a positive multiplier spent in
        # full at a settled multiplier, or its multiplier times what is left
        # negligible beside the objective (complementary slackness); and the
        # design settled under these multipliers.
        spent = np.abs(over) <= opts.budget_rtol * totals
        settled = np.abs(new_mu - mu) <= opts.budget_rtol * new_mu
        idle = new_mu * np.maximum(-over, 0.0) <= SLACK_GAP * abs(best.f) * prob.reference
        met = (over <= opts.budget_rtol * totals) & ((spent & settled) | idle)
        mu = new_mu
        if np.all(met):
            break
        # Raise the weight of an unmet budget whose miss did not shrink fourfold.
        miss = np.abs(over) / scale
        rho = np.where(~met & (miss > 0.25 * excess), np.minimum(rho * 10.0, MAX_PENALTY * rho.min()), rho)
        excess = miss
        prob.penalty = BudgetPenalty(member, totals, mu, rho)
    else:
        message = f"budgets not met within {opts.budget_rtol:g} after {opts.budget_rounds} rounds"
    prob.penalty = BudgetPenalty(member, totals, mu, rho)
    if left > 0:
        more, extra = _polish(prob, best.x, opts, left)
        iterations += extra
        best = more if np.isfinite(more.f) else best
    elif not message:
        message = f"iteration limit ({opts.max_iter}) reached before the final polish"

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


def _powers(prob: Problem, theta) -> np.ndarray:
    return np.array(list(_link_powers(prob, theta).values()))


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
        part = run(sub, opts)
        if np.isfinite(part.objective):
            searches.append(("feed-forward first", run(spec, opts, embed(part.gains, sub, spec))))
    result = _best_of(searches)
    result.seconds = time.perf_counter() - t0
    result.searches = [{"search": name, "objective": float(r.objective), "status": r.status}
                       for name, r in searches]
    free = without_pins(spec)
    if compare_unpinned and free is not None:
        result.reference = run(free, opts)
    return result


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
    from dataclasses import replace

    if not (any(a.pin for a in spec.areas) or any(l.pin for l in spec.links)):
        return None
    budgeted = {lid for b in spec.budgets for lid in b.links}
    for l in spec.links:
        if l.pin and l.price == 0 and l.id not in budgeted and np.trace(l.noise) > 0:
            return None
    return replace(spec, areas=tuple(replace(a, pin={}) for a in spec.areas),
                   links=tuple(replace(l, pin={}) for l in spec.links))
