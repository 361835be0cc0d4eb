"""A limited-memory quasi-Newton (L-BFGS) minimiser that never leaves the
stable set.

scipy's L-BFGS-B assumes the objective is finite everywhere; ours is ``inf``
outside the set of stable closed loops, and a line search that steps there
must shrink and retry. So this is the textbook two-loop recursion (Nocedal &
Wright, *Numerical Optimization*, 2nd ed., Alg. 7.4) with a backtracking
Armijo search that treats an unstable trial point as a failed step.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

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
    S, Y = [], []
    small_steps = 0
    for it in range(1, max_iter + 1):
        gnorm = float(np.max(np.abs(g)))
        if gnorm <= gtol * max(1.0, abs(f)):
            return Outcome(x, f, gnorm, it - 1, CONVERGED, f"gradient {gnorm:.2e} below tolerance")
        d = _direction(g, S, Y)
        slope = float(g @ d)
        if slope >= 0:
            S, Y = [], []
            d, slope = -g, -float(g @ g)
        step = 1.0 if S else min(1.0, 1.0 / max(gnorm, 1e-12))
        while True:
            x_new = x + step * d
            f_new, g_new = fun(x_new)
            if np.isfinite(f_new) and f_new <= f + 1e-4 * step * slope:
                break
            step *= 0.5 if np.isfinite(f_new) else 0.25
            if step * np.max(np.abs(d)) < 1e-14 * max(1.0, np.max(np.abs(x))):
                if S:  # stale curvature: retry once along the gradient
                    S, Y = [], []
                    d, slope, step = -g, -float(g @ g), min(1.0, 1.0 / max(gnorm, 1e-12))
                    continue
                return Outcome(x, f, gnorm, it, CONVERGED if gnorm <= 1e-5 * max(1.0, abs(f)) else FAILED,
                               "line search cannot make progress")
        s, y = x_new - x, g_new - g
        if float(s @ y) > 1e-12 * float(np.linalg.norm(s) * np.linalg.norm(y)):
            S.append(s)
            Y.append(y)
            if len(S) > memory:
                S.pop(0)
                Y.pop(0)
        small_steps = small_steps + 1 if f - f_new <= ftol * max(1.0, abs(f)) else 0
        x, f, g = x_new, f_new, g_new
        if callback is not None:
            callback(x, f)
        if small_steps >= 3:
            return Outcome(x, f, float(np.max(np.abs(g))), it, CONVERGED, "objective stopped falling")
    return Outcome(x, f, float(np.max(np.abs(g))), max_iter, ITERATION_LIMIT,
                   f"stopped after {max_iter} iterations")


def _direction(g, S, Y):
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
