"""The information floor: a lower bound on the objective that no circuit beats.

Everything the areas learn about the world crosses the *cut*: the residual
links that leave the sensors. Those channels have a finite capacity at a
given power, and a Gauss-Markov world needs a least rate (the Gaussian
sequential rate-distortion function) to be tracked with a given error. The
floor joins the two in one convex program (an SDP with a log-determinant and
exponential cones, solved with CVXPY), computed from the spec alone and never
from a design. ``docs/floor.md`` states the bound, derives it and says where it
is loose.

Public entry points: :func:`information_floor` (a bound on the objective J),
:func:`least_cut_energy` (the cut energy needed for given errors),
:func:`least_error` (the weighted error reachable with a given cut energy) and
:func:`link_capacity` (water-filling capacity of one vector link).
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from hierarchy.spec.model import RESIDUAL, Spec

__all__ = ["Floor", "information_floor", "least_cut_energy", "least_error", "link_capacity",
           "OPTIMAL", "SKIPPED"]

OPTIMAL = "optimal"
SKIPPED = "skipped"
INFEASIBLE = "infeasible"
FAILED = "solver failed"

#: Relative size under which an eigenvalue counts as zero (a noiseless link
#: direction, an unreachable direction of the world).
_RANK_TOL = 1e-10
#: Relative duality gap asked of the convex solver.
_GAP = 1e-10
#: Relative margin taken off the solver's value: its primal value can sit
#: above the true optimum by its residuals, about 1e-9 with exponential cones.
_MARGIN = 1e-8
#: (relative gap, feasibility) a run must meet at least, and its margin.
_REDUCED = (1e-7, 1e-7)
_REDUCED_MARGIN = 1e-6
#: Largest world for which ``information_floor`` adds the areas' own cuts by default.
AREA_CUTS_DIM = 8
#: Riccati iterations allowed when the sensor noise is singular (no DARE).
_RICCATI_ITER = 100_000

# Reasons the bound can sit below the best circuit (short, for reports).
LOOSE_POOLED = "areas pooled: one decoder sees every cut output"
LOOSE_POOLED_CUTS = "areas pooled at the sensors (each area's own in-links are counted too)"
LOOSE_HOPS = "links between areas treated as perfect (only the cut and their delay are counted)"
LOOSE_HOPS_CUTS = "links into relays and unweighted areas treated as perfect (only their delay is counted)"
LOOSE_FEEDBACK = "noise on predictions into sensors ignored"
LOOSE_SENSORS = "noisy sensors: the bound lets the sender filter its readings; a sensor has no memory"
LOOSE_SMOOTH = "smoothing areas (lag above their hops from a sensor) bounded by the unlimited-channel smoother"
LOOSE_NOISELESS = "a noiseless link out of a sensor: no channel limit at the sensors"
LOOSE_PRICES = "prices of links counted nowhere dropped"
LOOSE_ACTIVITY = "activity prices dropped"
LOOSE_MEMORY = "areas smaller than the world (reduced-order filters) and narrow links treated as unlimited"
LOOSE_DEGENERATE = "the rate term could not be formed (degenerate estimate process): sensor floor only"
LOOSE_UNCODED = "any code allowed (a circuit sends one linear signal per step)"


@dataclass
class Floor:
    """A certified lower bound and what it was computed from.

    Attributes
    ----------
    kind : str
        What ``objective`` bounds: ``"objective"`` (J), ``"cut energy"`` or
        ``"weighted error"``.
    objective : float
        The bound; ``nan`` unless ``status == "optimal"``.
    status : str
        ``"optimal"``, ``"skipped"``, ``"infeasible"`` or ``"solver failed"``.
    message : str
        What was solved, or why there is no number.
    seconds : float
        Wall time of the computation.
    loose : list of str
        Short reasons the bound may sit below the best circuit.
    per_area : dict
        Area -> its error at the minimiser of the bound (the errors of the
        cheapest way to the bound, not each a separate bound).
    area_floors : dict
        Area -> the least error that area alone can reach with unlimited
        channels (a bound for each area separately).
    cut_powers : dict
        Link id -> its power at the minimiser, for the links out of the
        sensors and (with area cuts) the links into weighted areas.
    rate_bits : float
        Bits per step that cross the sensor cut at the minimiser.
    """

    kind: str
    objective: float
    status: str
    message: str
    seconds: float = 0.0
    loose: list = field(default_factory=list)
    per_area: dict = field(default_factory=dict)
    area_floors: dict = field(default_factory=dict)
    cut_powers: dict = field(default_factory=dict)
    rate_bits: float = float("nan")

    @property
    def ok(self) -> bool:
        return self.status == OPTIMAL

    def gap(self, objective: float) -> float:
        """Relative gap ``(objective - bound) / objective`` of an achieved value.

        ``nan`` without a bound; ``0`` when both are zero.

        Examples
        --------
        >>> Floor("objective", 0.9, "optimal", "").gap(1.0)
        0.09999999999999998
        """
        if not self.ok or not math.isfinite(objective):
            return float("nan")
        if objective == 0.0:
            return 0.0 if self.objective <= 0.0 else float("nan")
        return float((objective - self.objective) / abs(objective))

    def to_dict(self) -> dict:
        """Plain-data form (``nan`` becomes ``None``) for result files.

        Examples
        --------
        >>> Floor("objective", float("nan"), "skipped", "too large").to_dict()["objective"] is None
        True
        """
        num = lambda v: None if v is None or not math.isfinite(v) else float(v)
        return {
            "kind": self.kind, "objective": num(self.objective), "status": self.status,
            "message": self.message, "seconds": self.seconds, "loose": list(self.loose),
            "per_area": {k: num(v) for k, v in self.per_area.items()},
            "area_floors": {k: num(v) for k, v in self.area_floors.items()},
            "cut_powers": {k: num(v) for k, v in self.cut_powers.items()},
            "rate_bits": num(self.rate_bits),
        }


# ---------------------------------------------------------------------------
# closed-form pieces

def link_capacity(noise, power: float) -> float:
    """Capacity in bits per step of a vector Gaussian link at total power ``power``.

    Water-filling over the eigenvalues ``n_i`` of the noise covariance: power
    ``p_i = max(0, mu - n_i)`` with ``sum p_i = power``, capacity
    ``sum 1/2 log2(1 + p_i / n_i)``. A noise with a zero eigenvalue has
    unlimited capacity (``inf``) at any positive power.

    Examples
    --------
    >>> round(link_capacity([[0.5]], 1.5), 12)     # 1/2 log2(1 + 1.5/0.5)
    1.0
    >>> link_capacity([[1.0, 0.0], [0.0, 3.0]], 1.0)   # all power into the quiet direction
    0.5
    """
    n = np.sort(np.linalg.eigvalsh(np.atleast_2d(np.asarray(noise, dtype=float))))
    if power <= 0:
        return 0.0
    if n[0] <= _RANK_TOL * max(1.0, n[-1]):
        return float("inf")
    # Fill the k quietest directions: level mu = (power + sum n_1..k) / k while mu > n_k.
    for k in range(len(n), 0, -1):
        mu = (power + n[:k].sum()) / k
        if mu > n[k - 1]:
            return float(0.5 * np.log2(mu / n[:k]).sum())
    return 0.0  # unreachable: k = 1 always fills


def _stationary(A, Q):
    """Stationary covariance of ``x+ = A x + w``, ``w ~ N(0, Q)``."""
    import scipy.linalg as sla

    S = sla.solve_discrete_lyapunov(A, Q)
    return (S + S.T) / 2


def _filter(A, Q, C, R):
    """Stationary Kalman filter: (a-priori, a-posteriori) error covariances.

    Uses the DARE when the sensor noise is positive definite, otherwise the
    Riccati recursion from the stationary covariance (monotone, converges for
    a stable world)."""
    import scipy.linalg as sla

    if C.shape[0] == 0:
        S = _stationary(A, Q)
        return S, S
    scale = max(1.0, float(np.abs(R).max(initial=0.0)))
    prior = None
    if np.linalg.eigvalsh(R)[0] > 1e-9 * scale:
        try:
            prior = sla.solve_discrete_are(A.T, C.T, Q, R)
        except (np.linalg.LinAlgError, ValueError):
            prior = None
    if prior is None:
        prior = _stationary(A, Q)
        for _ in range(_RICCATI_ITER):
            post = prior - prior @ C.T @ np.linalg.pinv(C @ prior @ C.T + R, hermitian=True) @ C @ prior
            nxt = A @ post @ A.T + Q
            nxt = (nxt + nxt.T) / 2
            done = np.abs(nxt - prior).max() <= 1e-14 * max(1e-300, np.abs(prior).max())
            prior = nxt
            if done:
                break
    prior = (prior + prior.T) / 2
    post = prior - prior @ C.T @ np.linalg.pinv(C @ prior @ C.T + R, hermitian=True) @ C @ prior
    post = (post + post.T) / 2
    return prior, post


def _smoothed(A, Q, C, R, back: int):
    """Error covariance of ``x(t - back)`` given sensors up to ``t`` (fixed lag)."""
    n = A.shape[0]
    if back == 0:
        return _filter(A, Q, C, R)[1]
    m = n * (back + 1)
    Aa = np.zeros((m, m))
    Aa[:n, :n] = A
    Aa[n:, :-n] = np.eye(m - n)  # shift the delayed copies down
    Qa = np.zeros((m, m))
    Qa[:n, :n] = Q
    Ca = np.zeros((C.shape[0], m))
    Ca[:, :n] = C
    post = _filter(Aa, Qa, Ca, R)[1]
    return post[-n:, -n:]


# ---------------------------------------------------------------------------
# the problem, read from a spec

@dataclass
class _Target:
    """An area's target rows, weight and how far its estimate reaches.

    ``ahead`` = hops from the nearest sensor minus the lag: the area's
    estimate of ``x(t - lag)`` is made from cut outputs up to ``t - hops``,
    so ``ahead > 0`` predicts that many steps, ``0`` filters and ``< 0``
    smooths. ``None``: no path from any sensor reaches the area."""

    T: np.ndarray
    weight: float
    ahead: int | None


def _hops(spec: Spec) -> dict:
    """Fewest links on a path from any sensor to each area (absent: unreachable)."""
    out = {s.name: 0 for s in spec.sensors}
    frontier = list(out)
    while frontier:
        nxt = []
        for node in frontier:
            for l in spec.links:
                if l.source == node and l.target not in out:
                    out[l.target] = out[node] + 1
                    nxt.append(l.target)
        frontier = nxt
    return {a.name: out[a.name] for a in spec.areas if a.name in out}


@dataclass
class _Cut:
    """What the floor needs from a spec."""

    A: np.ndarray
    Q: np.ndarray
    kalman: np.ndarray          # Cov(x(t) | all cut sensors up to t)
    targets: dict               # area -> _Target
    fixed: dict                 # area -> error floor that does not depend on the channels
    links: list                 # cut links (noisy ones carry a rate)
    noiseless: list             # ids of cut links with unlimited capacity
    budgets: list               # (name, [link ids], total)
    prices: dict                # link id -> price
    hops: dict                  # area -> fewest links from a sensor
    dropped: list               # loose reasons


def _read(spec: Spec) -> _Cut:
    import scipy.linalg as sla

    world = spec.world
    A, Q = world.A, world.Q
    cut = [l for l in spec.links if l.kind == RESIDUAL and spec.is_sensor(l.source)]
    sensors = [s for s in spec.sensors if any(l.source == s.name for l in cut)]
    if sensors:
        C = np.vstack([s.C(world) for s in sensors])
        R = sla.block_diag(*[s.noise for s in sensors])
    else:
        C, R = np.zeros((0, world.dim)), np.zeros((0, 0))
    _, post = _filter(A, Q, C, R)
    targets, fixed = {}, {}
    hops = _hops(spec)
    for a in spec.areas:
        if not a.has_target:
            continue
        T = world.selector(a.tracks)
        ahead = hops[a.name] - a.lag if a.name in hops else None
        targets[a.name] = _Target(T, a.weight, ahead)
        if ahead is None:
            fixed[a.name] = float(np.trace(T @ _stationary(A, Q) @ T.T))
        elif ahead < 0:
            fixed[a.name] = float(np.trace(T @ _smoothed(A, Q, C, R, -ahead) @ T.T))
    noiseless = [l.id for l in cut
                 if np.linalg.eigvalsh(l.noise)[0] <= _RANK_TOL * max(1.0, np.abs(l.noise).max())]
    budgets = [(b.name, list(b.links), b.total) for b in spec.budgets]
    prices = {l.id: l.price for l in spec.links}
    dropped = [LOOSE_UNCODED]
    if len([t for t in targets.values() if t.weight > 0]) > 1:
        dropped.append(LOOSE_POOLED)
    if any(not spec.is_sensor(l.source) and not spec.is_sensor(l.target) for l in spec.links):
        dropped.append(LOOSE_HOPS)
    if any(spec.is_sensor(l.target) and np.abs(l.noise).max(initial=0.0) > 0 for l in spec.links):
        dropped.append(LOOSE_FEEDBACK)
    if any(np.abs(s.noise).max(initial=0.0) > 0 for s in sensors):
        dropped.append(LOOSE_SENSORS)
    if any(t.ahead is not None and t.ahead < 0 and t.weight > 0 for t in targets.values()):
        dropped.append(LOOSE_SMOOTH)
    if noiseless:
        dropped.append(LOOSE_NOISELESS)
    if any(a.activity_price > 0 for a in spec.areas):
        dropped.append(LOOSE_ACTIVITY)
    if any(a.has_target and a.dim < world.dim for a in spec.areas) or \
            any(l.dim < spec.node_dim(l.source) for l in cut):
        dropped.append(LOOSE_MEMORY)
    return _Cut(A, Q, (post + post.T) / 2, targets, fixed, cut, noiseless, budgets, prices, hops,
                dropped)


def _errors_at(cut: _Cut, Pi_full) -> dict:
    """Each target's error when ``Cov(x(t) | cut outputs up to t)`` is ``Pi_full``."""
    out = {}
    for name, t in cut.targets.items():
        if t.ahead is None or t.ahead < 0:
            out[name] = cut.fixed[name]
        else:
            Ak, Qk = _ahead(cut, t.ahead)
            out[name] = float(np.trace(t.T @ (Ak @ Pi_full @ Ak.T + Qk) @ t.T.T))
    return out


def _ahead(cut: _Cut, k: int):
    """``A^k`` and the noise ``sum_{j<k} A^j Q A'^j`` gathered over ``k`` steps."""
    Ak, Qk = np.eye(cut.A.shape[0]), np.zeros_like(cut.Q)
    for _ in range(k):
        Qk = cut.A @ Qk @ cut.A.T + cut.Q
        Ak = cut.A @ Ak
    return Ak, Qk


@dataclass
class _Source:
    """The filter's own estimate process, whitened on its reachable space.

    ``xhat = U zeta`` with ``Cov(zeta) = I``; ``zeta+ = Aw zeta + Bw nu``,
    ``nu ~ N(0, I_r)``, so ``F = [Aw Bw]`` has nearly orthonormal rows
    (``Aw Aw' + Bw Bw' = I`` but for dropped innovation directions);
    ``logdet_FF = log det(F F')``; the rows of ``L`` are an orthonormal basis
    of the null space of ``F``. ``full`` is False when the rate term could not be formed (the
    channel limit is then dropped)."""

    U: np.ndarray
    Aw: np.ndarray
    Ww: np.ndarray
    L: np.ndarray
    logdet_FF: float
    full: bool


def _source(cut: _Cut) -> _Source | None:
    """The estimate process ``E[x | sensors]`` (None when it is deterministic)."""
    A, Q = cut.A, cut.Q
    # Innovation covariance of the estimate: a-priori minus a-posteriori error.
    W = A @ cut.kalman @ A.T + Q - cut.kalman
    W = (W + W.T) / 2
    Sxh = _stationary(A, Q) - cut.kalman
    ev, vec = np.linalg.eigh((Sxh + Sxh.T) / 2)
    top = ev.max(initial=0.0)
    keep = ev > _RANK_TOL * top
    if top <= 1e-300 or not keep.any():
        return None
    # Whitening makes the program well scaled (every direction of the
    # estimate has unit variance) and leaves every information quantity as
    # it is (an invertible change of coordinates).
    U = vec[:, keep] * np.sqrt(ev[keep])
    Ui = (vec[:, keep] / np.sqrt(ev[keep])).T
    Aw, Ww = Ui @ A @ U, Ui @ W @ Ui.T
    Ww = (Ww + Ww.T) / 2
    ew, wvec = np.linalg.eigh(Ww)
    # Dropping tiny innovation directions lowers the rate a target needs (the
    # rate is monotone in the innovation covariance): the bound stays valid.
    wk = ew > _RANK_TOL * max(ew.max(initial=0.0), 1e-300)
    Bw = wvec[:, wk] * np.sqrt(ew[wk])
    F = np.hstack([Aw, Bw])
    k = U.shape[1]
    _, sv, vt = np.linalg.svd(F)
    if sv.size < k or sv[-1] <= 1e-6:
        return _Source(U, Aw, Ww, np.zeros((0, F.shape[1])), 0.0, False)
    return _Source(U, Aw, Ww, vt[k:], float(2 * np.log(sv).sum()), True)


# ---------------------------------------------------------------------------
# the convex program

def _decoder(cp, src: _Source):
    """A decoder's whitened error covariance ``Pi`` of the estimate process,
    its constraints and the rate it needs (twice nats per step, convex)."""
    k = src.U.shape[1]
    Pi = cp.Variable((k, k), symmetric=True)
    # The posterior cannot exceed the prior one step on.
    cons = [src.Aw @ Pi @ src.Aw.T + src.Ww - Pi >> 0]
    if not src.full:
        return Pi, cons + [Pi >> 0], None
    r = src.L.shape[0]
    G = cp.Variable((r, r), symmetric=True)
    D = cp.bmat([[Pi, np.zeros((k, r))], [np.zeros((r, k)), np.eye(r)]])
    # With Gamma > 0 (the domain of log_det) this also keeps Pi >= 0.
    cons.append(D - src.L.T @ G @ src.L >> 0)
    return Pi, cons, src.logdet_FF - cp.log_det(G)


def _error_term(cp, cut: _Cut, src: _Source, T, ahead: int, Pi):
    """The channel part of ``tr(T Cov T')`` for an estimate ``ahead`` steps on from ``Pi``."""
    TU = T @ _ahead(cut, ahead)[0] @ src.U
    return cp.sum(cp.multiply(TU.T @ TU, Pi))


def _area_cuts(cp, spec: Spec, cut: _Cut, src: _Source, Pi, errs: dict, capacity) -> list:
    """One more decoder per weighted target area: what enters the area.

    Everything area ``a`` knows came in on its own links. What entered by
    step ``t`` was sent from states that knew the readings only up to
    ``t - hops + 1``, so this decoder estimates the delayed estimate
    ``xhat(t - hops + 1)``, a Gauss-Markov process like ``xhat`` itself: the
    same rate-distortion inequality holds with the capacity of the area's
    own links, and its error can be no smaller than the sensor decoder's
    (``Pa >= Pi``). Replaces ``errs[a]`` by the tighter term; returns the
    constraints."""
    cons = []
    for name, t in cut.targets.items():
        into = [l for l in spec.links if l.target == name]
        noiseless = any(np.linalg.eigvalsh(l.noise)[0] <= _RANK_TOL * max(1.0, np.abs(l.noise).max())
                        for l in into)
        same = {l.id for l in into} == {l.id for l in cut.links}  # nothing new: the sensor decoder
        if t.weight <= 0 or t.ahead is None or t.ahead < 0 or noiseless or not into or same:
            continue
        Pa, more, need = _decoder(cp, src)
        cons += more + [need <= capacity(into), Pa - Pi >> 0]
        errs[name] = _errors_at(cut, cut.kalman)[name] + _error_term(cp, cut, src, t.T, t.ahead, Pa)
    return cons


def _solve(spec: Spec, kind: str, objective_of, extra, max_dim, budgets=True, area_cuts=False):
    """Build and solve one floor program.

    ``objective_of(errs, powers, cut)`` returns the CVXPY objective from the
    per-area error expressions and the cut powers; ``extra(errs, powers, cut,
    prior)`` (``prior``: each area's error when nothing crosses the cut)
    returns more constraints (a list), ``("infeasible", message)`` when the
    conditions asked for are out of reach, or ``("exact", value, reason)``
    when the answer needs no solver."""
    t0 = time.perf_counter()
    if max_dim is not None and spec.world.dim > max_dim:
        return Floor(kind, float("nan"), SKIPPED,
                     f"skipped: the world has {spec.world.dim} dimensions, more than the "
                     f"limit of {max_dim}", time.perf_counter() - t0)
    cut = _read(spec)
    area_floors = _errors_at(cut, cut.kalman)
    src = _source(cut)
    import cvxpy as cp

    p = {}  # link id -> powers per noise eigen-direction

    def capacity(links):
        """Twice the nats per step the links carry (concave in their powers)."""
        for l in links:
            if l.id not in p:
                p[l.id] = cp.Variable(l.dim, nonneg=True)
        return sum((cp.sum(cp.log(1 + cp.multiply(p[l.id], 1.0 / np.linalg.eigvalsh(l.noise))))
                    for l in links), cp.Constant(0.0))

    noisy = [l for l in cut.links if l.id not in cut.noiseless]
    cons = []
    errs = _errors_at(cut, cut.kalman)  # what is left when the channels carry everything
    rate = None
    if src is not None and not src.full:
        cut.dropped.append(LOOSE_DEGENERATE)
    elif src is not None:
        if cut.noiseless:
            # Unlimited capacity at the sensors: their decoder loses nothing.
            Pi = np.zeros((src.U.shape[1],) * 2)
        else:
            Pi, more, need = _decoder(cp, src)
            rate = capacity(noisy)
            cons += more + [need <= rate]
            for name, t in cut.targets.items():
                if t.ahead is not None and t.ahead >= 0:
                    errs[name] = errs[name] + _error_term(cp, cut, src, t.T, t.ahead, Pi)
        if area_cuts:
            cons += _area_cuts(cp, spec, cut, src, Pi, errs, capacity)
    for l in noisy:  # every noisy cut link has a power, even where no rate is counted
        if l.id not in p:
            p[l.id] = cp.Variable(l.dim, nonneg=True)
    powers = {i: cp.sum(v) for i, v in p.items()}
    if any(price > 0 and i not in powers for i, price in cut.prices.items()):
        cut.dropped.append(LOOSE_PRICES)
    if area_cuts and src is not None and src.full:
        for plain, counted in ((LOOSE_POOLED, LOOSE_POOLED_CUTS), (LOOSE_HOPS, LOOSE_HOPS_CUTS)):
            if plain in cut.dropped:
                cut.dropped[cut.dropped.index(plain)] = counted
    prior = _errors_at(cut, _stationary(cut.A, cut.Q))  # nothing crosses the cut
    more = extra(errs, powers, cut, prior)
    if isinstance(more, tuple) and more[0] == INFEASIBLE:
        return Floor(kind, float("nan"), INFEASIBLE, more[1], time.perf_counter() - t0,
                     list(cut.dropped), area_floors=area_floors)
    if isinstance(more, tuple):
        # Answered without the solver: at zero energy nothing crosses the
        # cut, and every area is left with its prior.
        return Floor(kind, more[1], OPTIMAL, f"lower bound on the {kind}: {more[2]}",
                     time.perf_counter() - t0, list(cut.dropped), prior, area_floors,
                     {l.id: 0.0 for l in cut.links}, 0.0)
    cons += more
    for name, ids, total in (cut.budgets if budgets else ()):
        used = [powers[i] for i in ids if i in powers]
        if used:
            cons.append(sum(used) <= total)
    obj = objective_of(errs, powers, cut)
    if not isinstance(obj, cp.Expression):
        obj = cp.Constant(obj)
    prob = cp.Problem(cp.Minimize(obj), cons)
    if not prob.variables():
        # Nothing to optimise (unlimited channels, or nothing to learn): exact.
        per_area = {n: float(e) for n, e in errs.items()}
        return Floor(kind, float(obj.value), OPTIMAL, _describe(kind, cut, src),
                     time.perf_counter() - t0, list(cut.dropped), per_area, area_floors,
                     {l.id: 0.0 for l in cut.links}, 0.0 if not cut.noiseless else float("nan"))
    try:
        value, note = _run(prob)
    except (cp.SolverError, ValueError, ArithmeticError) as exc:  # reported as a status
        return Floor(kind, float("nan"), FAILED, f"the convex solver failed: {exc}",
                     time.perf_counter() - t0, list(cut.dropped), area_floors=area_floors)
    if math.isnan(value):
        status = INFEASIBLE if "infeasible" in note else FAILED
        return Floor(kind, float("nan"), status, note, time.perf_counter() - t0,
                     list(cut.dropped), area_floors=area_floors)
    per_area = {n: float(np.asarray(e.value if hasattr(e, "value") else e).item()) for n, e in errs.items()}
    cut_powers = {l.id: 0.0 for l in cut.links}  # noiseless cut links need no power
    cut_powers.update({i: float(P.value) for i, P in powers.items()})
    bits = float(rate.value) / (2 * math.log(2)) if rate is not None else float("nan")
    return Floor(kind, value, OPTIMAL, _describe(kind, cut, src) + note, time.perf_counter() - t0,
                 list(cut.dropped), per_area, area_floors, cut_powers, bits)


def _run(prob):
    """Solve with Clarabel; return ``(bound, note)`` or ``(nan, why not)`` with ``bound`` nan.

    The bound is the smaller of the primal and dual objectives, less a
    margin: by weak duality the dual objective is below the optimum up to
    the solver's dual residual, which the margin covers. A run that meets
    the tight tolerances gets ``_MARGIN``; one that stalls short of them (as
    exponential cones can, near 1e-9) but meets ``_REDUCED`` gets the
    larger ``_REDUCED_MARGIN`` and says so."""
    import cvxpy as cp
    from cvxpy.reductions.solvers.solver_inverse_data import SolverInverseData

    # Solved step by step (as Problem.solve does) to keep Clarabel's own
    # result, which holds the dual objective.
    data, chain, inverse = prob.get_problem_data(cp.CLARABEL)
    gap, feas = _REDUCED
    opts = {"tol_gap_abs": _GAP * 1e-2, "tol_gap_rel": _GAP, "tol_feas": 1e-10, "max_iter": 400,
            "reduced_tol_gap_abs": gap * 1e-2, "reduced_tol_gap_rel": gap, "reduced_tol_feas": feas}
    inverse[-1] = SolverInverseData(inverse[-1], chain.solver, opts)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        raw = chain.solve_via_data(prob, data, False, False, opts)
        status = str(raw.status)
        if status not in ("Solved", "AlmostSolved"):
            if "Infeasible" in status:
                return float("nan"), "no circuit of this spec can meet the conditions asked for (infeasible)"
            return float("nan"), f"the convex solver stopped with status '{status}'"
        prob.unpack_results(raw, chain, inverse)
    offset = float(prob.value) - float(raw.obj_val)
    primal, dual = float(raw.obj_val) + offset, float(raw.obj_val_dual) + offset
    if not (math.isfinite(primal) and math.isfinite(dual)):
        return float("nan"), "the convex solver returned no finite objective"
    scale = max(abs(primal), 1e-2)
    margin, note = _MARGIN, ""
    if status == "AlmostSolved":
        margin, note = _REDUCED_MARGIN, f" (solver at reduced accuracy: margin {_REDUCED_MARGIN:g})"
    # Every term of J is >= 0, so a floor below zero says nothing more than 0.
    return max(0.0, min(primal, dual) - margin * scale), note


def _describe(kind, cut: _Cut, src) -> str:
    n = len(cut.links)
    if n == 0:
        how = "no link leaves a sensor: every area is bounded by its prior"
    elif cut.noiseless:
        how = (f"cut link {cut.noiseless[0]} is noiseless (unlimited capacity): "
               "the sensor floor only")
    elif src is None:
        how = "the sensors leave nothing to learn"
    else:
        how = f"sequential rate-distortion over {n} cut {'link' if n == 1 else 'links'}"
    return f"lower bound on the {kind}: {how}"


# ---------------------------------------------------------------------------
# public entry points

def _check_amount(value, place):
    """A limit given from Python must be a finite number >= 0."""
    from hierarchy.errors import InputError

    ok = isinstance(value, (int, float, np.floating, np.integer)) and not isinstance(value, bool)
    if not ok or not math.isfinite(value) or value < 0:
        raise InputError(f"{value!r} is not a finite number >= 0", place=place,
                         fix="give a number such as 0.1")


def information_floor(spec: Spec, max_dim: int | None = None, area_cuts: bool | None = None) -> Floor:
    """Lower bound on the objective J that no circuit of ``spec`` can beat.

    Price form: ``min sum_a w_a err_a + sum_{cut} price_l P_l`` over the
    errors reachable through the cut at rate ``sum_l C_l(P_l)``; every budget
    of the spec adds its constraint on the cut links it contains.

    Parameters
    ----------
    spec : Spec
        A validated spec.
    max_dim : int, optional
        Skip (status ``"skipped"``) worlds with more state dimensions.
    area_cuts : bool, optional
        Also bound each weighted area by the capacity of the links into it
        (one more semidefinite block per area; tighter, slower). Default: on
        for worlds of at most ``AREA_CUTS_DIM`` dimensions.

    Returns
    -------
    Floor
        ``objective`` is the bound (``nan`` unless ``status == "optimal"``).

    Examples
    --------
    >>> import hierarchy
    >>> spec = hierarchy.load_spec("specs/single-loop.yaml")
    >>> floor = information_floor(spec)
    >>> floor.status, round(floor.objective, 4)
    ('optimal', 0.2053)
    >>> from hierarchy.design import design
    >>> floor.gap(design(spec).objective) >= 0
    True
    """
    def objective(errs, powers, cut):
        total = sum(cut.targets[n].weight * e for n, e in errs.items())
        return total + sum(cut.prices[i] * P for i, P in powers.items() if cut.prices[i] > 0)

    if area_cuts is None:
        area_cuts = spec.world.dim <= AREA_CUTS_DIM
    return _solve(spec, "objective", objective, lambda *args: [], max_dim, area_cuts=area_cuts)


def least_cut_energy(spec: Spec, errors: dict, max_dim: int | None = None) -> Floor:
    """Least total power on the cut links with which any circuit reaches ``errors``.

    Parameters
    ----------
    errors : dict
        Area name -> the (unweighted) error it must reach at most. Areas not
        named are free.

    The spec's prices and budgets are not used.

    Returns
    -------
    Floor
        ``kind == "cut energy"``; status ``"infeasible"`` when an error asked
        for is below what the sensors allow.

    Examples
    --------
    >>> import hierarchy
    >>> spec = hierarchy.load_spec("specs/single-loop.yaml")
    >>> floor = least_cut_energy(spec, {"estimate": 0.2})
    >>> floor.status, round(floor.objective, 4)
    ('optimal', 0.3166)
    >>> least_cut_energy(spec, {"estimate": 0.01}).status
    'infeasible'
    """
    from hierarchy.errors import InputError

    for name, limit in errors.items():
        if not any(a.name == name and a.has_target for a in spec.areas):
            raise InputError(f"'{name}' is not an area with a target", place="errors",
                             fix="name areas that track part of the world")
        _check_amount(limit, f"errors['{name}']")

    def extra(errs, powers, cut, prior):
        cons = []
        for name, limit in errors.items():
            floor = _errors_at(cut, cut.kalman)[name]
            if limit < floor * (1 - 1e-9):
                return (INFEASIBLE, f"no circuit reaches error {limit:g} in '{name}': "
                                    f"the sensors alone allow no less than {floor:.6g}")
            if not isinstance(errs[name], float):
                cons.append(errs[name] <= limit)
        if all(prior[name] <= limit for name, limit in errors.items()):
            # Exact, and the solver would meet a degenerate optimum here.
            return ("exact", 0.0, "the priors already meet these errors")
        return cons

    return _solve(spec, "cut energy", lambda errs, powers, cut: sum(powers.values(), 0.0),
                  extra, max_dim, budgets=False)


def least_error(spec: Spec, cut_energy: float, max_dim: int | None = None) -> Floor:
    """Least weighted error ``sum_a w_a err_a`` any circuit reaches with cut energy ``cut_energy``.

    The cut links' powers sum to at most ``cut_energy``; the spec's prices and
    budgets are not used.

    Examples
    --------
    >>> import hierarchy
    >>> spec = hierarchy.load_spec("specs/single-loop.yaml")
    >>> round(least_error(spec, 0.3166).objective, 4)
    0.2
    """
    _check_amount(cut_energy, "cut_energy")

    def objective(errs, powers, cut):
        return sum(cut.targets[n].weight * e for n, e in errs.items())

    def extra(errs, powers, cut, prior):
        if cut_energy == 0:
            return ("exact", sum(cut.targets[n].weight * e for n, e in prior.items()),
                    "with no energy nothing crosses the cut")
        return [sum(powers.values()) <= cut_energy] if powers else []

    return _solve(spec, "weighted error", objective, extra, max_dim, budgets=False)
