"""Exact stationary scores of a circuit for given gains (discrete Lyapunov).

Every number a user sees comes from here: per-area errors, per-link powers,
SNRs and information rates, activities, the objective and the stability
margin. :func:`cost_and_gradient` gives the objective and its exact gradient
with respect to every gain block (one more Lyapunov solve: the adjoint).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla

from hierarchy.loop.closedloop import ClosedLoop, Layout, _sums
from hierarchy.errors import UnstableError
from hierarchy.loop.gains import Gains, check_gains, with_pins
from hierarchy.spec.model import Spec
from hierarchy.spec.rules import STABLE_RADIUS  # a closed loop is stable below it: the world's margin too

__all__ = ['RESIDUAL_RTOL', 'PSD_RTOL', 'AreaScore', 'LinkScore', 'Scores', 'spectral_radius', 'loop_radius', 'check_stable', 'area_radius', 'link_powers', 'link_covariances', 'score', 'check_scores', 'evaluate', 'cost_and_gradient', 'flat_cost_and_gradient', 'flat_cost']

#: Final scores are refused when the Lyapunov residual
#: ``||Sigma - Phi Sigma Phi' - Gamma Omega Gamma'||_F`` exceeds this times
#: ``||Sigma||_F + ||Phi Sigma Phi'||_F + ||Gamma Omega Gamma'||_F``.
RESIDUAL_RTOL = 1e-6
#: ... or when ``Cov(q)`` has an eigenvalue below ``-PSD_RTOL`` times its
#: largest diagonal entry (a covariance is positive semidefinite); a mean
#: square below zero by less than ``PSD_RTOL * scale * ||rows||^2`` is
#: rounding and is reported as 0.
PSD_RTOL = 1e-8


def spectral_radius(M: np.ndarray) -> float:
    """Largest eigenvalue modulus of a square matrix (0 for an empty one).

    Examples
    --------
    >>> spectral_radius(np.array([[0.5, 1.0], [0.0, -0.9]]))
    0.9
    """
    if M.size == 0:
        return 0.0
    return float(np.max(np.abs(np.linalg.eigvals(M))))


def loop_radius(loop: ClosedLoop) -> float:
    """Spectral radius of ``Phi``; the world block is fixed, so only the area
    block (and the world's own radius) need eigenvalues."""
    lay = loop.layout
    return max(spectral_radius(lay.A_aug), spectral_radius(loop.Phi[lay.nx:, lay.nx:]))


@dataclass
class AreaScore:
    """Scores of one area. ``error`` and ``prior`` are ``None`` for a relay."""

    error: float | None
    prior: float | None
    relative: float | None
    activity: float
    weight: float
    lag: int


@dataclass
class LinkScore:
    """Scores of one link: sent power ``E||s||^2``, noise power ``tr N``,
    ``snr = power / tr N`` and ``bits`` = 0.5 log2 det(I + N^-1 Cov(s))."""

    kind: str
    power: float
    noise_power: float
    snr: float
    bits: float
    price: float


@dataclass
class Scores:
    """Exact stationary scores of one design.

    Attributes
    ----------
    objective : float
        ``sum w_a err_a + sum lambda_l power_l + sum kappa_a activity_a``.
    weighted_error, energy_cost, activity_cost : float
        The three parts of ``objective``.
    radius : float
        Spectral radius of the closed loop; ``margin = 1 - radius``.
    areas, links : dict
        :class:`AreaScore` by area name and :class:`LinkScore` by link id.
    """

    objective: float
    weighted_error: float
    energy_cost: float
    activity_cost: float
    radius: float
    areas: dict = field(default_factory=dict)
    links: dict = field(default_factory=dict)

    @property
    def margin(self) -> float:
        return 1.0 - self.radius

    def to_dict(self) -> dict:
        from dataclasses import asdict

        return {
            "objective": self.objective,
            "weighted_error": self.weighted_error,
            "energy_cost": self.energy_cost,
            "activity_cost": self.activity_cost,
            "radius": self.radius,
            "margin": self.margin,
            "areas": {k: asdict(v) for k, v in self.areas.items()},
            "links": {k: asdict(v) for k, v in self.links.items()},
        }


def _bits(cov_s: np.ndarray, N: np.ndarray) -> float:
    power = float(np.trace(cov_s))
    if power <= 0:
        return 0.0
    try:
        L = np.linalg.cholesky(N)
    except np.linalg.LinAlgError:
        return float("inf")  # part of the signal crosses a noiseless channel
    X = sla.solve_triangular(L, sla.solve_triangular(L, cov_s, lower=True).T, lower=True)
    sign, logdet = np.linalg.slogdet(np.eye(len(N)) + 0.5 * (X + X.T))
    return float(0.5 * logdet / np.log(2.0))


def check_stable(loop: ClosedLoop, what: str = "the closed loop") -> float:
    """Return the loop's spectral radius; raise :class:`UnstableError` if >= 1."""
    radius = loop_radius(loop)
    if not radius < STABLE_RADIUS:
        raise _unstable(radius, what)
    return radius


class _Schur:
    """Real Schur form ``A = U T U'`` with what the Cayley transform needs:
    ``(T + I)^-1`` and ``Tc = (T + I)^-1 (T - I)``, which has the same
    quasi-triangular pattern as ``T`` (rounding below it is cleared because
    LAPACK's ``trsyl`` reads the pattern off the subdiagonal).

    LAPACK is called directly: scipy's wrappers cost more than the work on
    the small matrices of most circuits. The inverse is formed once (gesv)
    rather than applied by ``getrs``, which multithreaded OpenBLAS runs in
    parallel at any size: milliseconds per call on a busy machine."""

    def __init__(self, A: np.ndarray):
        n = len(A)
        T, _, wr, wi, U, _, info = sla.lapack.dgees(lambda re, im: None, A, lwork=max(1, 34 * n))
        if info:
            raise np.linalg.LinAlgError(f"the Schur form did not converge (LAPACK dgees info {info})")
        self.U = U
        self.radius = float(np.hypot(wr, wi).max()) if n else 0.0
        if self.radius >= 1.0:
            # Unstable: no stationary regime to solve for, and with an
            # eigenvalue at exactly -1 (a long trial step can land there)
            # T + I is singular.
            self.inv = self.Tc = None
            return
        self.inv = np.linalg.solve(T + np.eye(n), np.eye(n))
        Tc = self.inv @ (T - np.eye(n))
        below = np.tril(np.ones((n, n), dtype=bool), -1)
        sub = np.arange(n - 1)
        below[sub + 1, sub] = np.diag(T, -1) == 0
        Tc[below] = 0.0
        self.Tc = Tc

    def solve(self, C: np.ndarray, trans: bool = False) -> np.ndarray:
        """``(T + I)^-1 C``, or ``(T + I)^-T C`` with ``trans``."""
        return (self.inv.T if trans else self.inv) @ C


def _stein(a: _Schur, ta: bool, b: _Schur, tb: bool, C: np.ndarray) -> np.ndarray:
    """Solve ``X - op(A) X op(B)' = C`` (``op`` transposes when ``ta``/``tb``).

    The Cayley transform ``Ac = (A - I)(A + I)^-1`` turns it into the
    Sylvester equation ``op(Ac) X + X op(Bc)' = -2 op(A + I)^-1 C op(B + I)^-T``
    (what scipy's ``solve_discrete_lyapunov`` does for one matrix), solved in
    the Schur bases by LAPACK ``trsyl``: O(n^3), no Kronecker form.
    """
    if C.size == 0:
        return np.zeros_like(C)
    rhs = -2.0 * a.solve(a.U.T @ C @ b.U, ta)
    rhs = b.solve(rhs.T, tb).T
    X, scale, info = sla.lapack.dtrsyl(a.Tc, b.Tc, rhs, trana="T" if ta else "N", tranb="N" if tb else "T")
    if info < 0:
        raise ValueError(f"trsyl: argument {-info} is invalid")
    return a.U @ (X / scale) @ b.U.T


class _WorldPart:
    """What never changes with the gains: the augmented world's stationary
    covariance ``Sigma_xx`` and Schur form (one per layout)."""

    def __init__(self, layout: Layout):
        A = layout.A_aug
        Q = np.zeros_like(A)
        Q[:layout.n, :layout.n] = layout.spec.world.Q
        self.A = A
        self.schur = _Schur(A)
        S = sla.solve_discrete_lyapunov(A, Q)
        self.Sigma = 0.5 * (S + S.T)
        self.radius = self.schur.radius


def _world_part(layout: Layout) -> _WorldPart:
    st = layout.structure
    if st.world is None:  # solved on first use, then kept with the layout
        st.world = _WorldPart(layout)
    return st.world


@dataclass
class _Solution:
    """Stationary covariance of one design and the pieces every score reuses."""

    parts: object
    schur: _Schur
    Sigma: np.ndarray
    hs: np.ndarray          # H Sigma at the entries of H's pattern
    row_power: np.ndarray   # E s_i^2 for every link row


def _solve(layout: Layout, g: np.ndarray, margin: float = 0.0):
    """Stationary regime of the flat gains ``g``: ``(radius, _Solution)``,
    with ``None`` for the solution when the loop is unstable (or, in a
    search, ``margin > 0``, when the area block's radius is not below
    ``1 - margin`` or a variance comes out negative).

    The world block does not depend on the gains, so only the area part is
    solved: a Stein equation for ``Sigma_zx`` and a Lyapunov equation for
    ``Sigma_zz``, both with one Schur form of ``Phi_zz``."""
    st = layout.structure
    world = _world_part(layout)
    p = st.parts(g)
    nx = st.nx
    if not np.all(np.isfinite(p.Phi_z)):  # gain products overflowed
        return float("inf"), None
    Pzx, Pzz = p.Phi_z[:, :nx], p.Phi_z[:, nx:]
    sch = _Schur(Pzz)
    radius = max(world.radius, sch.radius)
    if not (radius < STABLE_RADIUS and sch.radius < 1.0 - margin):
        return radius, None
    PS = Pzx @ world.Sigma
    Szx = _stein(sch, False, world.schur, False, PS @ world.A.T)
    cross = Pzz @ Szx @ Pzx.T
    vo, vq, dst = st.v2
    V = p.Q1 @ st.Omega_v @ p.Q1.T
    V += _sums(dst, weights=p.q2_omega[vo] * p.q2[vq], minlength=st.nz * st.nz).reshape(st.nz, st.nz)
    Szz = _stein(sch, False, sch, False, PS @ Pzx.T + cross + cross.T + V)
    Sigma = np.empty((st.nxi, st.nxi))
    Sigma[:nx, :nx] = world.Sigma
    Sigma[nx:, :nx] = Szx
    Sigma[:nx, nx:] = Szx.T
    Sigma[nx:, nx:] = 0.5 * (Szz + Szz.T)
    f1, f2, key = st.hh
    hs = _sums(f2, weights=p.h[f1] * Sigma.ravel()[key], minlength=len(p.h))
    row_power = _sums(st.h_rows, weights=p.h * hs, minlength=st.m)
    row_power += np.einsum("ij,ij->i", p.Gv @ st.Omega_v, p.Gv)
    row_power += _sums(st.P.rows, weights=p.P_omega * p.p, minlength=st.m)
    if not (np.all(np.isfinite(Sigma)) and np.all(np.isfinite(row_power))):
        # Stable on paper, but the covariances overflow: no usable regime.
        return float("inf"), None
    var = np.diag(Sigma)
    if margin > 0 and (var.min(initial=0.0) < -PSD_RTOL * var.max(initial=0.0) or
                       row_power.min(initial=0.0) < -PSD_RTOL * np.abs(row_power).max(initial=0.0)):
        # In a search only (scores of given gains go on to check_scores,
        # which names the fault): a negative variance means the solve lost
        # its accuracy, and a search would dive into the nonsense it returns
        # (objectives of -1e15 were seen).
        return float("inf"), None
    return radius, _Solution(p, sch, Sigma, hs, row_power)


def area_radius(layout: Layout, g: np.ndarray) -> float:
    """Spectral radius of the area block of ``Phi`` for the flat gain vector
    ``g``: the part of the closed loop that the gains move (``Phi`` is block
    triangular, so the loop's radius is the larger of this and the world's).

    Examples
    --------
    >>> lay = Layout(spec)                       # doctest: +SKIP
    >>> area_radius(lay, lay.flatten(gains))     # doctest: +SKIP
    0.93...
    """
    st = layout.structure
    return spectral_radius(st.parts(g).Phi_z[:, st.nx:])


def _link_powers(st, sol: _Solution) -> np.ndarray:
    if not st.m:
        return np.zeros(0)
    return np.add.reduceat(sol.row_power, st.link_start)


def _error_rows(st, sol: _Solution) -> np.ndarray:
    return np.einsum("ij,ij->i", st.F @ sol.Sigma, st.F)


def _unstable(radius: float, what: str = "the closed loop") -> UnstableError:
    if not np.isfinite(radius):
        return UnstableError(
            f"{what} cannot be evaluated: its gains are so large that the covariances overflow",
            place="gains",
            fix="use gains of a sensible size (products of gains far below 1e150); "
                "`hierarchy design` finds stable gains",
        )
    return UnstableError(
        f"{what} is unstable: spectral radius {radius:.6g} (a stationary regime needs < 1)",
        place="gains",
        fix="shrink the area gains M or the loop gains K*S, K*G; `hierarchy design` finds stable gains",
    )


def link_powers(layout: Layout, gains: Gains) -> np.ndarray | None:
    """Power ``E||s_l||^2`` of every link (spec order), or ``None`` if the
    closed loop is unstable.

    Examples
    --------
    >>> link_powers(Layout(spec), gains)          # doctest: +SKIP
    array([0.41..., 0.12...])
    """
    radius, sol = _solve(layout, layout.flatten(gains))
    return None if sol is None else _link_powers(layout.structure, sol)


def link_covariances(layout: Layout, gains: Gains) -> list | None:
    """Covariance ``Cov(s_l)`` of the signal each link sends (spec order),
    or ``None`` if the closed loop is unstable.

    Examples
    --------
    >>> [c.shape for c in link_covariances(Layout(spec), gains)]   # doctest: +SKIP
    [(1, 1), (1, 1)]
    """
    radius, sol = _solve(layout, layout.flatten(gains))
    return None if sol is None else _link_covariances(layout, sol)


def _link_covariances(layout: Layout, sol: _Solution) -> list:
    st, p = layout.structure, sol.parts
    GvO = p.Gv @ st.Omega_v
    H = st.dense_h(p.h)
    HS = H @ sol.Sigma
    out = [None] * len(layout.links)
    for links, rows in st.link_groups:  # links of one signal size, batched
        cov = HS[rows] @ H[rows].transpose(0, 2, 1) + GvO[rows] @ p.Gv[rows].transpose(0, 2, 1)
        for i, c in zip(links, cov):
            out[i] = c
    for i, (e0, shape) in st.p_blocks.items():  # the paired prediction's noise, through P
        P = p.p[e0:e0 + shape[0] * shape[1]].reshape(shape)
        out[i] = out[i] + P @ layout.spec.links[layout.links[i].pair].noise @ P.T
    return [0.5 * (c + c.T) for c in out]


def _bits_all(covs: list, noises: list) -> list:
    """:func:`_bits` of every link, batched by signal size (links whose noise
    is not positive definite go one by one)."""
    out = [0.0] * len(covs)
    sizes = {}
    for i, N in enumerate(noises):
        sizes.setdefault(len(N), []).append(i)
    for d, idx in sizes.items():
        C = np.stack([covs[i] for i in idx])
        try:
            L = np.linalg.cholesky(np.stack([noises[i] for i in idx]))
        except np.linalg.LinAlgError:
            for i in idx:
                out[i] = _bits(covs[i], noises[i])
            continue
        X = np.linalg.solve(L, np.linalg.solve(L, C).transpose(0, 2, 1))
        logdet = np.linalg.slogdet(np.eye(d) + 0.5 * (X + X.transpose(0, 2, 1)))[1]
        power = np.trace(C, axis1=1, axis2=2)
        for i, bits, pw in zip(idx, 0.5 * logdet / np.log(2.0), power):
            out[i] = float(bits) if pw > 0 else 0.0
    return out


def score(layout: Layout, gains: Gains, prices=None) -> Scores:
    """Exact stationary scores of complete ``gains`` on ``layout``.

    Parameters
    ----------
    prices : array_like, optional
        Per-link prices to use instead of the spec's (same order as
        ``spec.links``).

    Raises
    ------
    UnstableError
        If the closed loop has no stationary regime.

    Examples
    --------
    >>> score(Layout(spec), gains).objective        # doctest: +SKIP
    0.23...
    """
    spec = layout.spec
    st = layout.structure
    prices = layout.price if prices is None else np.asarray(prices, dtype=float)
    radius, sol = _solve(layout, layout.flatten(gains))
    if sol is None:
        raise _unstable(radius)
    world = _world_part(layout)
    err_rows = _error_rows(st, sol)
    diag_z = np.diag(sol.Sigma)[st.nx:]
    areas, links = {}, {}
    werr = eng = act = 0.0
    t = 0
    for i, a in enumerate(spec.areas):
        z0 = st.area_start[i]
        activity = float(diag_z[z0:z0 + a.dim].sum())
        if a.has_target:
            Tq = layout.target_map[a.name][:, :st.nx]
            k0 = st.target_start[t]
            err = float(err_rows[k0:k0 + len(Tq)].sum())
            prior = float(np.einsum("ij,ij->", Tq @ world.Sigma, Tq))
            rel = err / prior if prior > 0 else float("nan") if err > 0 else 0.0
            werr += a.weight * err
            t += 1
        else:
            err = prior = rel = None
        act += a.activity_price * activity
        areas[a.name] = AreaScore(err, prior, rel, activity, a.weight, a.lag)
    powers = _link_powers(st, sol)
    bits = _bits_all(_link_covariances(layout, sol), [l.noise for l in spec.links])
    for ll, l in zip(layout.links, spec.links):
        power = float(powers[ll.index])
        npow = float(np.trace(l.noise))
        snr = power / npow if npow > 0 else (float("inf") if power > 0 else 0.0)
        links[l.id] = LinkScore(l.kind, power, npow, snr, bits[ll.index], float(prices[ll.index]))
        eng += prices[ll.index] * power
    return check_scores(layout, gains, sol.Sigma,
                        Scores(werr + eng + act, werr, eng, act, radius, areas, links))


def _ill_conditioned(what: str) -> UnstableError:
    return UnstableError(
        f"the closed loop is too badly conditioned to evaluate: {what}",
        place="gains",
        fix="use gains of a sensible size (entries far below 1e12, no near-cancelling loops); "
            "`hierarchy design` finds well-behaved gains")


def _noise_through(layout: Layout, Gamma: np.ndarray):
    """``Gamma Omega Gamma'`` and the diagonal of ``Omega``, from the noise
    blocks of the compact structure (world, sensors, link noises as sparse
    entries) instead of the dense ``(dim nu x dim nu)`` ``Omega``, which at
    2,000 links holds millions of zeros."""
    import scipy.sparse as sp

    st = layout.structure
    n, nv, m = st.n, st.nv, st.m
    Q = layout.spec.world.Q
    Gw, Gv, Ge = Gamma[:, :n], Gamma[:, n:n + nv], Gamma[:, n + nv:]
    eta = sp.csr_matrix((st.omega_eta, (st.eta.rows, st.eta.cols)), shape=(m, m))
    noise = Gw @ Q @ Gw.T + Gv @ st.Omega_v @ Gv.T + np.asarray((eta @ Ge.T).T) @ Ge.T
    diag = np.concatenate([np.diag(Q), np.diag(st.Omega_v), eta.diagonal()])
    return noise, diag


def check_scores(layout: Layout, gains: Gains, Sigma: np.ndarray, scores: Scores) -> Scores:
    """Check final scores before anyone sees them, independently of the
    fast path that computed them: ``Sigma`` must solve the Lyapunov equation
    of the loop assembled afresh from ``gains`` (relative residual at most
    :data:`RESIDUAL_RTOL`), ``Cov(q)`` must be positive semidefinite (to
    :data:`PSD_RTOL`), and every error, prior, activity and power must be a
    non-negative finite number. Rounding-sized negatives become 0.

    Called once per reported design (not in the optimiser's loop): it costs
    about one extra covariance product.

    Raises
    ------
    UnstableError
        Naming the check that failed, when the numbers cannot be trusted.
    """
    from hierarchy.loop.closedloop import assemble

    loop = assemble(layout, gains)
    noise, omega_diag = _noise_through(layout, loop.Gamma)
    moved = loop.Phi @ Sigma @ loop.Phi.T
    size = np.linalg.norm(Sigma) + np.linalg.norm(moved) + np.linalg.norm(noise)
    if not np.isfinite(size):
        raise _ill_conditioned("its covariances overflow")
    residual = np.linalg.norm(Sigma - moved - noise)
    if residual > RESIDUAL_RTOL * size:
        raise _ill_conditioned(f"the stationary covariance solves its Lyapunov equation only to a relative "
                               f"residual of {residual / size:.2g} (at most {RESIDUAL_RTOL:g} is trusted)")
    scale = max(float(np.max(np.diag(Sigma), initial=0.0)), float(np.max(omega_diag, initial=0.0)))
    nxi = layout.nxi
    if nxi and scale > 0:
        try:
            np.linalg.cholesky(Sigma + PSD_RTOL * scale * np.eye(nxi))
        except np.linalg.LinAlgError:
            raise _ill_conditioned(f"its state covariance is not positive semidefinite (an eigenvalue below "
                                   f"-{PSD_RTOL:g} times the largest variance)") from None

    def checked(value, rows, what):
        if value is None:
            return None
        tol = PSD_RTOL * scale * float(np.sum(rows * rows))
        if not np.isfinite(value) or value < -tol:
            raise _ill_conditioned(f"{what} comes out as {value:.3g}, but a mean square cannot be negative")
        return max(float(value), 0.0)

    spec = layout.spec
    for a in spec.areas:
        sc = scores.areas[a.name]
        if a.has_target:
            sc.error = checked(sc.error, layout.error_map[a.name], f"the error of area `{a.name}`")
            target = layout.target_map[a.name]
            sc.prior = checked(sc.prior, target, f"the prior error of area `{a.name}`")
        sc.activity = checked(sc.activity, layout.state_rows(a.name), f"the activity of area `{a.name}`")
    for ll, l in zip(layout.links, spec.links):
        ls = scores.links[l.id]
        ls.power = checked(ls.power, loop.sent[ll.index], f"the power of link `{l.id}`")
        if not ls.bits >= -PSD_RTOL:  # nan fails too
            raise _ill_conditioned(f"the information rate of link `{l.id}` comes out as {ls.bits:.3g} bits")
        ls.bits = max(ls.bits, 0.0)
    for name in ("weighted_error", "energy_cost", "activity_cost", "objective"):
        value = getattr(scores, name)
        if not np.isfinite(value):
            raise _ill_conditioned(f"the {name.replace('_', ' ')} comes out as {value}")
    return scores


def evaluate(spec: Spec, gains: Gains | None = None) -> Scores:
    """Score a circuit exactly: the stationary regime of ``spec`` under ``gains``.

    Gains pinned in the spec are used as given; ``gains`` supplies the rest
    (``None`` works when the spec pins every gain).

    Examples
    --------
    >>> from hierarchy import load_spec, load_gains, evaluate
    >>> spec = load_spec("specs/single-loop.yaml")                      # doctest: +SKIP
    >>> scores = evaluate(spec, load_gains("specs/single-loop.gains.json", spec))  # doctest: +SKIP
    >>> scores.areas["v1"].error                                        # doctest: +SKIP
    0.21...
    """
    full = check_gains(spec, with_pins(spec, gains))
    return score(Layout(spec), full)


def cost_and_gradient(layout: Layout, gains: Gains, prices=None):
    """Objective ``J`` and its exact gradient with respect to every gain block.

    Uses the adjoint of the Lyapunov equation: with ``Lambda = Phi' Lambda
    Phi + W`` the derivative of ``tr(W Sigma)`` along a change ``dPsi`` of
    ``[Phi Gamma]`` is ``2 tr(Lambda dPsi Cov(q) Psi')``; the rest is the chain
    rule through the (acyclic) signal layer, residuals before predictions.

    Returns
    -------
    J : float
        ``inf`` (and gradient ``None``) if the closed loop is unstable.
    grad : Gains
        Same blocks as ``gains``.
    radius : float

    Examples
    --------
    >>> J, grad, radius = cost_and_gradient(Layout(spec), gains)   # doctest: +SKIP
    >>> grad.links["eye->v1"]["K"].shape                           # doctest: +SKIP
    (2, 2)
    """
    J, dg, radius = flat_cost_and_gradient(layout, layout.flatten(gains), prices)
    return J, (None if dg is None else layout.unflatten(dg)), radius


def _row_dots(A: np.ndarray, ia: np.ndarray, B: np.ndarray, ib: np.ndarray) -> np.ndarray:
    """``A[ia[k]] . B[ib[k]]`` for every ``k``: the entries of ``A B'`` that a
    sparse gain pattern needs."""
    return np.einsum("ij,ij->i", A[ia], B[ib])


def flat_cost_and_gradient(layout: Layout, g: np.ndarray, prices=None):
    """:func:`cost_and_gradient` on the flat gain vector of
    :meth:`Layout.flatten <hierarchy.loop.closedloop.Layout.flatten>`; the
    gradient is a vector in the same order (``None`` when unstable).

    ``prices`` may also be a function of the link powers (spec order) that
    returns the prices: ``J`` and the gradient are then those of the priced
    objective at the prices it returns for this design's powers (the budget
    form's penalty uses this: its gradient is such a priced gradient).

    Only the area rows of ``Phi`` depend on the gains, so the adjoint is
    needed only on those rows: ``Lambda_zz`` from a Lyapunov equation and
    ``Lambda_zx`` from a Stein equation, with the Schur form of the forward
    solve. With ``Y = dJ/dPsi_z`` and ``g_R = Km' Y + 2 diag(price) S Cov(q)``
    (the gradient on what arrives), the compact form gives
    ``dJ/dKm = Y R'``, ``dJ/dPm = -g_R B'``, ``dJ/dGs = (I - Pm)' g_R U'`` and
    ``dJ/dMz = Y`` on the area columns, each read only at its entries.

    Examples
    --------
    >>> lay = Layout(spec)                                                # doctest: +SKIP
    >>> J, dg, radius = flat_cost_and_gradient(lay, lay.flatten(gains))  # doctest: +SKIP
    """
    radius, sol = _solve(layout, g)
    if sol is None:
        return float("inf"), None, radius
    J, lam = _priced_value(layout, sol, prices)
    return J, _gradient(layout, g, sol, lam), radius


def flat_cost(layout: Layout, g: np.ndarray, prices=None):
    """The objective of :func:`flat_cost_and_gradient` alone (``inf`` when
    unstable) and its radius: for trial points that need no gradient, at
    about half the cost (no adjoint)."""
    radius, sol = _solve(layout, g)
    if sol is None:
        return float("inf"), radius
    return _priced_value(layout, sol, prices)[0], radius


def _priced_value(layout: Layout, sol: _Solution, prices):
    """``J`` of a solved design and the price of every link row."""
    st = layout.structure
    if callable(prices):
        prices = prices(_link_powers(st, sol))
    prices = layout.price if prices is None else np.asarray(prices, dtype=float)
    lam = prices[st.row_link]
    err = _error_rows(st, sol)
    activity = np.add.reduceat(np.diag(sol.Sigma)[st.nx:st.nx + st.n_area_states], st.area_start)
    return float(st.w_rows @ err + st.kappa @ activity + lam @ sol.row_power), lam


def _gradient(layout: Layout, g: np.ndarray, sol: _Solution, lam: np.ndarray) -> np.ndarray:
    """The exact gradient of :func:`flat_cost_and_gradient` at a solved
    design with link-row prices ``lam``. Every product with the link rows
    is taken on their sparse patterns (see ``Structure._patterns``): only
    the entries the gains sit on are ever formed."""
    st = layout.structure
    world = _world_part(layout)
    p, Sigma, nx, nz = sol.parts, sol.Sigma, st.nx, st.nz
    h = p.h
    # Adjoint on the area rows. W's area rows: errors and activity (fixed)
    # plus the priced link rows H' diag(price) H.
    f1, f2, dst = st.hh_z
    Wz = st.Wz_fixed + _sums(dst, weights=lam[st.h_rows[f1]] * h[f1] * h[f2],
                                   minlength=nz * st.nxi).reshape(nz, st.nxi)
    Pzx, Pzz = p.Phi_z[:, :nx], p.Phi_z[:, nx:]
    Azz = _stein(sol.schur, True, sol.schur, True, Wz[:, nx:])
    Azz = 0.5 * (Azz + Azz.T)
    Azx = _stein(sol.schur, True, world.schur, True, Pzz.T @ Azz @ Pzx + Wz[:, :nx])
    # Y = 2 (Lambda Psi Cov(q)) on the area rows, over xi, sensor noises, link
    # noises; the last one only at the entries of Q2 (those the gains read).
    AP = Azz @ p.Phi_z
    AP[:, :nx] += Azx @ world.A
    Yx = 2.0 * AP @ Sigma
    Yv = 2.0 * Azz @ (p.Q1 @ st.Omega_v)
    vo, vq, dst = st.v2
    ye = 2.0 * _sums(vq, weights=Azz.ravel()[dst] * p.q2_omega[vo], minlength=len(p.q2))
    Yxf = Yx.ravel()

    # With delayed links, one more slot takes (and drops) the derivatives of their fixed entries.
    dg = np.zeros(len(g) + st.delays)
    dg[st.M.at] = Yx[st.M.rows, nx + st.M.cols]
    if st.delays:
        dg[st.Kd.at] = Yx[st.Kd.rows, nx + st.Kd.cols]
    K, P = st.K, st.P
    ke, kh, kdst = st.km_h
    pk_e, pk_f = st.p_k
    if len(K.at):
        # The -Pm part of what arrives, over link noises: (Pm Ye')' at K's entries.
        dg[K.at] = (_sums(ke, weights=Yxf[kdst] * h[kh], minlength=len(K.at))
                    + _row_dots(Yv, K.rows, p.Gv, K.cols) + ye[st.q_k]
                    - _sums(pk_f, weights=p.p[pk_e] * ye[st.q_p], minlength=len(K.at)))
    # The gradient on what is sent, g_R = Km' Y + 2 diag(price) H Sigma, at H's entries.
    gr = _sums(kh, weights=p.k[ke] * Yxf[kdst], minlength=len(h)) + 2.0 * lam[st.h_rows] * sol.hs
    gRv = st.KmT.matmul(p.k, Yv) + 2.0 * lam[:, None] * (p.Gv @ st.Omega_v)
    hdst, pe, bf = st.h_p
    if len(P.at):
        KYe = _sums(pk_e, weights=p.k[pk_f] * ye[st.q_p], minlength=len(P.at))
        dg[P.at] = -(_sums(pe, weights=gr[hdst] * p.b[bf], minlength=len(P.at)) + KYe
                     - 2.0 * lam[P.rows] * p.P_omega)
    # g_B = (I - Pm)' g_R at B's entries.
    gb = gr[st.h_b] - _sums(bf, weights=p.p[pe] * gr[hdst], minlength=len(st.b_rows))
    gBv = gRv - st.PmT.matmul(p.p, gRv)
    dg[st.Gz.at] = gb[st.b_gz]
    if st.delays:
        dg[st.Pd.at] = -gb[st.b_pd]
    Gv = st.Gv
    bdst, gi, cv = st.b_gv
    dg[Gv.at] = _sums(gi, weights=gb[bdst] * cv, minlength=len(Gv.at)) + gBv[Gv.rows, Gv.cols]
    return dg[:len(g)]
