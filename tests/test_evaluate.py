"""Exact evaluation against independent computations."""

import json

import numpy as np
import pytest
import scipy.linalg as sla

from hierarchy.loop.closedloop import Layout
from hierarchy.errors import GainsError, UnstableError
from hierarchy.loop.evaluate import cost_and_gradient, evaluate, score
from hierarchy.loop.gains import Gains, load_gains, save_gains
from hierarchy.spec import parse_spec

from helpers import random_gains

A = np.array([[0.9, 0.2], [0.0, 0.7]])
Q = np.diag([0.1, 0.2])
C = np.array([[1.0, 0.5]])
R = np.array([[0.3]])

KALMAN = f"""
spec: 1
world:
  states:
    x: {{dim: 2, dynamics: {A.tolist()}, noise: {Q.tolist()}}}
sensors:
  s: {{observes: {{x: {C.tolist()}}}, noise: {R.tolist()}}}
areas:
  a: {{tracks: x, lag: LAG}}
links:
  - {{from: s, to: a, kind: residual}}
  - {{from: a, to: s, kind: prediction}}
"""


def kalman_gains(lag):
    # Steady-state predictor: z(t+1) = A z + A L (y - C z) with the filter gain
    # L = P C'(C P C' + R)^-1, P from the discrete Riccati equation. For lag 1
    # the area holds the filtered estimate of the previous step.
    P = sla.solve_discrete_are(A.T, C.T, Q, R)
    L = P @ C.T @ np.linalg.inv(C @ P @ C.T + R)
    if lag == 0:
        M, K, G = A, A @ L, C
    else:  # z = x_hat(t-1|t-1); the prediction of y(t) is C A z
        M, K, G = A, L, C @ A
    g = Gains(areas={"a": {"M": M}},
              links={"s->a": {"S": np.eye(1), "P": np.eye(1), "K": K}, "a->s": {"G": G}})
    return g, P, P - L @ C @ P


@pytest.mark.parametrize("lag", [0, 1])
def test_kalman_circuit_scores_riccati_covariance(lag):
    # Source: steady-state Kalman filter via scipy.linalg.solve_discrete_are.
    spec = parse_spec(KALMAN.replace("LAG", str(lag)))
    gains, P, post = kalman_gains(lag)
    scores = evaluate(spec, gains)
    expected = np.trace(P) if lag == 0 else np.trace(post)
    assert scores.areas["a"].error == pytest.approx(expected, rel=1e-10)
    # Noiseless links: SNR and rate are infinite, power is Var(C x) for the prediction.
    assert scores.links["a->s"].snr == float("inf")


def test_gradient_matches_finite_differences():
    spec = parse_spec(TWO_LEVEL.format(l1=1, l2=2))
    lay = Layout(spec)
    g = random_gains(spec, 3, scale=0.3, radius=None, per_column=False)
    J, grad, radius = cost_and_gradient(lay, g)
    assert radius < 1
    assert J == pytest.approx(score(lay, g).objective, rel=1e-12)
    eps = 1e-6
    for table in ("areas", "links"):
        for owner, blocks in getattr(g, table).items():
            for name, M in blocks.items():
                for idx in np.ndindex(M.shape):
                    up, down = g.copy(), g.copy()
                    getattr(up, table)[owner][name][idx] += eps
                    getattr(down, table)[owner][name][idx] -= eps
                    fd = (cost_and_gradient(lay, up)[0] - cost_and_gradient(lay, down)[0]) / (2 * eps)
                    assert getattr(grad, table)[owner][name][idx] == pytest.approx(fd, rel=1e-5, abs=1e-8)


# A fully pinned two-level circuit: every gain given, scalar everything.
TWO_LEVEL = """
spec: 1
world:
  states:
    f: {{dim: 1, dynamics: 0.5, noise: 0.2, driven_by: {{s: 0.3}}}}
    s: {{dim: 1, dynamics: 0.9, noise: 0.1}}
sensors:
  y: {{observes: {{f: 1}}, noise: 0.15}}
areas:
  low: {{tracks: f, lag: {l1}, weight: 1.0, activity_price: 0.1, pin: {{M: 0.4}}}}
  high: {{tracks: s, lag: {l2}, weight: 2.0, pin: {{M: 0.8}}}}
links:
  - {{from: y, to: low, kind: residual, noise: 0.05, price: 0.1, pin: {{S: 1.1, P: 0.9, K: 0.6}}}}
  - {{from: low, to: y, kind: prediction, noise: 0.04, price: 0.2, pin: {{G: 0.7}}}}
  - {{from: low, to: high, kind: residual, noise: 0.03, price: 0.3, pin: {{S: 0.8, P: 1.2, K: 0.5}}}}
  - {{from: high, to: low, kind: prediction, noise: 0.02, price: 0.4, pin: {{G: 0.6, K: 0.3}}}}
"""


def hand_scores(l1, l2):
    """The same circuit written out by hand from docs/model.md's equations, its
    stationary covariance found by iterating the covariance recursion (no
    Lyapunov solver, no project code)."""
    Ml, Mh, S1, P1, K1, G1, S2, P2, K3, G2, K2 = 0.4, 0.8, 1.1, 0.9, 0.6, 0.7, 0.8, 1.2, 0.5, 0.6, 0.3
    # v = [f0, s0, f1, s1, f2, s2, zl, zh]  (f0 = f(t), f1 = f(t-1), ...)
    # n = [wf, ws, vy, e_res1, e_pred1, e_res2, e_pred2] with variances below
    nv = np.array([0.2, 0.1, 0.15, 0.05, 0.04, 0.03, 0.02])
    def row(**kw):
        r = np.zeros(15)
        names = ["f0", "s0", "f1", "s1", "f2", "s2", "zl", "zh", "wf", "ws", "vy", "e1", "e2", "e3", "e4"]
        for k, v in kw.items():
            r[names.index(k)] = v
        return r
    p1 = row(zl=G1)                                       # prediction low -> y
    p1r = p1 + row(e2=1)
    p2 = row(zh=G2)                                       # prediction high -> low
    p2r = p2 + row(e4=1)
    r1 = S1 * (row(f0=1) + row(vy=1)) - P1 * p1r           # residual y -> low
    r2 = S2 * row(zl=1) - P2 * p2r                          # residual low -> high
    nxt = np.vstack([
        row(f0=0.5, s0=0.3, wf=1), row(s0=0.9, ws=1),
        row(f0=1), row(s0=1), row(f1=1), row(s1=1),
        Ml * row(zl=1) + K1 * (r1 + row(e1=1)) + K2 * p2r,
        Mh * row(zh=1) + K3 * (r2 + row(e3=1)),
    ])
    F, V = nxt[:, :8], nxt[:, 8:] @ np.diag(nv) @ nxt[:, 8:].T
    Sig = np.zeros((8, 8))
    for _ in range(20000):
        Sig = F @ Sig @ F.T + V
    Cq = sla.block_diag(Sig, np.diag(nv))
    var = lambda r: float(r @ Cq @ r)
    err_low = var(row(zl=1) - row(**{f"f{l1}": 1}))
    err_high = var(row(zh=1) - row(**{f"s{l2}": 1}))
    act_low = var(row(zl=1))
    powers = {"y->low": var(r1), "low->y": var(p1), "low->high": var(r2), "high->low": var(p2)}
    prices = {"y->low": 0.1, "low->y": 0.2, "low->high": 0.3, "high->low": 0.4}
    J = err_low + 2 * err_high + 0.1 * act_low + sum(prices[k] * powers[k] for k in powers)
    return err_low, err_high, powers, J


@pytest.mark.parametrize("l1,l2", [(0, 0), (0, 2), (1, 0), (2, 1), (1, 2)])
def test_fully_pinned_two_level_matches_hand_computation(l1, l2):
    spec = parse_spec(TWO_LEVEL.format(l1=l1, l2=l2))
    scores = evaluate(spec)  # every gain is pinned: no gains file needed
    err_low, err_high, powers, J = hand_scores(l1, l2)
    assert scores.areas["low"].error == pytest.approx(err_low, rel=1e-9)
    assert scores.areas["high"].error == pytest.approx(err_high, rel=1e-9)
    for lid, p in powers.items():
        assert scores.links[lid].power == pytest.approx(p, rel=1e-9)
    assert scores.objective == pytest.approx(J, rel=1e-9)


def test_information_rate_of_gaussian_channel():
    # Shannon: a Gaussian input of power P over noise N carries 0.5 log2(1 + P/N) bits per use.
    spec = parse_spec(TWO_LEVEL.format(l1=0, l2=0))
    s = evaluate(spec).links["low->high"]
    assert s.bits == pytest.approx(0.5 * np.log2(1 + s.power / 0.03), rel=1e-12)
    assert s.snr == pytest.approx(s.power / 0.03)


def test_unstable_pinned_loop_is_refused():
    text = TWO_LEVEL.format(l1=0, l2=0).replace("pin: {M: 0.8}", "pin: {M: 1.5}")
    with pytest.raises(UnstableError) as info:
        evaluate(parse_spec(text))
    assert "spectral radius" in str(info.value)


def test_gains_file_round_trip(tmp_path):
    spec = parse_spec(KALMAN.replace("LAG", "0"))
    gains, P, _ = kalman_gains(0)
    path = tmp_path / "g.json"
    save_gains(path, gains, spec)
    data = json.loads(path.read_text())
    assert data["format"] == "hierarchy-gains" and set(data["links"]) == {"s->a", "a->s"}
    again = load_gains(path, spec)
    assert evaluate(spec, again).objective == pytest.approx(evaluate(spec, gains).objective, rel=1e-14)


def test_gains_file_errors_name_the_place(tmp_path):
    spec = parse_spec(KALMAN.replace("LAG", "0"))
    path = tmp_path / "g.json"
    path.write_text(json.dumps({"areas": {"a": {"M": [[1.0]]}}}))
    with pytest.raises(GainsError) as info:
        load_gains(path, spec)
    assert "areas.a.M" in info.value.place and "(2, 2)" in str(info.value)
    path.write_text(json.dumps({"links": {"s->b": {"K": [[1.0]]}}}))
    with pytest.raises(GainsError) as info:
        load_gains(path, spec)
    assert "s->b" in info.value.place
    path.write_text("{not json")
    with pytest.raises(GainsError):
        load_gains(path, spec)
    with pytest.raises(GainsError) as info:
        evaluate(spec, Gains())
    assert "a.M" in str(info.value)


def test_a_loop_with_an_eigenvalue_at_exactly_minus_one_is_unstable_not_an_error():
    # The Cayley transform of the Lyapunov solve needs T + I invertible; a
    # trial point of the search (a long preconditioned step at 64 generated
    # areas) landed where an area's memory had an eigenvalue of exactly -1.
    from pathlib import Path

    from hierarchy import load_spec
    from hierarchy.design.problem import Problem

    prob = Problem(load_spec(Path(__file__).parents[1] / "specs" / "single-loop.yaml"))
    x = prob.pack(prob.informed_start())
    for blocks in prob.by_owner.values():
        for name, sl, shape in blocks:
            x[sl] = -np.eye(shape[0]).ravel() if name == "M" else 0.0
    assert prob.value(x) == np.inf
    assert prob.value_and_grad(x) == (np.inf, None)
