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

from .closedloop import ClosedLoop, Layout, assemble
from .errors import UnstableError
from .gains import Gains, check_gains, with_pins
from .model import Spec

#: A closed loop must have spectral radius below this to count as stable.
STABLE_RADIUS = 1.0 - 1e-9


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


def stationary_covariance(loop: ClosedLoop) -> np.ndarray:
    """``Sigma`` solving ``Sigma = Phi Sigma Phi' + Gamma Omega Gamma'``."""
    V = loop.Gamma @ loop.layout.Omega @ loop.Gamma.T
    S = sla.solve_discrete_lyapunov(loop.Phi, V)
    return 0.5 * (S + S.T)


def joint_covariance(layout: Layout, Sigma: np.ndarray) -> np.ndarray:
    """``Cov([xi; nu]) = blkdiag(Sigma, Omega)`` (xi(t) and nu(t) are independent)."""
    Cq = np.zeros((layout.nq, layout.nq))
    Cq[:layout.nxi, :layout.nxi] = Sigma
    Cq[layout.nxi:, layout.nxi:] = layout.Omega
    return Cq


def _quad(rows: np.ndarray, Cq: np.ndarray) -> float:
    return float(np.einsum("ij,ij->", rows @ Cq, rows))


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
        raise UnstableError(
            f"{what} is unstable: spectral radius {radius:.6g} (a stationary regime needs < 1)",
            place="gains",
            fix="shrink the area gains M or the loop gains K*S, K*G; `hierarchy design` finds stable gains",
        )
    return radius


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
    """
    spec = layout.spec
    prices = layout.price if prices is None else np.asarray(prices, dtype=float)
    loop = assemble(layout, gains)
    radius = check_stable(loop)
    Sigma = stationary_covariance(loop)
    Cq = joint_covariance(layout, Sigma)
    areas, links = {}, {}
    werr = eng = act = 0.0
    for a in spec.areas:
        activity = _quad(layout.state_rows(a.name), Cq)
        if a.has_target:
            err = _quad(layout.error_map[a.name], Cq)
            prior = _quad(layout.target_map[a.name], Cq)
            rel = err / prior if prior > 0 else float("nan") if err > 0 else 0.0
            werr += a.weight * err
        else:
            err = prior = rel = None
        act += a.activity_price * activity
        areas[a.name] = AreaScore(err, prior, rel, activity, a.weight, a.lag)
    for ll, l in zip(layout.links, spec.links):
        H = loop.sent[ll.index]
        cov_s = H @ Cq @ H.T
        power = float(np.trace(cov_s))
        npow = float(np.trace(l.noise))
        snr = power / npow if npow > 0 else (float("inf") if power > 0 else 0.0)
        links[l.id] = LinkScore(l.kind, power, npow, snr, _bits(cov_s, l.noise), float(prices[ll.index]))
        eng += prices[ll.index] * power
    return Scores(werr + eng + act, werr, eng, act, radius, areas, links)


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
    """
    spec = layout.spec
    prices = layout.price if prices is None else np.asarray(prices, dtype=float)
    loop = assemble(layout, gains)
    radius = loop_radius(loop)
    if not radius < STABLE_RADIUS:
        return float("inf"), None, radius
    nxi = layout.nxi
    Sigma = stationary_covariance(loop)
    Cq = joint_covariance(layout, Sigma)
    # Cost matrix W over q.
    W = np.zeros((layout.nq, layout.nq))
    for a in spec.areas:
        if a.has_target and a.weight:
            F = layout.error_map[a.name]
            W += a.weight * (F.T @ F)
        if a.activity_price:
            sl = layout.area_slice[a.name]
            W[sl, sl] += a.activity_price * np.eye(sl.stop - sl.start)
    for ll in layout.links:
        if prices[ll.index]:
            H = loop.sent[ll.index]
            W += prices[ll.index] * (H.T @ H)
    J = float(np.einsum("ij,ij->", W, Cq))
    Lam = sla.solve_discrete_lyapunov(loop.Phi.T, W[:nxi, :nxi])
    Lam = 0.5 * (Lam + Lam.T)
    GPsi = 2.0 * (Lam @ loop.Psi) @ Cq  # dJ/dPsi
    grad = Gains()
    g_recv = [np.zeros_like(r) for r in loop.received]
    for a in spec.areas:
        sl = layout.area_slice[a.name]
        grad.areas[a.name] = {"M": GPsi[sl, sl].copy()}
    for ll in layout.links:
        grad.links[ll.id] = {}
        if ll.target_is_area:
            Ga = GPsi[layout.area_slice[ll.target]]
            grad.links[ll.id]["K"] = Ga @ loop.received[ll.index].T
            g_recv[ll.index] += gains.links[ll.id]["K"].T @ Ga
    order = [ll for ll in layout.links if ll.kind != "prediction"] + \
            [ll for ll in layout.links if ll.kind == "prediction"]
    for ll in order:
        g_sent = g_recv[ll.index]
        if prices[ll.index]:
            g_sent = g_sent + 2.0 * prices[ll.index] * (loop.sent[ll.index] @ Cq)
        U = layout.output[ll.source]
        if ll.kind == "prediction":
            grad.links[ll.id]["G"] = g_sent @ U.T
        else:
            grad.links[ll.id]["S"] = g_sent @ U.T
            if ll.pair is not None:
                grad.links[ll.id]["P"] = -g_sent @ loop.received[ll.pair].T
                g_recv[ll.pair] -= gains.links[ll.id]["P"].T @ g_sent
    return J, grad, radius
