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

DENSE_LIMIT = 1500

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


def minimise(fun, x0, *, max_iter=500, gtol=1e-8, ftol=1e-12, memory=12, callback=None) -> Outcome:
    """Minimise ``fun(x) -> (f, grad)`` from ``x0``; ``f = inf`` marks a
    forbidden point (unstable loop), which the line search steps back from.

    Convergence: the largest gradient entry is at most ``gtol * max(1, |f|)``,
    or ``f`` fell by less than ``ftol * max(1, |f|)`` in each of the last three
    iterations.

    Examples
    --------
    >>> out = minimise(lambda x: (float(x @ x), 2 * x), np.ones(3))
    >>> out.status, round(out.f, 12)
    ('converged', 0.0)
    """
    x = np.array(x0, dtype=float)
    f, g = fun(x)
    if not np.isfinite(f):
        return Outcome(x, f, float("inf"), 0, FAILED, "the starting point is not stable")
    if x.size == 0:
        return Outcome(x, f, 0.0, 0, CONVERGED, "no free gains")
    curv = _Dense() if x.size <= DENSE_LIMIT else _Limited(memory)
    small_steps = 0
    for it in range(1, max_iter + 1):
        gnorm = float(np.max(np.abs(g)))
        if gnorm <= gtol * max(1.0, abs(f)):
            return Outcome(x, f, gnorm, it - 1, CONVERGED, f"gradient {gnorm:.2e} below tolerance")
        d = curv.direction(g)
        slope = float(g @ d)
        if slope >= 0:
            curv.reset()
            d, slope = -g, -float(g @ g)
        step = 1.0 if curv.ready else min(1.0, 1.0 / max(gnorm, 1e-12))
        while True:
            x_new = x + step * d
            f_new, g_new = fun(x_new)
            if np.isfinite(f_new) and f_new <= f + 1e-4 * step * slope:
                break
            step *= 0.5 if np.isfinite(f_new) else 0.25
            if step * np.max(np.abs(d)) < 1e-14 * max(1.0, np.max(np.abs(x))):
                if curv.ready:  # stale curvature: retry once along the gradient
                    curv.reset()
                    d, slope, step = -g, -float(g @ g), min(1.0, 1.0 / max(gnorm, 1e-12))
                    continue
                return Outcome(x, f, gnorm, it, CONVERGED if gnorm <= 1e-5 * max(1.0, abs(f)) else FAILED,
                               "line search cannot make progress")
        curv.update(x_new - x, g_new - g)
        small_steps = small_steps + 1 if f - f_new <= ftol * max(1.0, abs(f)) else 0
        x, f, g = x_new, f_new, g_new
        if callback is not None:
            callback(x, f)
        if small_steps >= 3:
            return Outcome(x, f, float(np.max(np.abs(g))), it, CONVERGED, "objective stopped falling")
    return Outcome(x, f, float(np.max(np.abs(g))), max_iter, ITERATION_LIMIT,
                   f"stopped after {max_iter} iterations")


def _curvature_ok(s, y) -> bool:
    return float(s @ y) > 1e-12 * float(np.linalg.norm(s) * np.linalg.norm(y))


class _Dense:
    """Full BFGS inverse-Hessian approximation."""

    def __init__(self):
        self.reset()

    def reset(self):
        self.H = None

    @property
    def ready(self):
        return self.H is not None

    def direction(self, g):
        return -g if self.H is None else -(self.H @ g)

    def update(self, s, y):
        if not _curvature_ok(s, y):
            return
        rho = 1.0 / float(y @ s)
        if self.H is None:
            self.H = np.eye(len(s)) * (float(s @ y) / float(y @ y))
        Hy = self.H @ y
        self.H += (rho * rho * float(y @ Hy) + rho) * np.outer(s, s) - rho * (np.outer(Hy, s) + np.outer(s, Hy))


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
