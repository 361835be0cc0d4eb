"""A quasi-Newton (BFGS, or L-BFGS for many variables) minimiser that never
leaves the stable set.

scipy's L-BFGS-B assumes the objective is finite everywhere; ours is ``inf``
outside the set of stable closed loops, and a line search that steps there
must shrink and retry. So this is the textbook two-loop recursion (Nocedal &
Wright, *Numerical Optimization*, 2nd ed., Alg. 6.1 and 7.4) with a
backtracking Armijo search that treats an unstable trial point as a failed
step. Up to ``DENSE_LIMIT`` variables the full inverse-Hessian update is kept:
the gain valleys are badly conditioned and a dense BFGS crosses them in far
fewer iterations than a limited memory does.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ['DENSE_LIMIT', 'F_FLOOR', 'STALL_GTOL', 'GAIN_TOL', 'HESSIAN_LIMIT', 'CONVERGED', 'ITERATION_LIMIT', 'FAILED', 'Outcome', 'minimise', 'newton_gain']

DENSE_LIMIT = 1500

#: Below this the objective has no scale of its own for the relative tests
#: (an exact zero, or values at rounding level of the prior-relative units).
F_FLOOR = 1e-9

#: Largest relative gradient at which a stalled objective (or a line search
#: that cannot make progress) counts as converged.
STALL_GTOL = 1e-4

#: Largest relative decrease the quasi-Newton model may still promise at a
#: point where no step lowers the objective, for it to count as converged
#: (at high SNR the objective is a small difference of large terms and its
#: rounding noise hides a relative gradient well above STALL_GTOL).
GAIN_TOL = 1e-9
#: Up to this many variables, a point where no step helps is checked with a
#: finite-difference Hessian of the exact gradient (one gradient per variable).
HESSIAN_LIMIT = 200

CONVERGED = "converged"
ITERATION_LIMIT = "iteration limit"
FAILED = "failed"


@dataclass
class Outcome:
    """Result of one minimisation."""

    x: np.ndarray
    f: float
    grad_norm: float
    iterations: int
    status: str
    message: str
    #: The curvature model at the end and the units it is in: pass it to the
    #: next :func:`minimise` from this point to carry on where this one stopped.
    curvature: tuple | None = None


def minimise(fun, x0, *, max_iter=500, gtol=1e-8, ftol=1e-12, memory=12, unit=None, curvature=None,
             callback=None, value=None, precondition=None) -> Outcome:
    """Minimise ``fun(x) -> (f, grad)`` from ``x0``; ``f = inf`` marks a
    forbidden point (unstable loop), which the line search steps back from.

    ``precondition(x, unit)``, if given, is asked for a first inverse
    Hessian (dense, in the variables measured in ``unit``, or ``None``) when
    the dense update starts with no curvature: the model starts there (a
    reset later in the run starts from a scaled identity, as without it).

    ``value(x)``, if given, must return the very ``f`` of ``fun(x)`` at less
    cost: the line search then tries its points by value and asks ``fun``
    for the gradient only at the point it accepts (a ``fun`` that keeps its
    last evaluation then pays there only for the gradient).

    The variables are measured in ``unit`` (their typical sizes; default
    ``max(|x0|, 1)``) and convergence is judged on the objective's own scale,
    so that an optimum far below 1 (a high-SNR circuit) is not declared
    early: the relative gradient (Dennis & Schnabel, *Numerical Methods for
    Unconstrained Optimization and Nonlinear Equations*, 1983, sections 7.1
    and 7.2) ``max_i |g_i| unit_i / max(|f|, F_FLOOR)`` is at most ``gtol``;
    or ``f`` fell by less than ``ftol * max(|f|, F_FLOOR)`` in each of the
    last three iterations while the relative gradient is at most
    ``STALL_GTOL`` (a stall with a larger gradient is not convergence).

    Examples
    --------
    >>> out = minimise(lambda x: (float(x @ x), 2 * x), np.ones(3))
    >>> out.status, round(out.f, 12)
    ('converged', 0.0)
    """
    x0 = np.array(x0, dtype=float)
    f, g = fun(x0)
    if not np.isfinite(f):
        return Outcome(x0, f, float("inf"), 0, FAILED, "the starting point is not stable")
    if x0.size == 0:
        return Outcome(x0, f, 0.0, 0, CONVERGED, "no free gains")
    # Work in variables measured by their typical sizes: gains far from 1
    # (high SNR) otherwise make the first steps, and the curvature learnt
    # from them, useless along the large ones.
    unit = np.maximum(np.abs(x0), 1.0) if unit is None else np.asarray(unit, dtype=float)
    outer = fun

    def fun(z):
        f, g = outer(z * unit)
        return f, (None if g is None else g * unit)

    if value is None:
        def trial(z):
            return fun(z)
    else:
        def trial(z):
            f = value(z * unit)
            return f, None

    x, g = x0 / unit, g * unit
    curv = _Dense() if x.size <= DENSE_LIMIT else _Limited(memory)
    if curvature is not None and type(curvature[0]) is type(curv) and len(curvature[1]) == x.size:
        # Carry on with an earlier run's curvature, brought into these units
        # (cutting a long run into rounds must not make it start afresh).
        curv = curvature[0]
        curv.rescale(curvature[1] / unit)
    if precondition is not None and isinstance(curv, _Dense) and not curv.ready:
        curv.start(precondition(x0, unit))
    small_steps = 0
    for it in range(1, max_iter + 1):
        gnorm = float(np.max(np.abs(g)))
        grel = _relative(f, g)
        if grel <= gtol:
            return Outcome(x * unit, f, grel, it - 1, CONVERGED, f"relative gradient {grel:.2e} below tolerance",
                           (curv, unit))
        d = curv.direction(g)
        slope = float(g @ d)
        # Decrease the quasi-Newton model still promises (half the squared
        # Newton decrement, Boyd & Vandenberghe, Convex Optimization, 9.5.1).
        model_gain = -0.5 * slope if curv.ready and slope < 0 else np.inf
        if not slope < 0 or not np.all(np.isfinite(d)):
            # (An overflowed model gives a non-finite direction, and a line
            # search along it would never reach its end test.)
            curv.reset()
            d, slope = -g, -float(g @ g)
        step = 1.0 if curv.ready else min(1.0, 1.0 / max(gnorm, 1e-12))
        while True:
            x_new = x + step * d
            f_new, g_new = trial(x_new)
            if np.isfinite(f_new) and f_new <= f + 1e-4 * step * slope:
                if g_new is None:
                    f_new, g_new = fun(x_new)
                break
            step *= 0.5 if np.isfinite(f_new) else 0.25
            if step * np.max(np.abs(d)) < 1e-14 * max(1.0, np.max(np.abs(x))):
                if curv.ready:  # stale curvature: retry once along the gradient
                    curv.reset()
                    d, slope, step = -g, -float(g @ g), min(1.0, 1.0 / max(gnorm, 1e-12))
                    continue
                # No step lowers f at working precision: converged if the
                # gradient is small or the model has (almost) nothing left to give.
                scale = max(abs(f), F_FLOOR)
                if grel > STALL_GTOL and not model_gain <= GAIN_TOL * scale and x.size <= HESSIAN_LIMIT:
                    model_gain = newton_gain(fun, x, g)
                done = grel <= STALL_GTOL or model_gain <= GAIN_TOL * scale
                return Outcome(x * unit, f, grel, it, CONVERGED if done else FAILED,
                               "line search cannot make progress" + (
                                   f" (a Newton step would lower the objective by {model_gain / scale:.1e} of it)"
                                   if done and grel > STALL_GTOL else ""), (curv, unit))
        curv.update(x_new - x, g_new - g)
        small_steps = small_steps + 1 if f - f_new <= ftol * max(abs(f), F_FLOOR) else 0
        x, f, g = x_new, f_new, g_new
        if callback is not None:
            callback(x * unit, f)
        if small_steps >= 3:
            grel = _relative(f, g)
            if grel <= STALL_GTOL:
                return Outcome(x * unit, f, grel, it, CONVERGED, "objective stopped falling", (curv, unit))
            # A stall on a slope: the curvature model is stale; start it afresh.
            curv.reset()
            small_steps = 0
    return Outcome(x * unit, f, _relative(f, g), max_iter, ITERATION_LIMIT,
                   f"stopped after {max_iter} iterations", (curv, unit))


def newton_gain(fun, x, g, h=1e-6) -> float:
    """Decrease a Newton step would bring, ``g' H^-1 g / 2``, with ``H`` the
    central-difference Hessian of the exact gradient ``fun(x)[1]`` (steps
    ``h`` in each variable's units); ``inf`` at a saddle, where the gradient
    has a part along a flat direction, or if a trial point is forbidden.

    Examples
    --------
    >>> fun = lambda x: (float(x @ x + 1), 2 * x)
    >>> round(newton_gain(fun, np.array([1e-3, 0.0]), np.array([2e-3, 0.0])), 9)
    1e-06
    """
    n = len(x)
    H = np.empty((n, n))
    for j in range(n):
        e = np.zeros(n)
        e[j] = h
        gp, gm = fun(x + e)[1], fun(x - e)[1]
        if gp is None or gm is None:
            return float("inf")
        H[:, j] = (gp - gm) / (2 * h)
    w, V = np.linalg.eigh(0.5 * (H + H.T))
    gv = V.T @ g
    flat = np.abs(w) <= 1e-9 * max(np.abs(w).max(), 1e-300)
    # Directions the objective does not feel at all (say a gain of a link
    # that is switched off) are fine if the gradient has no part along them.
    if np.any(w[~flat] < 0) or np.any(np.abs(gv[flat]) > 1e-9 * np.abs(g).max(initial=0.0) + 1e-300):
        return float("inf")
    return float(0.5 * np.sum(gv[~flat] ** 2 / w[~flat]))


def _relative(f, g_scaled) -> float:
    """Relative gradient from a gradient already multiplied by the units."""
    return float(np.max(np.abs(g_scaled), initial=0.0)) / max(abs(f), F_FLOOR)


def _curvature_ok(s, y) -> bool:
    return float(s @ y) > 1e-12 * float(np.linalg.norm(s) * np.linalg.norm(y))


class _Dense:
    """Full BFGS inverse-Hessian approximation.

    Only the upper triangle of ``H`` is kept, and the update is one BLAS
    symmetric rank-2 update (``dsyr2``) in place: the textbook form with
    three outer products made fresh n x n arrays at every iteration and was
    two thirds of a 16-area design's time."""

    def __init__(self):
        self.reset()

    def start(self, H0):
        """Start from ``H0`` (a preconditioner), if not ``None``."""
        if H0 is not None:
            self.H = np.asfortranarray(np.triu(H0))

    def reset(self):
        self.H = None

    @property
    def ready(self):
        return self.H is not None

    def direction(self, g):
        return -g if self.H is None else -_symv(self.H, g)

    def rescale(self, r):
        """Variables multiplied by ``r`` (z_new = r z_old)."""
        if self.H is not None:
            self.H *= np.outer(r, r)

    def forget(self, J):
        """Drop what is known about variables ``J`` (set from outside): no
        coupling to the others, a typical diagonal."""
        if self.H is not None and len(J):
            keep = np.setdiff1d(np.arange(len(self.H)), J)
            typical = float(np.mean(np.diag(self.H)[keep])) if len(keep) else 1.0
            self.H[J, :] = 0.0
            self.H[:, J] = 0.0
            self.H[J, J] = typical

    def update(self, s, y):
        if not _curvature_ok(s, y):
            return
        rho = 1.0 / float(y @ s)
        if self.H is None:
            self.H = np.asfortranarray(np.eye(len(s)) * (float(s @ y) / float(y @ y)))
        Hy = _symv(self.H, y)
        # H + c s s' - rho (Hy s' + s Hy') = H + s a' + a s' with a = c/2 s - rho Hy.
        a = 0.5 * (rho * rho * float(y @ Hy) + rho) * s - rho * Hy
        self.H = _syr2(s, a, self.H)


def _symv(H, v):
    from scipy.linalg.blas import dsymv

    return dsymv(1.0, H, v, lower=0)


def _syr2(x, y, H):
    from scipy.linalg.blas import dsyr2

    return dsyr2(1.0, x, y, a=H, lower=0, overwrite_a=True)


class _Limited:
    """L-BFGS two-loop recursion over the last ``memory`` pairs."""

    def __init__(self, memory):
        self.memory = memory
        self.reset()

    def reset(self):
        self.S, self.Y = [], []

    @property
    def ready(self):
        return bool(self.S)

    def rescale(self, r):
        """Variables multiplied by ``r`` (z_new = r z_old)."""
        self.S = [s * r for s in self.S]
        self.Y = [y / r for y in self.Y]

    def forget(self, J):
        """Drop what is known about variables ``J`` (set from outside)."""
        for s, y in zip(self.S, self.Y):
            s[J] = 0.0
            y[J] = 0.0
        pairs = [(s, y) for s, y in zip(self.S, self.Y) if _curvature_ok(s, y)]
        self.S, self.Y = [s for s, _ in pairs], [y for _, y in pairs]

    def update(self, s, y):
        if not _curvature_ok(s, y):
            return
        self.S.append(s)
        self.Y.append(y)
        if len(self.S) > self.memory:
            self.S.pop(0)
            self.Y.pop(0)

    def direction(self, g):
        S, Y = self.S, self.Y
        q = -g.copy()
        alphas = []
        for s, y in zip(reversed(S), reversed(Y)):
            rho = 1.0 / float(y @ s)
            a = rho * float(s @ q)
            alphas.append((rho, a))
            q -= a * y
        if S:
            q *= float(S[-1] @ Y[-1]) / float(Y[-1] @ Y[-1])
        for (s, y), (rho, a) in zip(zip(S, Y), reversed(alphas)):
            b = rho * float(y @ q)
            q += (a - b) * s
        return q
