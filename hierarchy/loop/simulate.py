"""Monte-Carlo check of the exact scores: run the circuit forward in time.

:func:`simulate` runs the same closed loop that :mod:`hierarchy.loop.evaluate`
solves exactly (``xi(t+1) = Psi [xi(t); nu(t)]``, link signals ``s = Hq q``)
for many steps in several independent chains and reports every per-area error,
activity, per-link power and the objective as a mean with a confidence
interval. :func:`compare` lines the exact numbers up against those intervals.

Interval (``docs/model.md``, "Monte-Carlo interval"): each chain starts from zero,
discards a burn-in, and splits its kept steps into ``batches`` contiguous
batches of equal length. The ``chains * batches`` batch means are treated as
independent, roughly normal draws of the stationary mean; the interval is the
Student-t interval at ``level`` over them. This holds when a batch is much
longer than the loop's correlation time; a warning is recorded when it is not.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
import scipy.stats

from hierarchy.loop.closedloop import Layout, assemble
from hierarchy.errors import InputError, UnstableError
from hierarchy.loop.evaluate import Scores, check_stable
from hierarchy.loop.gains import Gains, check_gains, with_pins
from hierarchy.spec.model import Spec

__all__ = [
    "BLOCK_STEPS", "BLOCK_FLOATS", "BURN_IN_DECAY", "BATCH_CORRELATION_TIMES", "Estimate",
    "Simulation", "ComparisonRow", "noise_factor", "default_burn_in", "simulate", "compare",
]

#: Steps drawn per block: noises for a whole block are drawn at once and all
#: outputs of a block are computed with a few matrix products.
BLOCK_STEPS = 1000
#: Upper bound on the floats held per block array (about 32 MB), so that many
#: chains on a large loop do not exhaust memory.
BLOCK_FLOATS = 1 << 22
#: The default burn-in lets the slowest mode of the loop decay by this factor.
BURN_IN_DECAY = 1e-8
#: A batch should span this many correlation times of the slowest mode for the
#: batch means to be nearly independent.
BATCH_CORRELATION_TIMES = 20.0


@dataclass(frozen=True)
class Estimate:
    """A Monte-Carlo mean and its confidence interval ``[low, high]``.

    Attributes
    ----------
    mean, low, high : float
    """

    mean: float
    low: float
    high: float

    @property
    def half_width(self) -> float:
        """Half the interval's width."""
        return 0.5 * (self.high - self.low)

    @property
    def relative_half_width(self) -> float:
        """``half_width / |mean|`` (``inf`` for a mean of zero with a width,
        0 for a point interval at zero)."""
        if self.mean != 0:
            return self.half_width / abs(self.mean)
        return 0.0 if self.half_width == 0 else float("inf")

    def contains(self, x: float, atol: float = 0.0) -> bool:
        """Whether ``x`` lies in the interval, widened by ``atol`` each side.

        ``atol`` absorbs floating-point rounding for quantities that are
        exactly zero in theory (the interval then collapses to a point).

        Examples
        --------
        >>> Estimate(1.0, 0.9, 1.1).contains(1.05)
        True
        >>> Estimate(1.0, 0.9, 1.1).contains(1.2)
        False
        """
        return bool(self.low - atol <= x <= self.high + atol)

    def to_dict(self) -> dict:
        return {"mean": self.mean, "low": self.low, "high": self.high}


@dataclass
class Simulation:
    """Monte-Carlo scores of one design.

    Attributes
    ----------
    objective : Estimate
        ``sum w_a ||e_a||^2 + sum lambda_l ||s_l||^2 + sum kappa_a ||z_a||^2``.
    areas : dict
        ``{area: {"error": Estimate or None (no target), "activity": Estimate}}``.
    links : dict
        ``{link id: {"power": Estimate}}`` (power sent, before channel noise).
    steps, burn_in : int
        Steps run per chain, and how many of them were discarded first (the
        requested burn-in plus the few steps that do not fill a whole batch).
    chains, batches, batch_length : int
        Independent chains, batches per chain, steps per batch.
    level : float
        Confidence level of every interval (Student-t over the
        ``chains * batches`` batch means).
    seed
        The seed given to :func:`numpy.random.default_rng`.
    radius : float
        Spectral radius of the closed loop.
    warnings : list of str
        Reasons to distrust the intervals (batches too short).
    """

    objective: Estimate
    areas: dict
    links: dict
    steps: int
    chains: int
    batches: int
    burn_in: int
    level: float
    seed: object
    batch_length: int = 0
    radius: float = float("nan")
    warnings: list = field(default_factory=list)

    @property
    def kept(self) -> int:
        """Steps per chain that enter the statistics."""
        return self.batches * self.batch_length

    def to_dict(self) -> dict:
        """A JSON-ready dict (numbers and strings only)."""
        return {
            "method": "batch means: Student-t interval over chains x batches batch means",
            "objective": self.objective.to_dict(),
            "areas": {
                name: {k: (None if est is None else est.to_dict()) for k, est in parts.items()}
                for name, parts in self.areas.items()
            },
            "links": {lid: {k: est.to_dict() for k, est in parts.items()} for lid, parts in self.links.items()},
            "steps": self.steps,
            "chains": self.chains,
            "batches": self.batches,
            "batch_length": self.batch_length,
            "burn_in": self.burn_in,
            "level": self.level,
            "seed": self.seed if isinstance(self.seed, (int, type(None))) else str(self.seed),
            "radius": self.radius,
            "warnings": list(self.warnings),
        }


class ComparisonRow(NamedTuple):
    """One line of :func:`compare`: an exact number against its interval."""

    name: str
    exact: float
    mean: float
    low: float
    high: float
    inside: bool


def noise_factor(Omega: np.ndarray) -> np.ndarray:
    """A factor ``L`` with ``L L' = Omega`` for a PSD, possibly singular ``Omega``.

    Cholesky fails on singular covariances (noiseless sensors or channels,
    rank-deficient process noise), so use the eigen-decomposition and keep
    only the directions with positive variance: ``L`` is ``n x rank``.

    Examples
    --------
    >>> L = noise_factor(np.diag([4.0, 0.0]))
    >>> L.shape, float((L @ L.T)[0, 0])
    ((2, 1), 4.0)
    """
    n = Omega.shape[0]
    if n == 0:
        return np.zeros((0, 0))
    vals, vecs = np.linalg.eigh(0.5 * (Omega + Omega.T))
    tol = max(float(vals.max()), 0.0) * n * np.finfo(float).eps
    keep = vals > tol
    return vecs[:, keep] * np.sqrt(vals[keep])


def default_burn_in(radius: float, steps: int) -> int:
    """Steps for the slowest mode (``radius``) to decay by ``1e-8``, within
    ``[100, steps // 5]`` (the upper bound wins for very short runs).

    Examples
    --------
    >>> default_burn_in(0.9, 200_000)
    175
    >>> default_burn_in(0.1, 200_000)
    100
    """
    if 0.0 < radius < 1.0:
        need = math.ceil(math.log(BURN_IN_DECAY) / math.log(radius))
    else:
        need = 0  # a nilpotent loop forgets its start in at most nxi steps
    return int(min(max(need, 100), steps // 5))


def _interval(means: np.ndarray, level: float) -> Estimate:
    """Student-t interval at ``level`` over independent batch means.

    Every measured quantity is a mean of squares with non-negative weights,
    so the interval is cut at 0: a negative value is impossible, and an
    interval reaching below 0 would count one as "inside".

    Examples
    --------
    >>> _interval(np.array([0.0, 0.1, 0.0, 0.2]), 0.99).low
    0.0
    """
    n = means.size
    mean = float(means.mean())
    sd = float(means.std(ddof=1))
    if not (np.isfinite(mean) and np.isfinite(sd)):
        raise UnstableError("the simulated signals overflow: the loop's values grow beyond floating point",
                            place="gains", fix="use gains of a sensible size (entries far below 1e12)")
    half = float(scipy.stats.t.ppf(0.5 + 0.5 * level, n - 1)) * sd / math.sqrt(n)
    return Estimate(mean, max(mean - half, 0.0), mean + half)


def _check_int(value, name, minimum):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}", place=name,
                         fix=f"give {name} as a whole number of at least {minimum}")
    return int(value)


def simulate(spec: Spec, gains: Gains | None = None, *, steps: int = 200_000, chains: int = 8,
             burn_in: int | None = None, seed=0, level: float = 0.99, batches: int = 20) -> Simulation:
    """Monte-Carlo estimates of a circuit's scores, with confidence intervals.

    Runs ``chains`` independent copies of the closed loop for ``steps`` steps
    each, all at once (one vectorised loop over time), starting from zero.

    Parameters
    ----------
    spec : Spec
    gains : Gains, optional
        Gains pinned in the spec win; ``None`` works when the spec pins all.
    steps : int
        Steps per chain, burn-in included.
    chains : int
        Independent chains.
    burn_in : int, optional
        Steps discarded at the start of each chain. Default: enough for the
        slowest mode of the loop to decay by 1e-8, within ``[100, steps//5]``.
    seed : int or numpy SeedSequence, optional
        Seed of :func:`numpy.random.default_rng`; the same seed gives the same
        numbers bit for bit.
    level : float
        Confidence level of the intervals, in (0, 1).
    batches : int
        Batches per chain; the interval is a Student-t interval over the
        ``chains * batches`` batch means.

    Returns
    -------
    Simulation

    Raises
    ------
    GainsError
        If the gains do not fit the circuit.
    UnstableError
        If the closed loop has no stationary regime.
    InputError
        If a run parameter is out of range.

    Examples
    --------
    >>> sim = simulate(spec, gains, steps=100_000)      # doctest: +SKIP
    >>> sim.areas["v1"]["error"].contains(evaluate(spec, gains).areas["v1"].error)  # doctest: +SKIP
    True
    """
    steps = _check_int(steps, "steps", 1)
    chains = _check_int(chains, "chains", 1)
    batches = _check_int(batches, "batches", 1)
    if chains * batches < 2:
        raise InputError("an interval needs at least two batch means (chains x batches >= 2)",
                         place="chains, batches", fix="use more chains or more batches")
    try:
        level = float(level)
    except (TypeError, ValueError):
        raise InputError(f"level must be a number, got {level!r}", place="level",
                         fix="give a confidence level such as 0.99") from None
    if not 0.0 < level < 1.0:
        raise InputError(f"level must lie strictly between 0 and 1, got {level}", place="level",
                         fix="give a confidence level such as 0.99")

    full = check_gains(spec, with_pins(spec, gains))
    layout = Layout(spec)
    loop = assemble(layout, full)
    radius = check_stable(loop)

    if burn_in is None:
        burn_in = default_burn_in(radius, steps)
    burn_in = _check_int(burn_in, "burn_in", 0)
    batch_length = (steps - burn_in) // batches
    if batch_length < 1:
        raise InputError(
            f"{steps} steps leave no room for {batches} batches after a burn-in of {burn_in}",
            place="steps", fix="run more steps, or use fewer batches or a shorter burn-in")
    # Steps that would not fill a whole batch are discarded at the start too,
    # so that every batch mean has the same length (and the same variance).
    discard = steps - batches * batch_length

    # --- what to measure: rows over q = [xi; nu], grouped into quantities ---
    nxi = layout.nxi
    rows, group_of_row = [], []
    names, coef = [], []  # one entry per measured quantity

    def measure(R, name, c):
        rows.append(R)
        group_of_row.extend([len(names)] * R.shape[0])
        names.append(name)
        coef.append(float(c))

    for a in spec.areas:
        if a.has_target:
            measure(layout.error_map[a.name], ("area", a.name, "error"), a.weight)
        measure(layout.state_rows(a.name), ("area", a.name, "activity"), a.activity_price)
    for ll in layout.links:
        measure(loop.sent[ll.index], ("link", ll.id, "power"), layout.price[ll.index])
    nrow, ngroup = len(group_of_row), len(names)
    Out = np.vstack(rows) if rows else np.zeros((0, layout.nq))
    indicator = np.zeros((nrow, ngroup))
    indicator[np.arange(nrow), group_of_row] = 1.0
    coef = np.array(coef)

    # --- the noise enters only through Gamma nu and the nu columns of Out, so
    # fold the factor of Omega into both once: nu = Lf g with g ~ N(0, I) ---
    Lf = noise_factor(layout.Omega)
    rank = Lf.shape[1]
    PhiT = np.ascontiguousarray(loop.Phi.T)
    GamT = np.ascontiguousarray((loop.Gamma @ Lf).T)   # rank x nxi
    OutXT = np.ascontiguousarray(Out[:, :nxi].T)       # nxi x nrow
    OutGT = np.ascontiguousarray((Out[:, nxi:] @ Lf).T)  # rank x nrow

    widest = max(nxi, rank, nrow, 1)
    block = max(1, min(BLOCK_STEPS, BLOCK_FLOATS // (chains * widest)))
    rng = np.random.default_rng(seed)
    sums = np.zeros((chains, batches, ngroup))
    X = np.empty((block + 1, chains, nxi))
    X[0] = 0.0  # start at zero; the burn-in forgets it
    t0 = 0
    while t0 < steps:
        nb = min(block, steps - t0)
        g = rng.standard_normal((nb, chains, rank))
        drive = g @ GamT  # Gamma nu for every step of the block
        # The only sequential part: xi(t+1) = Phi xi(t) + Gamma nu(t).
        for t in range(nb):
            np.matmul(X[t], PhiT, out=X[t + 1])
            X[t + 1] += drive[t]
        # Everything else is linear in q and done for the whole block at once.
        k0 = max(discard - t0, 0)  # first kept step inside this block
        if k0 < nb:
            Y = X[k0:nb] @ OutXT + g[k0:] @ OutGT
            per_step = (Y * Y) @ indicator  # (kept steps, chains, quantities)
            first = t0 + k0 - discard  # index among kept steps
            pos = 0
            while pos < per_step.shape[0]:
                j, inside = divmod(first + pos, batch_length)
                take = min(batch_length - inside, per_step.shape[0] - pos)
                sums[:, j, :] += per_step[pos:pos + take].sum(axis=0)
                pos += take
        X[0] = X[nb]
        t0 += nb

    means = (sums / batch_length).reshape(chains * batches, ngroup)
    estimates = {name: _interval(means[:, i], level) for i, name in enumerate(names)}
    objective = _interval(means @ coef if ngroup else np.zeros(chains * batches), level)

    areas = {a.name: {"error": estimates.get(("area", a.name, "error")),
                      "activity": estimates[("area", a.name, "activity")]} for a in spec.areas}
    links = {ll.id: {"power": estimates[("link", ll.id, "power")]} for ll in layout.links}

    warnings = []
    if radius > 0:
        # Correlation time of the slowest mode of a squared signal ~ 1/(1 - r^2).
        corr = 1.0 / max(1.0 - radius * radius, 1e-300)
        if batch_length < BATCH_CORRELATION_TIMES * corr:
            warnings.append(
                f"batches of {batch_length} steps are short against the loop's correlation time "
                f"(~{corr:.3g} steps, radius {radius:.6g}): the intervals may be too narrow; "
                f"run more steps or use fewer batches")
    return Simulation(objective, areas, links, steps=steps, chains=chains, batches=batches,
                      burn_in=discard, level=level, seed=seed, batch_length=batch_length,
                      radius=radius, warnings=warnings)


def compare(scores: Scores, sim: Simulation) -> list:
    """Line up exact scores against a simulation's intervals.

    One row for the objective, one per targeted area's error and one per
    link's power. A quantity that is zero in theory (a noiseless copy, say)
    comes out of both computations as rounding noise; ``inside`` therefore
    allows a slack of ``1e-9`` times the largest exact number of the design.

    Parameters
    ----------
    scores : Scores
        From :func:`hierarchy.loop.evaluate.score` or :func:`~hierarchy.loop.evaluate.evaluate`.
    sim : Simulation
        From :func:`simulate` on the same spec and gains.

    Returns
    -------
    list of ComparisonRow
        ``(name, exact, mean, low, high, inside)``; names are ``objective``,
        ``AREA.error`` and ``FROM->TO.power``.

    Examples
    --------
    >>> rows = compare(evaluate(spec, gains), simulate(spec, gains))   # doctest: +SKIP
    >>> all(r.inside for r in rows)                                    # doctest: +SKIP
    True
    """
    if set(scores.areas) != set(sim.areas) or set(scores.links) != set(sim.links):
        raise InputError("the scores and the simulation are not of the same circuit",
                         place="compare", fix="evaluate and simulate the same spec")
    pairs = [("objective", scores.objective, sim.objective)]
    for name, a in scores.areas.items():
        if a.error is not None:
            est = sim.areas[name]["error"]
            if est is None:
                raise InputError(f"area '{name}' has a target in the scores but not in the simulation",
                                 place="compare", fix="evaluate and simulate the same spec")
            pairs.append((f"{name}.error", a.error, est))
    for lid, l in scores.links.items():
        pairs.append((f"{lid}.power", l.power, sim.links[lid]["power"]))
    scale = max([abs(scores.objective)]
                + [abs(v) for a in scores.areas.values() for v in (a.error, a.prior, a.activity) if v is not None]
                + [abs(l.power) for l in scores.links.values()])
    atol = 1e-9 * scale
    return [ComparisonRow(name, float(exact), est.mean, est.low, est.high, est.contains(exact, atol))
            for name, exact, est in pairs]
