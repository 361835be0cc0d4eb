"""The structure-exploiting exact evaluation against a plain dense one.

The reference below is the textbook computation (model.md, "Exact
evaluation"): the full closed loop from :func:`hierarchy.loop.closedloop.assemble`,
one ``scipy.linalg.solve_discrete_lyapunov`` on the whole ``Phi``, every score
a trace over ``Cov(q) = blkdiag(Sigma, Omega)``, and the gradient from the
dense adjoint ``Lambda = Phi' Lambda Phi + W`` with ``W`` a dense matrix over
``q``. The evaluation under test never forms those dense objects; both must
agree to 1e-9 relative.
"""

import numpy as np
import pytest
import scipy.linalg as sla

from hierarchy.loop.closedloop import Layout, assemble
from hierarchy.loop.evaluate import cost_and_gradient, score, spectral_radius
from hierarchy.loop.gains import Gains, gain_shapes
from hierarchy.spec.generate import generate_spec_text
from hierarchy.spec.model import PREDICTION
from hierarchy.spec import parse_spec

RTOL = 1e-9


def dense_reference(layout, gains, prices):
    """Scores and gradient the plain way: dense rows over q, one Lyapunov
    solve on the full Phi, dense cost matrix W, dense adjoint."""
    spec = layout.spec
    loop = assemble(layout, gains)
    nxi = layout.nxi
    V = loop.Gamma @ layout.Omega @ loop.Gamma.T
    Sigma = sla.solve_discrete_lyapunov(loop.Phi, V)
    Sigma = 0.5 * (Sigma + Sigma.T)
    Cq = np.zeros((layout.nq, layout.nq))
    Cq[:nxi, :nxi] = Sigma
    Cq[nxi:, nxi:] = layout.Omega
    quad = (lambda rows: float(np.einsum("ij,ij->", rows @ Cq, rows)))
    errors = {a.name: quad(layout.error_map[a.name]) for a in spec.areas if a.has_target}
    priors = {a.name: quad(layout.target_map[a.name]) for a in spec.areas if a.has_target}
    activity = {a.name: quad(layout.state_rows(a.name)) for a in spec.areas}
    covs = [H @ Cq @ H.T for H in loop.sent]
    powers = np.array([np.trace(c) for c in covs])
    J = (sum(a.weight * errors[a.name] for a in spec.areas if a.has_target)
         + sum(a.activity_price * activity[a.name] for a in spec.areas) + float(prices @ powers))

    W = np.zeros((layout.nq, layout.nq))
    for a in spec.areas:
        if a.has_target:
            F = layout.error_map[a.name]
            W += a.weight * F.T @ F
        Z = layout.state_rows(a.name)
        W += a.activity_price * Z.T @ Z
    for ll in layout.links:
        W += prices[ll.index] * loop.sent[ll.index].T @ loop.sent[ll.index]
    Lam = sla.solve_discrete_lyapunov(loop.Phi.T, W[:nxi, :nxi])
    GPsi = 2.0 * (0.5 * (Lam + Lam.T)) @ loop.Psi @ Cq
    grad = Gains()
    g_recv = [np.zeros_like(r) for r in loop.received]
    for a in spec.areas:
        sl = layout.area_slice[a.name]
        grad.areas[a.name] = {"M": GPsi[sl, sl]}
    for ll in layout.links:
        grad.links[ll.id] = {}
        if ll.target_is_area:
            Ga = GPsi[layout.area_slice[ll.target]]
            grad.links[ll.id]["K"] = Ga @ loop.received[ll.index].T
            g_recv[ll.index] += gains.links[ll.id]["K"].T @ Ga
    # Residuals first: they pass gradient on to the predictions they subtract.
    for ll in sorted(layout.links, key=lambda ll: ll.kind == PREDICTION):
        g_sent = g_recv[ll.index] + 2.0 * prices[ll.index] * loop.sent[ll.index] @ Cq
        U = layout.output[ll.source]
        grad.links[ll.id]["G" if ll.kind == PREDICTION else "S"] = g_sent @ U.T
        if ll.pair is not None:
            grad.links[ll.id]["P"] = -g_sent @ loop.received[ll.pair].T
            g_recv[ll.pair] -= gains.links[ll.id]["P"].T @ g_sent
    return {"J": J, "errors": errors, "priors": priors, "activity": activity, "powers": powers,
            "covs": covs, "grad": grad, "radius": spectral_radius(loop.Phi)}


def random_gains(layout, seed):
    """Random gains, shrunk until the area block is comfortably stable."""
    rng = np.random.default_rng(seed)
    shapes = gain_shapes(layout.spec)
    g = Gains({o: {k: 0.5 * rng.standard_normal(s) for k, s in b.items()} for o, b in shapes["areas"].items()},
              {o: {k: 0.5 * rng.standard_normal(s) for k, s in b.items()} for o, b in shapes["links"].items()})
    while spectral_radius(assemble(layout, g).Phi[layout.nx:, layout.nx:]) >= 0.9:
        for blocks in g.links.values():
            if "K" in blocks:
                blocks["K"] *= 0.8
        for blocks in g.areas.values():
            blocks["M"] *= 0.9
    return g


def assert_close(got, want, scale=None, what="", rtol=RTOL):
    scale = np.max(np.abs(want)) if scale is None else scale
    assert np.max(np.abs(np.asarray(got) - np.asarray(want))) <= rtol * scale, what


def check_against_reference(spec, seed, rtol=RTOL):
    layout = Layout(spec)
    gains = random_gains(layout, seed)
    rng = np.random.default_rng(seed + 100)
    # Prices on every link, including unpriced or budgeted ones (as the budget form does).
    prices = rng.uniform(0.0, 0.3, len(spec.links))
    ref = dense_reference(Layout(spec), gains, prices)
    J, grad, radius = cost_and_gradient(layout, gains, prices)
    assert J == pytest.approx(ref["J"], rel=rtol)
    assert radius == pytest.approx(ref["radius"], rel=rtol)
    gscale = max(np.max(np.abs(b)) for t in ("areas", "links") for blocks in getattr(ref["grad"], t).values()
                 for b in blocks.values())
    for table in ("areas", "links"):
        want, got = getattr(ref["grad"], table), getattr(grad, table)
        assert set(got) == set(want)
        for owner, blocks in want.items():
            assert set(got[owner]) == set(blocks)
            for name, block in blocks.items():
                assert_close(got[owner][name], block, gscale, f"gradient {owner}.{name}", rtol)
    sc = score(layout, gains, prices)
    assert sc.objective == pytest.approx(ref["J"], rel=rtol)
    for a in spec.areas:
        assert sc.areas[a.name].activity == pytest.approx(ref["activity"][a.name], rel=RTOL)
        if a.has_target:
            assert sc.areas[a.name].error == pytest.approx(ref["errors"][a.name], rel=RTOL)
            assert sc.areas[a.name].prior == pytest.approx(ref["priors"][a.name], rel=RTOL)
    pscale = max(ref["powers"].max(), 1e-300)
    for ll, l in zip(layout.links, spec.links):
        assert_close(sc.links[l.id].power, ref["powers"][ll.index], pscale, f"power {l.id}")
    return layout


@pytest.mark.parametrize("seed", range(4))
def test_generated_circuits_match_dense_reference(seed):
    # Lags up to 2, relays, predictions into sensors, skips and laterals.
    spec = parse_spec(generate_spec_text(areas=6, levels=3, density=0.4, seed=seed, max_lag=2, relays=0.3))
    assert any(a.lag > 0 for a in spec.areas) or seed != 0
    check_against_reference(spec, seed)


def test_budgeted_circuit_with_wide_areas_matches_dense_reference():
    # Areas larger than their target (private memory), tiers smaller than areas,
    # unpriced budgeted links (priced here as the budget form prices them).
    spec = parse_spec(generate_spec_text(areas=5, levels=2, density=0.6, seed=7, area_dim=3, world_dim=4,
                                         max_lag=3, budgets=True))
    check_against_reference(spec, 7)


# Everything the generator does not make: a sensor seeing two blocks, a
# bottleneck, a residual without a prediction to subtract, a prediction with no
# residual back, a noiseless link, a singular-noise link (its sender pinned),
# activity prices.
ODD = """
spec: 1
world:
  states:
    a: {dim: 2, dynamics: [[0.8, 0.2], [-0.1, 0.7]], noise: [0.1, 0.05]}
    b: {dim: 1, dynamics: 0.9, noise: 0.02, driven_by: {a: [[0.2, 0.1]]}}
sensors:
  s1: {observes: {a: identity, b: [[0.5], [0.0]]}, noise: [0.1, 0.2]}
  s2: {observes: {b: 1.0}, noise: 0.05}
areas:
  low: {tracks: a, dim: 3, activity_price: 0.05}
  mid: {dim: 2}
  top: {tracks: [b, a], lag: 2, weight: 2.0}
links:
  - {from: s1, to: low, kind: residual, noise: [[0.02, 0.01], [0.01, 0.03]], price: 0.1}
  - {from: low, to: s1, kind: prediction, noise: 0.01, price: 0.2}
  - {from: s2, to: mid, kind: residual}
  - {from: low, to: mid, kind: residual, dim: 1, noise: 0.02, price: 0.1}
  - {from: mid, to: low, kind: prediction, noise: [[0.01, 0.0, 0.0], [0.0, 0.02, 0.0], [0.0, 0.0, 0.0]],
     pin: {G: [[1.0, 0.0], [0.0, 1.0], [0.5, 0.5]]}}
  - {from: low, to: top, kind: prediction, noise: 0.02, price: 0.1}
  - {from: mid, to: top, kind: residual, noise: 0.03, price: 0.05}
  - {from: top, to: s2, kind: prediction, noise: 0.01, price: 0.1}
  - {from: s2, to: top, kind: residual, noise: 0.01, price: 0.1, pin: {S: 1.0}}
  - {from: top, to: mid, kind: prediction, noise: 0.02, price: 0.1}
"""


@pytest.mark.parametrize("seed", range(3))
def test_odd_circuit_matches_dense_reference(seed):
    check_against_reference(parse_spec(ODD), seed)


@pytest.mark.parametrize("areas,seed", [(12, 0), (16, 5)])
def test_sparse_link_rows_match_dense_reference_at_default_density(areas, seed):
    # The generator's default density (0.2 on areas / 2 levels), where link
    # rows are a few entries each: the sparse patterns give the dense
    # reference's numbers to 1e-10 relative.
    spec = parse_spec(generate_spec_text(areas=areas, levels=areas // 2, density=0.2, seed=seed))
    check_against_reference(spec, seed, rtol=1e-10)


def _problem_points(priced=False):
    from hierarchy.design.problem import Problem

    spec = parse_spec(generate_spec_text(areas=10, levels=5, density=0.3, seed=2, max_lag=1))
    prices = np.random.default_rng(3).uniform(0.05, 0.3, len(spec.links)) if priced else None
    prob = Problem(spec, prices)
    rng = np.random.default_rng(4)
    return prob, [prob.random_start(rng) for _ in range(3)]


@pytest.mark.parametrize("priced", [False, True])
def test_value_only_is_the_value_of_value_and_grad(priced):
    from hierarchy.design.problem import Problem

    prob, points = _problem_points(priced)
    fresh = Problem(prob.spec, prob.prices)
    for x in points:
        f = prob.value(x)
        f_full, g = prob.value_and_grad(x)  # reuses the solve of value(x)
        assert f == f_full
        f_fresh, g_fresh = fresh.value_and_grad(x.copy())
        assert f == f_fresh and np.array_equal(g, g_fresh)
    # A new point after an old one: no stale solve.
    assert prob.value(points[0]) == fresh.value_and_grad(points[0])[0]
    assert prob.solves == 4 and prob.values == 4 and prob.evaluations == 3


def test_line_search_by_value_walks_the_same_iterates():
    from hierarchy.design.quasinewton import minimise

    prob, points = _problem_points()
    plain = minimise(prob.value_and_grad, points[0], max_iter=40, unit=prob.units(points[0]))
    solves = prob.solves
    by_value = minimise(prob.value_and_grad, points[0], max_iter=40, unit=prob.units(points[0]), value=prob.value)
    assert np.array_equal(plain.x, by_value.x) and plain.f == by_value.f
    assert plain.iterations == by_value.iterations
    # Rejected trial points cost a value only, so no more solves than before.
    assert prob.solves - solves <= solves


def test_exact_evaluation_builds_no_dense_noise_covariance():
    # Memory at scale: the dense (nu x nu) noise covariance and the (nq x nq)
    # cost matrix are never formed; only Layout.Omega would build the former.
    spec = parse_spec(generate_spec_text(areas=8, levels=4, density=0.3, seed=1))
    layout = Layout(spec)
    gains = random_gains(layout, 1)
    layout = Layout(spec)
    cost_and_gradient(layout, gains)
    score(layout, gains)
    assert "Omega" not in vars(layout)


def test_search_keeps_a_margin_from_the_stability_edge():
    # An area whose own memory sits at radius 1 - 1e-7 is stable (its scores
    # exist) but beyond the search's margin: the search sees it as forbidden.
    from hierarchy.design.problem import SEARCH_MARGIN, Problem
    from hierarchy.loop.evaluate import flat_cost

    spec = parse_spec("""
spec: 1
world: {states: {x: {dim: 1, dynamics: 0.9, noise: 0.1}}}
sensors: {s: {observes: {x: 1.0}, noise: 0.2}}
areas: {a: {tracks: x}}
links:
  - {from: s, to: a, kind: residual, noise: 0.05, price: 0.1}
""")
    prob = Problem(spec)
    theta = np.zeros(prob.size)
    (sl,) = prob.slices("a", "M")
    for edge, searchable in ((1 - 0.1 * SEARCH_MARGIN, False), (1 - 10 * SEARCH_MARGIN, True)):
        theta[sl] = edge
        assert np.isfinite(flat_cost(prob.layout, prob.flat(theta))[0])
        assert np.isfinite(prob.value(theta)) == searchable
        assert (prob.value_and_grad(theta)[1] is not None) == searchable
