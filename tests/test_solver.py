"""The quasi-Newton minimiser on functions with known minima.

Sources: the BFGS inverse update and the two-loop recursion are those of
Nocedal & Wright, Numerical Optimization, 2nd ed. (6.17, Alg. 7.4); the
Rosenbrock function's minimum (1, 1) is the textbook one; the Newton
decrement of a quadratic 0.5 x'Ax - b'x at x is 0.5 g'A^-1 g exactly.
"""

import numpy as np
import pytest

from hierarchy.design.quasinewton import CONVERGED, _Dense, _Limited, minimise, newton_gain


def rosenbrock(x):
    a, b = x[0], x[1]
    f = (1 - a) ** 2 + 100 * (b - a * a) ** 2
    return float(f), np.array([-2 * (1 - a) - 400 * a * (b - a * a), 200 * (b - a * a)])


def test_rosenbrock_minimum():
    out = minimise(rosenbrock, np.array([-1.2, 1.0]), max_iter=500)
    assert out.status == CONVERGED
    np.testing.assert_allclose(out.x, [1.0, 1.0], atol=1e-6)


def test_forbidden_region_is_stepped_back_from():
    # f = inf beyond x = 1 (an unstable loop, in the designer); the minimum of
    # the finite part, (x - 2)^2 on x < 1, is approached but never crossed.
    fun = lambda x: (float((x[0] - 2) ** 2), 2 * (x - 2)) if x[0] < 1 else (float("inf"), None)
    out = minimise(fun, np.array([0.0]), max_iter=200)
    assert np.isfinite(out.f) and out.x[0] < 1 and out.x[0] > 0.99
    assert out.status != CONVERGED  # the gradient there is not small: no false claim


def test_convergence_is_judged_relative_to_the_objective():
    # Minimum value 1e-12 at x = (1e3, 1e-3): an absolute test would stop at
    # once; the relative one goes on to the minimum.
    scale = np.array([1e3, 1e-3])
    fun = lambda x: (float(np.sum(((x - scale) / scale) ** 2) + 1e-12), 2 * (x - scale) / scale ** 2)
    out = minimise(fun, np.array([2e3, 2e-3]), max_iter=500, gtol=1e-8)
    assert out.status == CONVERGED
    np.testing.assert_allclose(out.x, scale, rtol=1e-6)


def test_rounds_with_carried_curvature_match_one_run():
    # Cutting a run into rounds of 7 iterations, carrying the curvature, gives
    # the very same iterates as one run (same units throughout).
    x0 = np.array([-1.2, 1.0])
    whole = minimise(rosenbrock, x0, max_iter=500, unit=np.ones(2))
    x, curvature, total = x0, None, 0
    while True:
        out = minimise(rosenbrock, x, max_iter=7, unit=np.ones(2), curvature=curvature)
        total += out.iterations
        x, curvature = out.x, out.curvature
        if out.status == CONVERGED:
            break
    assert total == whole.iterations
    np.testing.assert_allclose(x, whole.x, rtol=0, atol=1e-12)


def test_dense_update_is_the_textbook_bfgs_update():
    rng = np.random.default_rng(0)
    dense, H = _Dense(), None
    for _ in range(15):
        s = rng.standard_normal(8)
        y = s + 0.2 * rng.standard_normal(8)
        if H is None:
            H = np.eye(8) * (s @ y) / (y @ y)
        rho = 1 / (y @ s)
        V = np.eye(8) - rho * np.outer(y, s)
        H = V.T @ H @ V + rho * np.outer(s, s)
        dense.update(s, y)
    g = rng.standard_normal(8)
    np.testing.assert_allclose(dense.direction(g), -H @ g, rtol=1e-12, atol=1e-12)


def trained(curv, seed, n=4, pairs=4, noise=0.1):
    """``curv`` after ``pairs`` random curvature pairs in ``n`` variables."""
    rng = np.random.default_rng(seed)
    for _ in range(pairs):
        s = rng.standard_normal(n)
        curv.update(s, s + noise * rng.standard_normal(n))
    return curv


def test_rescaled_dense_curvature_is_the_same_model_in_new_units():
    curv = trained(_Dense(), seed=1)
    g = np.random.default_rng(5).standard_normal(4)
    r = np.array([2.0, 0.5, 10.0, 1.0])  # z_new = r z_old, so g_new = g_old / r
    before = curv.direction(g)
    curv.rescale(r)
    np.testing.assert_allclose(curv.direction(g / r), r * before, rtol=1e-12)


def test_rescaled_limited_memory_keeps_the_secant_equation():
    # L-BFGS's starting matrix is a multiple of I in whatever units it runs
    # in, so only the stored pairs carry over: in the new units the model
    # still maps the last gradient change onto the last step (H y = s).
    curv = trained(_Limited(5), seed=1)
    r = np.array([2.0, 0.5, 10.0, 1.0])
    s_new, y_new = curv.S[-1] * r, curv.Y[-1] / r
    curv.rescale(r)
    np.testing.assert_allclose(-curv.direction(y_new), s_new, rtol=1e-10)


def test_forgotten_variables_are_uncoupled():
    curv = trained(_Dense(), seed=2, n=5, pairs=6, noise=0.3)
    curv.forget(np.array([1, 3]))
    g = np.zeros(5)
    g[1] = 1.0
    d = curv.direction(g)
    assert d[1] < 0 and np.all(d[[0, 2, 3, 4]] == 0)


def test_newton_gain_of_a_quadratic():
    A = np.array([[4.0, 1.0], [1.0, 3.0]])
    b = np.array([1.0, 2.0])
    fun = lambda x: (float(0.5 * x @ A @ x - b @ x), A @ x - b)
    x = np.array([0.3, -0.2])
    g = fun(x)[1]
    assert newton_gain(fun, x, g) == pytest.approx(0.5 * g @ np.linalg.solve(A, g), rel=1e-6)
    saddle = lambda x: (float(x[0] ** 2 - x[1] ** 2), np.array([2 * x[0], -2 * x[1]]))
    assert newton_gain(saddle, x, saddle(x)[1]) == float("inf")


def test_a_preconditioner_that_is_the_inverse_hessian_gives_the_newton_step():
    # f = 0.5 x'Ax - b'x with A block diagonal and scales 1e-4 to 1e4 apart:
    # from the exact inverse (in the solver's units) the first BFGS step is
    # the Newton step, which lands on A^-1 b (Nocedal & Wright, 2nd ed., 6.1:
    # BFGS started from the true inverse Hessian of a quadratic). Started
    # from a scaled identity it needs many more iterations.
    rng = np.random.default_rng(3)
    blocks = [rng.normal(size=(3, 3)) for _ in range(4)]
    A = np.zeros((12, 12))
    for k, B in enumerate(blocks):
        A[3 * k:3 * k + 3, 3 * k:3 * k + 3] = B @ B.T + 10.0 ** (2 * k - 3) * np.eye(3)
    b = rng.normal(size=12)
    fun = lambda x: (float(0.5 * x @ A @ x - b @ x), A @ x - b)
    unit = np.ones(12)
    asked = []

    def precondition(x, u):
        asked.append(x.copy())
        return np.linalg.inv(A * np.outer(u, u))

    out = minimise(fun, np.zeros(12), max_iter=500, unit=unit, precondition=precondition, gtol=1e-10)
    plain = minimise(fun, np.zeros(12), max_iter=500, unit=unit, gtol=1e-10)
    assert out.status == CONVERGED and len(asked) == 1
    np.testing.assert_allclose(out.x, np.linalg.solve(A, b), rtol=1e-8)
    assert out.iterations <= 2 < 10 < plain.iterations


def test_carried_curvature_is_not_replaced_by_the_preconditioner():
    # The preconditioner is a start: a run that carries a model on does not ask.
    first = minimise(rosenbrock, np.array([-1.2, 1.0]), max_iter=5, unit=np.ones(2))
    asked = []
    minimise(rosenbrock, first.x, max_iter=5, unit=np.ones(2), curvature=first.curvature,
             precondition=lambda x, u: asked.append(1) or np.eye(2))
    assert not asked


def test_an_overflowing_preconditioner_does_not_hang_the_line_search():
    # A model whose direction overflows (a first inverse Hessian of 1e307,
    # as a block with no curvature once gave) must fall back to the gradient:
    # a line search along an infinite direction never reaches its end test.
    fun = lambda x: (float(x @ x + x[0]), 2 * x + np.array([1.0, 0.0]))
    out = minimise(fun, np.array([300.0, -200.0]), max_iter=200, unit=np.ones(2),
                   precondition=lambda x, u: np.eye(2) * 1e307)
    assert out.status == CONVERGED
    np.testing.assert_allclose(out.x, [-0.5, 0.0], atol=1e-6)
