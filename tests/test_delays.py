"""Conduction delays on links: parsing, the closed loop, the exact gradient,
Monte Carlo and the designer, against closed forms."""

import dataclasses
import math

import numpy as np
import pytest
import scipy.linalg as sla

from hierarchy.loop.closedloop import Layout, assemble
from hierarchy.errors import SpecError
from hierarchy.loop.evaluate import cost_and_gradient, evaluate, score
from hierarchy.loop.gains import Gains
from hierarchy.spec import parse_spec, spec_schema
from hierarchy.loop.simulate import compare, simulate

from helpers import random_gains

AR1 = """
spec: 1
world:
  states:
    x: {{dynamics: {a}, noise: {q}}}
sensors:
  s: {{observes: {{x: 1}}, noise: {r}}}
areas:
  v: {{tracks: x, lag: {lag}}}
links:
  - {{from: s, to: v, kind: residual, delay: {k}}}
"""


def ar1(a, q, r, k, lag=0):
    return parse_spec(AR1.format(a=a, q=q, r=r, k=k, lag=lag))


def posterior(a, q, r):
    """Steady-state filtered (a posteriori) variance of x given y up to now
    (scalar Kalman filter via scipy's DARE), and the filter gain."""
    if r == 0:
        return 0.0, 1.0
    P = float(sla.solve_discrete_are(np.array([[a]]), np.array([[1.0]]), np.array([[q]]), np.array([[r]]))[0, 0])
    L = P / (P + r)
    return P - L * P, L


def k_step_error(a, q, r, k):
    """Variance of the error of the best k-step prediction of an AR(1)
    world: the k-step forecast error q (1 - a^2k) / (1 - a^2) (Box and
    Jenkins, Time Series Analysis, forecast error variance of an AR(1)) plus
    the filtered variance carried k steps, a^2k P_post."""
    post, _ = posterior(a, q, r)
    return q * (1 - a ** (2 * k)) / (1 - a * a) + a ** (2 * k) * post


def k_step_gains(a, q, r, k):
    """The delayed Kalman predictor as a circuit: the area holds
    x_hat(t | t - k), so z(t+1) = a (1 - L) z(t) + a^k L y(t - k + 1)."""
    _, L = posterior(a, q, r)
    return Gains(areas={"v": {"M": np.array([[a * (1 - L)]])}},
                 links={"s->v": {"S": np.eye(1), "K": np.array([[a ** k * L]])}})


# --- parsing ----------------------------------------------------------------

def test_delay_defaults_to_one_and_is_read():
    assert ar1(0.9, 1.0, 0.1, 1).links[0].delay == 1
    assert ar1(0.9, 1.0, 0.1, 4).links[0].delay == 4
    text = AR1.format(a=0.9, q=1.0, r=0.1, k=1, lag=0).replace(", delay: 1", "")
    assert parse_spec(text).links[0].delay == 1
    link = spec_schema()["properties"]["links"]["items"]["properties"]["delay"]
    assert link["minimum"] == 1 and link["default"] == 1


@pytest.mark.parametrize("value, words", [("0", "at least 1"), ("1.5", "whole number"), ("big", "number")])
def test_bad_delay_names_its_place(value, words):
    with pytest.raises(SpecError) as err:
        ar1(0.9, 1.0, 0.1, value)
    assert "links[0] (s->v).delay" in str(err.value.place)
    assert words in str(err.value)


def test_delay_states_have_a_size_limit():
    text = AR1.format(a=0.9, q=1.0, r=0.1, k=2, lag=0).replace("noise: 0.1}}", "noise: 0.1, dim: 1}}")
    text = text.replace("kind: residual, delay: 2", "kind: residual, dim: 200, delay: 50")
    with pytest.raises(SpecError) as err:
        parse_spec(text)
    assert "delay" in str(err.value.place) and "copies" in str(err.value)


# --- closed forms -----------------------------------------------------------

@pytest.mark.parametrize("k", [1, 2, 3, 5])
@pytest.mark.parametrize("a, r", [(0.9, 0.0), (0.9, 0.4), (-0.6, 0.2)])
def test_k_step_predictor_of_ar1_matches_closed_form(a, r, k):
    q = 0.5
    spec = ar1(a, q, r, k)
    scores = evaluate(spec, k_step_gains(a, q, r, k))
    assert scores.areas["v"].error == pytest.approx(k_step_error(a, q, r, k), rel=1e-10)
    # The link carries the reading, whatever its delay: power Var y.
    assert scores.links["s->v"].power == pytest.approx(q / (1 - a * a) + r, rel=1e-10)


def test_delay_state_count_and_lag_that_waits_for_the_signal():
    # A lag equal to the delay estimates x(t - k) from y(t - k): with a
    # noiseless sensor the copy is exact (error 0); lag k - 1 leaves one
    # step to predict: a x(t - k) errs by q (the one-step AR(1) forecast
    # error), the plain copy x(t - k) by 2 q / (1 + a).
    a, q, k = 0.8, 0.7, 3
    lay = Layout(ar1(a, q, 0.0, k))
    assert lay.nxi == 1 * (0 + 1) + 1 + (k - 1)  # world, area, k - 1 copies

    def copy(c):
        return Gains(areas={"v": {"M": np.zeros((1, 1))}}, links={"s->v": {"S": np.eye(1), "K": np.array([[c]])}})

    assert evaluate(ar1(a, q, 0.0, k, lag=k), copy(1.0)).areas["v"].error == pytest.approx(0.0, abs=1e-12)
    assert evaluate(ar1(a, q, 0.0, k, lag=k - 1), copy(a)).areas["v"].error == pytest.approx(q, rel=1e-10)
    assert evaluate(ar1(a, q, 0.0, k, lag=k - 1), copy(1.0)).areas["v"].error == pytest.approx(2 * q / (1 + a))


def test_designer_finds_the_delayed_kalman_predictor():
    from hierarchy.design import design

    a, q, r, k = 0.9, 0.5, 0.4, 3
    res = design(ar1(a, q, r, k))
    assert res.status == "converged"
    assert res.scores.areas["v"].error == pytest.approx(k_step_error(a, q, r, k), rel=1e-5)


def test_delay_one_is_the_undelayed_circuit():
    a, q, r = 0.9, 0.5, 0.4
    text = AR1.format(a=a, q=q, r=r, k=1, lag=0)
    g = k_step_gains(a, q, r, 1)
    assert evaluate(parse_spec(text), g).objective == evaluate(
        parse_spec(text.replace(", delay: 1", "")), g).objective


# --- a two-level circuit with delays everywhere -----------------------------

TWO_LEVEL = """
spec: 1
world:
  states:
    f: {{dim: 1, dynamics: 0.5, noise: 0.2, driven_by: {{s: 0.3}}}}
    s: {{dim: 1, dynamics: 0.9, noise: 0.1}}
sensors:
  y: {{observes: {{f: 1}}, noise: 0.15}}
areas:
  low: {{tracks: f, lag: 1, weight: 1.0, activity_price: 0.1}}
  high: {{tracks: s, lag: 2, weight: 2.0, activity_price: 0.05}}
links:
  - {{from: y, to: low, kind: residual, noise: 0.05, price: 0.1, delay: {0}}}
  - {{from: low, to: y, kind: prediction, noise: 0.04, price: 0.2, delay: {1}}}
  - {{from: low, to: high, kind: residual, noise: 0.03, price: 0.3, delay: {2}}}
  - {{from: high, to: low, kind: prediction, noise: 0.02, price: 0.4, delay: {3}}}
"""

DELAYS = [(2, 3, 1, 3), (1, 1, 4, 2), (3, 1, 2, 1)]


def small_gains(spec):
    """Random gains as drawn (seed 3, entries 0.3 N(0, 1)): small enough that
    these two-level loops are stable with any delays."""
    return random_gains(spec, 3, scale=0.3, radius=None, per_column=False)


def dense_objective(spec, gains):
    """J from the dense closed loop (hierarchy.loop.closedloop.assemble) and
    scipy's Lyapunov solver, independently of the compact fast path."""
    lay = Layout(spec)
    loop = assemble(lay, gains)
    Sigma = sla.solve_discrete_lyapunov(loop.Phi, loop.Gamma @ lay.Omega @ loop.Gamma.T)
    cov = sla.block_diag(Sigma, lay.Omega)
    J = 0.0
    for a in spec.areas:
        F, Z = lay.error_map[a.name], lay.state_rows(a.name)
        J += a.weight * np.trace(F @ cov @ F.T) + a.activity_price * np.trace(Z @ cov @ Z.T)
    for ll, l in zip(lay.links, spec.links):
        J += l.price * np.trace(loop.sent[ll.index] @ cov @ loop.sent[ll.index].T)
    return J


@pytest.mark.parametrize("delays", DELAYS)
def test_compact_form_matches_dense_loop(delays):
    spec = parse_spec(TWO_LEVEL.format(*delays))
    g = small_gains(spec)
    assert score(Layout(spec), g).objective == pytest.approx(dense_objective(spec, g), rel=1e-10)


@pytest.mark.parametrize("delays", DELAYS)
def test_gradient_with_delays_matches_finite_differences(delays):
    spec = parse_spec(TWO_LEVEL.format(*delays))
    lay = Layout(spec)
    g = small_gains(spec)
    J, grad, radius = cost_and_gradient(lay, g)
    assert radius < 1
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


def test_delays_change_the_score():
    g = None
    scores = []
    for delays in [(1, 1, 1, 1), (1, 1, 3, 3)]:
        spec = parse_spec(TWO_LEVEL.format(*delays))
        g = g or small_gains(spec)
        scores.append(evaluate(spec, g))
    assert scores[0].areas["high"].error != pytest.approx(scores[1].areas["high"].error, rel=1e-3)


def test_monte_carlo_agrees_with_exact_scores_under_delays():
    spec = parse_spec(TWO_LEVEL.format(2, 3, 1, 3))
    g = small_gains(spec)
    sim = simulate(spec, g, steps=60_000, chains=8, seed=5)
    rows = compare(evaluate(spec, g), sim)
    assert len(rows) == 1 + 2 + 4
    for row in rows:
        assert row.inside, row
        assert (row.high - row.low) / 2 < 0.05 * abs(row.exact), row


def test_monte_carlo_k_step_predictor():
    a, q, r, k = 0.8, 0.5, 0.2, 4
    spec = ar1(a, q, r, k)
    sim = simulate(spec, k_step_gains(a, q, r, k), steps=60_000, chains=8, seed=1)
    assert sim.areas["v"]["error"].contains(k_step_error(a, q, r, k))
    # Without the delay, the same gains' error differs by more than the interval.
    assert not sim.areas["v"]["error"].contains(k_step_error(a, q, r, 1))


def test_sub_circuit_keeps_delays():
    from hierarchy.design.subcircuit import without_predictions

    spec = parse_spec(TWO_LEVEL.format(2, 3, 1, 3))
    sub = without_predictions(spec)
    assert {l.id: l.delay for l in sub.links} == {"y->low": 2, "low->high": 1}
    assert dataclasses.replace(spec.links[0], price=1.0).delay == 2
    assert math.isfinite(evaluate(sub, small_gains(sub)).objective)


# --- what users see -----------------------------------------------------------

def test_delay_in_json_text_report_and_drawing():
    from hierarchy.report.drawing import draw_circuit
    from hierarchy.report.page import report_html
    from hierarchy.report.results import scores_text, scores_to_dict

    spec = parse_spec(TWO_LEVEL.format(2, 1, 1, 3))
    g = small_gains(spec)
    scores = evaluate(spec, g)
    data = scores_to_dict(spec, scores, g)
    assert {lid: row["delay"] for lid, row in data["links"].items()} == {
        "y->low": 2, "low->y": 1, "low->high": 1, "high->low": 3}
    text = scores_text(spec, scores, g)
    assert "delay" in text.splitlines()[text.splitlines().index(next(l for l in text.splitlines()
                                                                     if l.startswith("link ")))]
    undelayed = parse_spec(TWO_LEVEL.format(1, 1, 1, 1))
    assert " delay " not in scores_text(undelayed, evaluate(undelayed, g), g)
    data.update({"form": "price", "status": "converged"})
    assert "<th>delay</th>" in report_html(data)
    fig = draw_circuit(data)
    labels = {lid: t.get_text() for lid, t in fig.hierarchy_labels.items()}
    assert {"y->low", "high->low"} <= set(labels)
    for lid, text in labels.items():
        assert ("delay 3" in text) == (lid == "high->low") and ("delay 2" in text) == (lid == "y->low")


def test_a_bad_delay_in_a_result_file_is_refused():
    from hierarchy.errors import InputError
    from hierarchy.report.drawing import draw_circuit
    from hierarchy.report.results import scores_to_dict

    spec = parse_spec(TWO_LEVEL.format(2, 1, 1, 3))
    data = scores_to_dict(spec, evaluate(spec, small_gains(spec)))
    data["links"]["y->low"]["delay"] = "two"
    with pytest.raises(InputError) as err:
        draw_circuit(data)
    assert "links.y->low.delay" in err.value.place


def test_gallery_caption_on_depth_under_delays_holds():
    # gallery/README.md says: under these delays the shallow circuit wins at
    # small budgets and the deep one at large budgets. Read it off the
    # committed numbers (tests/test_gallery.py checks them against a fresh run).
    import json
    from pathlib import Path

    data = json.loads((Path(__file__).resolve().parents[1] / "gallery/compare-delays.json").read_text())
    best = {}
    for row in data["rows"]:
        assert row["converged"]
        best.setdefault(row["budget"], {})[row["spec"]] = row["objective"]
    budgets = sorted(best)
    winner = [min(best[b], key=best[b].get) for b in budgets]
    assert winner[0] == "shallow-delays" and winner[-1] == "deep-delays"
    # One crossing: once the deep circuit wins, it keeps winning.
    first_deep = winner.index("deep-delays")
    assert all(w == "deep-delays" for w in winner[first_deep:])


def test_resource_estimate_counts_the_copies():
    from hierarchy.resources import estimate

    spec = parse_spec(TWO_LEVEL.format(2, 3, 1, 3))
    need = estimate(spec)
    assert (need.nxi, need.nq) == (Layout(spec).nxi, Layout(spec).nq)
