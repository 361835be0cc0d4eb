"""The information floor against closed forms, reference libraries and designs.

Sources are named beside each check."""

import dataclasses
import importlib
import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg as sla
from scipy.optimize import brentq

from hierarchy.design import Options, design
from hierarchy.loop.evaluate import evaluate
from hierarchy.design.floor import (
    OPTIMAL,
    SKIPPED,
    Floor,
    information_floor,
    least_cut_energy,
    least_error,
    link_capacity,
)
from hierarchy.spec.generate import generate_spec_text
from hierarchy.spec import load_spec, parse_spec

from helpers import random_gains

SPECS = sorted(Path(__file__).resolve().parent.parent.joinpath("specs").glob("*.yaml"))
FAST = Options(restarts=3, max_iter=2000)


def ar1_spec(a, q, N, price=None, budget=None, lag=1, weight=1.0, sensor_noise=0.0, prediction=True):
    """AR(1) world read by one sensor; one residual link of noise N up, and
    (with ``prediction``) a free, noiseless prediction down."""
    cost = f", price: {price}" if price is not None else ""
    text = f"""
spec: 1
world:
  states:
    x: {{dim: 1, dynamics: {a}, noise: {q}}}
sensors:
  s: {{observes: {{x: 1}}, noise: {sensor_noise}}}
areas:
  e: {{tracks: x, lag: {lag}, weight: {weight}}}
links:
  - {{from: s, to: e, kind: residual, noise: {N}{cost}}}
"""
    if prediction:
        text += "  - {from: e, to: s, kind: prediction}\n"
    if budget is not None:
        text += f"budgets: [{{name: b, links: all, total: {budget}}}]\n"
    return parse_spec(text)


# ---------------------------------------------------------------------------
# scalar sequential rate-distortion (docs/model.md 'Information floor'; Tanaka,
# Kim, Parrilo & Mitter, IEEE TAC 2017, scalar case): R(D) = 1/2 log2(a^2 + q/D),
# attained over a noise-N channel with P = N (a^2 + q/D - 1).

A, Q, N = 0.9, 0.2, 0.1


def srd_power(D):
    return N * (A * A + Q / D - 1)


@pytest.mark.parametrize("lag", [0, 1])
def test_scalar_rate_distortion_closed_form(lag):
    lam, w = 0.05, 1.0
    floor = information_floor(ar1_spec(A, Q, N, price=lam, lag=lag, weight=w))
    # Filtering error D; a lag-0 area predicts, error a^2 D + q.
    c = A * A if lag == 0 else 1.0
    D = math.sqrt(lam * N * Q / (w * c))       # minimiser of w c D + lam N (a^2 + q/D - 1)
    assert D < Q / (1 - A * A)                 # inside the range where the rate is positive
    err = c * D + (Q if lag == 0 else 0.0)
    expected = w * err + lam * srd_power(D)
    assert floor.status == OPTIMAL
    assert floor.objective == pytest.approx(expected, rel=1e-6)
    assert floor.objective <= expected
    # The minimiser sits in a flat valley: it is known to about the square
    # root of the solver's tolerance, the value to the tolerance itself.
    assert floor.per_area["e"] == pytest.approx(err, rel=1e-3)
    assert floor.cut_powers["s->e"] == pytest.approx(srd_power(D), rel=1e-3)
    assert floor.rate_bits == pytest.approx(0.5 * math.log2(A * A + Q / D), rel=1e-3)


def test_least_energy_and_least_error_invert_the_closed_form():
    spec = ar1_spec(A, Q, N, price=0.05)
    for D in (0.02, 0.1, 0.3):
        energy = least_cut_energy(spec, {"e": D})
        assert energy.kind == "cut energy"
        assert energy.objective == pytest.approx(srd_power(D), rel=1e-6)
        error = least_error(spec, srd_power(D))
        assert error.objective == pytest.approx(D, rel=1e-6)
    # An error above the prior needs no energy at all (R(D) = 0 there).
    assert least_cut_energy(spec, {"e": 2 * Q / (1 - A * A)}).objective == pytest.approx(0, abs=1e-8)


def test_errors_below_the_sensor_floor_are_infeasible_not_a_number():
    spec = ar1_spec(A, Q, N, price=0.05, sensor_noise=0.3)
    floor = information_floor(spec)
    low = least_cut_energy(spec, {"e": 0.5 * floor.area_floors["e"]})
    assert low.status == "infeasible" and math.isnan(low.objective)
    assert "sensors alone" in low.message


def test_designed_single_loop_meets_the_bound():
    # With a free noiseless prediction the circuit can send innovations, which
    # attains R(D) (docs/model.md); the designed optimum is never below the bound.
    spec = ar1_spec(A, Q, N, price=0.05)
    floor = information_floor(spec)
    res = design(spec)
    assert res.objective >= floor.objective
    assert floor.gap(res.objective) < 1e-6   # measured 1.0e-8: the certification margin


def test_without_prediction_the_design_stays_above_the_bound():
    # Without the prediction a circuit can only send samples of the state,
    # which wastes power on what the area already knows: strictly above.
    spec = ar1_spec(A, Q, N, price=0.05, prediction=False)
    floor = information_floor(spec)
    res = design(spec, FAST)
    assert floor.gap(res.objective) > 1e-3


# ---------------------------------------------------------------------------
# uncoded Gaussian limit (Goblick, IEEE Trans. Inf. Theory 1965): a memoryless
# Gaussian source over a Gaussian channel, error s2 / (1 + P/N), attained.

def test_uncoded_gaussian_limit_is_attained():
    s2, N, B = 2.0, 0.5, 3.0
    spec = ar1_spec(0.0, s2, N, budget=B, prediction=False)
    floor = information_floor(spec)
    expected = s2 / (1 + B / N)
    assert floor.objective == pytest.approx(expected, rel=1e-6)
    res = design(spec, FAST)
    assert res.objective == pytest.approx(floor.objective, rel=1e-6)
    assert res.objective >= floor.objective


def test_vector_link_water_filling_against_reverse_water_filling():
    # Two independent memoryless sources over one vector link with rotated
    # noise: capacity by water-filling on the noise eigenvalues, distortion by
    # reverse water-filling on the variances (Cover & Thomas, Elements of
    # Information Theory, 2006, Sec. 9.4 and Thm 10.3.3).
    var, nev, B = np.array([3.0, 0.3]), np.array([0.1, 1.0]), 0.8
    R = np.array([[math.cos(0.4), -math.sin(0.4)], [math.sin(0.4), math.cos(0.4)]])
    noise = R @ np.diag(nev) @ R.T
    spec = parse_spec(f"""
spec: 1
world:
  states:
    x0: {{dim: 1, dynamics: 0, noise: {var[0]}}}
    x1: {{dim: 1, dynamics: 0, noise: {var[1]}}}
sensors:
  s: {{observes: {{x0: [[1], [0]], x1: [[0], [1]]}}, noise: 0}}
areas:
  a: {{tracks: [x0, x1], lag: 1}}
links:
  - {{from: s, to: a, kind: residual, noise: {noise.tolist()}}}
budgets: [{{name: b, links: all, total: {B}}}]
""")
    cap = link_capacity(noise, B) * math.log(2)            # nats
    theta = brentq(lambda t: 0.5 * np.log(var / np.minimum(t, var)).sum() - cap, 1e-9, var.max())
    expected = np.minimum(theta, var).sum()
    assert information_floor(spec).objective == pytest.approx(expected, rel=1e-6)


def test_link_capacity_closed_form():
    # Water-filling (Cover & Thomas 2006, Sec. 9.4) on two parallel channels.
    n1, n2 = 0.2, 1.0
    for P in (0.3, 0.8, 5.0):
        if P <= n2 - n1:
            expected = 0.5 * math.log2(1 + P / n1)
        else:
            mu = (P + n1 + n2) / 2
            expected = 0.5 * math.log2(mu / n1) + 0.5 * math.log2(mu / n2)
        assert link_capacity(np.diag([n2, n1]), P) == pytest.approx(expected, rel=1e-12)
    assert link_capacity([[0.0]], 1.0) == math.inf
    assert link_capacity([[1.0]], 0.0) == 0.0


# ---------------------------------------------------------------------------
# Kalman limits: unlimited channels leave the sensor floor.

A2 = np.array([[0.9, 0.2], [0.0, 0.7]])
Q2 = np.diag([0.1, 0.2])
C2 = np.array([[1.0, 0.5]])
R2 = np.array([[0.3]])


def kalman_spec(lag, noise=0):
    return parse_spec(f"""
spec: 1
world:
  states:
    x: {{dim: 2, dynamics: {A2.tolist()}, noise: {Q2.tolist()}}}
sensors:
  s: {{observes: {{x: {C2.tolist()}}}, noise: {R2.tolist()}}}
areas:
  a: {{tracks: x, lag: {lag}}}
links:
  - {{from: s, to: a, kind: residual, noise: {noise}{", price: 1e-9" if noise else ""}}}
  - {{from: a, to: s, kind: prediction}}
""")


@pytest.mark.parametrize("lag", [0, 1])
def test_kalman_limit_matches_riccati(lag):
    # a-priori covariance from scipy.linalg.solve_discrete_are (dual form);
    # a-posteriori P - P C'(C P C' + R)^-1 C P.
    P = sla.solve_discrete_are(A2.T, C2.T, Q2, R2)
    post = P - P @ C2.T @ np.linalg.solve(C2 @ P @ C2.T + R2, C2 @ P)
    expected = np.trace(P) if lag == 0 else np.trace(post)
    floor = information_floor(kalman_spec(lag))
    assert floor.objective == pytest.approx(expected, rel=1e-8)
    assert floor.area_floors["a"] == pytest.approx(expected, rel=1e-10)
    assert any("noiseless" in r for r in floor.loose)
    # A nearly free noisy channel approaches the same floor from above.
    cheap = information_floor(kalman_spec(lag, noise=0.01))
    assert expected <= cheap.objective <= expected * (1 + 1e-4)


def test_kalman_limit_matches_python_control():
    # python-control's dlqe: a-priori covariance P, and L = A P C'(CPC'+R)^-1.
    control = pytest.importorskip("control")
    _, P, _ = control.dlqe(A2, np.eye(2), C2, Q2, R2)
    assert information_floor(kalman_spec(0)).objective == pytest.approx(np.trace(P), rel=1e-8)


def conditioned_error(R, back, window=60):
    """tr Cov(x(t - back) | y(t - window + 1 .. t)) (``back = -1``: one step ahead) for the world (A2, Q2) read
    by C2 with noise R, by conditioning the stationary joint Gaussian directly
    (Schur complement; common practice, no source)."""
    Sx = sla.solve_discrete_lyapunov(A2, Q2)
    cov_x = lambda i, j: (np.linalg.matrix_power(A2, i - j) @ Sx if i >= j
                          else Sx @ np.linalg.matrix_power(A2.T, j - i))
    times = range(window)
    Syy = np.block([[C2 @ cov_x(i, j) @ C2.T + (R if i == j else 0 * R) for j in times] for i in times])
    target = window - 1 - back
    Sxy = np.hstack([cov_x(target, j) @ C2.T for j in times])
    return np.trace(Sx - Sxy @ np.linalg.pinv(Syy, hermitian=True) @ Sxy.T)


def test_smoothing_floor_matches_gaussian_conditioning():
    # Lag 2: estimate x(t-2) from sensors up to t-1 (one step of smoothing).
    assert information_floor(kalman_spec(2)).objective == pytest.approx(conditioned_error(R2, 1), rel=1e-8)


def test_noiseless_sensor_floor_matches_gaussian_conditioning():
    # A noiseless sensor of one mixture of a 2-D world: no DARE (R = 0); the
    # filter error still follows from conditioning (lag 1) and one step on (lag 0).
    zero = np.zeros((1, 1))
    spec = dataclasses.replace(kalman_spec(1), sensors=(dataclasses.replace(kalman_spec(1).sensors[0],
                                                                            noise=zero),))
    post = conditioned_error(zero, 0)
    assert information_floor(spec).objective == pytest.approx(post, rel=1e-7)
    spec0 = dataclasses.replace(spec, areas=(dataclasses.replace(spec.areas[0], lag=0),))
    prior = conditioned_error(zero, -1)  # x(t) from readings up to t - 1
    assert information_floor(spec0).objective == pytest.approx(prior, rel=1e-7)


def test_each_hop_costs_one_step_of_delay():
    # An area fed through a relay sees the readings one step later: with
    # noiseless free links, lag 0 is the two-step prediction A P A' + Q, lag 1
    # the one-step one P (P: a-priori DARE covariance, scipy), lag 2 the filter.
    P = sla.solve_discrete_are(A2.T, C2.T, Q2, R2)
    post = P - P @ C2.T @ np.linalg.solve(C2 @ P @ C2.T + R2, C2 @ P)
    expected = {0: np.trace(A2 @ P @ A2.T + Q2), 1: np.trace(P), 2: np.trace(post)}
    for lag, value in expected.items():
        spec = parse_spec(f"""
spec: 1
world:
  states:
    x: {{dim: 2, dynamics: {A2.tolist()}, noise: {Q2.tolist()}}}
sensors:
  s: {{observes: {{x: {C2.tolist()}}}, noise: {R2.tolist()}}}
areas:
  relay: {{dim: 2}}
  top: {{tracks: x, lag: {lag}}}
links:
  - {{from: s, to: relay, kind: residual}}
  - {{from: relay, to: s, kind: prediction}}
  - {{from: relay, to: top, kind: residual}}
""")
        floor = information_floor(spec)
        assert floor.objective == pytest.approx(value, rel=1e-8)
        if lag == 0:
            # The relay can hold the one-step prediction and pass it on: attained.
            res = design(spec, FAST)
            assert floor.objective <= res.objective <= floor.objective * (1 + 1e-6)


def relay_spec(a, q, N, price):
    """AR(1) read without noise by a relay (noiseless, free links), which
    reports to the top area over one noisy priced link, with a free noiseless
    prediction back."""
    return parse_spec(f"""
spec: 1
world:
  states:
    x: {{dim: 1, dynamics: {a}, noise: {q}}}
sensors:
  s: {{observes: {{x: 1}}, noise: 0}}
areas:
  relay: {{dim: 1}}
  top: {{tracks: x, lag: 1}}
links:
  - {{from: s, to: relay, kind: residual}}
  - {{from: relay, to: s, kind: prediction}}
  - {{from: relay, to: top, kind: residual, noise: {N}, price: {price}}}
  - {{from: top, to: relay, kind: prediction}}
""")


def test_area_cut_closed_form_behind_a_relay():
    # The top area's own in-link carries the delayed world x(t-2) at rate
    # 1/2 log2(a^2 + q/D) (scalar sequential rate-distortion, Tanaka et al.
    # 2017), and lag 1 one hop late is a one-step prediction: a^2 D + q.
    lam = 0.05
    spec = relay_spec(A, Q, N, lam)
    D = math.sqrt(lam * N * Q / (A * A))   # minimiser of a^2 D + q + lam N (a^2 + q/D - 1)
    expected = A * A * D + Q + lam * srd_power(D)
    floor = information_floor(spec, area_cuts=True)
    assert floor.objective == pytest.approx(expected, rel=1e-6)
    assert floor.objective <= expected
    # Without the area's own cut only the delay is counted: the bound is q.
    assert information_floor(spec, area_cuts=False).objective == pytest.approx(Q, rel=1e-6)
    # Innovations relayed up attain it.
    res = design(spec)
    assert floor.objective <= res.objective <= floor.objective * (1 + 1e-6)


# ---------------------------------------------------------------------------
# never above an achieved objective

@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.stem)
def test_bound_below_the_designed_objective_of_every_example(path):
    spec = load_spec(path)
    res = design(spec)
    for cuts in (False, True):
        floor = information_floor(spec, area_cuts=cuts)
        assert floor.status == OPTIMAL
        assert 0 < floor.objective <= res.objective
    # The design carries the same bound (computed from the spec alone) and its gap.
    assert res.floor.status == OPTIMAL
    assert res.floor.objective == pytest.approx(information_floor(spec).objective, rel=1e-9)
    assert res.gap == pytest.approx((res.objective - res.floor.objective) / res.objective, rel=1e-12)
    assert 0 <= res.gap < 1


def test_a_bound_above_the_design_is_reported_as_a_contradiction(monkeypatch):
    floor_module = importlib.import_module("hierarchy.design.floor")

    spec = load_spec(SPECS[0])
    res = design(spec, Options(restarts=1), floor=False)
    assert res.floor is None and np.isnan(res.gap)
    honest = information_floor(spec)
    monkeypatch.setattr(floor_module, "information_floor",
                        lambda *a, **k: dataclasses.replace(honest, objective=2 * res.objective))
    bad = importlib.import_module("hierarchy.design").floor_of(res)
    assert bad.status == "contradicted" and not bad.ok and np.isnan(bad.gap(res.objective))
    assert "one of the two is wrong" in bad.message


def test_the_design_command_prints_and_writes_the_floor(tmp_path, capsys):
    from hierarchy.cli import main

    out = tmp_path / "r.json"
    assert main(["design", str(SPECS[0]), "--json", str(out), "--restarts", "1"]) == 0
    text = capsys.readouterr().out
    data = json.loads(out.read_text())
    f = data["floor"]
    assert f["status"] == OPTIMAL and f["objective"] <= data["objective"]
    assert f["relative_gap"] == pytest.approx((data["objective"] - f["objective"]) / data["objective"], rel=1e-9)
    assert "information floor: no circuit of this spec can reach an objective below" in text
    assert f"{100 * f['relative_gap']:.2f}%" in text
    assert main(["design", str(SPECS[0]), "--json", str(out), "--restarts", "1", "--no-floor"]) == 0
    assert "information floor" not in capsys.readouterr().out
    assert "floor" not in json.loads(out.read_text())


@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.stem)
def test_bound_below_random_circuits(path):
    # Any gains make a circuit; in budget form the budgets are set to what the
    # random circuit uses, so it is feasible for the spec the bound is taken of.
    spec = load_spec(path)
    rng = np.random.default_rng(7)
    for _ in range(5):
        g = random_gains(spec, rng)
        sc = evaluate(spec, g)
        used = {b.name: sum(sc.links[i].power for i in b.links) for b in spec.budgets}
        feasible = dataclasses.replace(spec, budgets=tuple(
            dataclasses.replace(b, total=used[b.name]) for b in spec.budgets))
        for cuts in (False, True):
            floor = information_floor(feasible, area_cuts=cuts)
            assert floor.status == OPTIMAL
            assert floor.objective <= sc.objective


@pytest.mark.parametrize("seed", [1, 2])
def test_bound_below_designs_of_generated_circuits(seed):
    spec = parse_spec(generate_spec_text(areas=4, levels=2, density=0.5, seed=seed, max_lag=2))
    res = design(spec, FAST)
    for cuts in (False, True):
        floor = information_floor(spec, area_cuts=cuts)
        assert floor.status == OPTIMAL
        assert floor.objective <= res.objective


# ---------------------------------------------------------------------------
# the Floor object

def test_skipped_for_large_worlds_and_gap_is_nan_without_a_bound():
    spec = kalman_spec(0)
    floor = information_floor(spec, max_dim=1)
    assert floor.status == SKIPPED and math.isnan(floor.objective)
    assert math.isnan(floor.gap(1.0))
    assert floor.to_dict()["objective"] is None
    ok = Floor("objective", 0.8, OPTIMAL, "")
    assert ok.gap(1.0) == pytest.approx(0.2)


def test_no_link_from_a_sensor_leaves_the_prior():
    # Nothing crosses the cut: the error cannot beat the stationary variance
    # q / (1 - a^2) (AR(1) variance, common practice, no source).
    spec = parse_spec("""
spec: 1
world:
  states:
    x: {dim: 1, dynamics: 0.8, noise: 0.36}
sensors:
  s: {observes: {x: 1}, noise: 0.1}
areas:
  a: {tracks: x, lag: 1}
  b: {dim: 1}
links:
  - {from: b, to: a, kind: residual, noise: 0.1, price: 0.1}
""")
    floor = information_floor(spec)
    assert floor.objective == pytest.approx(0.36 / (1 - 0.64), rel=1e-10)


def test_docstring_examples_run(monkeypatch):
    # The Examples sections are doctests; they read specs/ from the repository root.
    import doctest

    module = importlib.import_module("hierarchy.design.floor")

    monkeypatch.chdir(Path(__file__).resolve().parent.parent)
    result = doctest.testmod(module)
    assert result.attempted > 0 and result.failed == 0


@pytest.mark.parametrize("call", [
    lambda s: least_cut_energy(s, {"nowhere": 0.1}),
    lambda s: least_cut_energy(s, {"e": -1.0}),
    lambda s: least_cut_energy(s, {"e": "0.1"}),
    lambda s: least_error(s, float("nan")),
])
def test_bad_limits_are_input_errors(call):
    from hierarchy.errors import InputError

    with pytest.raises(InputError) as info:
        call(ar1_spec(A, Q, N, price=0.05))
    assert info.value.fix
