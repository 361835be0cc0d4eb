"""The designer against closed forms and baselines from outside the project.

Sources are named beside each check."""

import numpy as np
import pytest
import scipy.linalg as sla
from scipy.optimize import brentq, minimize

from hierarchy.design import Options, design, design_budgets, design_prices
from hierarchy.design.problem import Problem
from hierarchy.spec import parse_spec

FAST = Options(restarts=3, max_iter=2000)


def kalman_spec(lag, A, Q, C, R):
    n, p = A.shape[0], C.shape[0]
    return parse_spec(f"""
spec: 1
world:
  states:
    x: {{dim: {n}, dynamics: {A.tolist()}, noise: {Q.tolist()}}}
sensors:
  s: {{observes: {{x: {C.tolist()}}}, noise: {R.tolist()}}}
areas:
  a: {{tracks: x, lag: {lag}}}
links:
  - {{from: s, to: a, kind: residual}}
  - {{from: a, to: s, kind: prediction}}
""")


A2 = np.array([[0.9, 0.2], [0.0, 0.7]])
Q2 = np.diag([0.1, 0.2])
C2 = np.array([[1.0, 0.5]])
R2 = np.array([[0.3]])


@pytest.mark.parametrize("lag", [0, 1])
def test_kalman_limit_matches_riccati(lag):
    # Steady-state Kalman filter: a-priori covariance P from the discrete
    # algebraic Riccati equation (scipy.linalg.solve_discrete_are, dual form);
    # a-posteriori P - P C'(C P C' + R)^-1 C P.
    res = design_prices(kalman_spec(lag, A2, Q2, C2, R2), FAST)
    P = sla.solve_discrete_are(A2.T, C2.T, Q2, R2)
    post = P - P @ C2.T @ np.linalg.solve(C2 @ P @ C2.T + R2, C2 @ P)
    expected = np.trace(P) if lag == 0 else np.trace(post)
    assert res.status == "converged"
    assert res.scores.areas["a"].error == pytest.approx(expected, rel=1e-6)


def test_kalman_limit_matches_python_control_dlqe():
    # python-control's dlqe returns the predictor gain L = A P C'(C P C' + R)^-1
    # and the a-priori covariance P; the a-posteriori one is (I - A^-1 L C) P.
    control = pytest.importorskip("control")
    L, P, _ = control.dlqe(A2, np.eye(2), C2, Q2, R2)
    post = (np.eye(2) - np.linalg.solve(A2, L) @ C2) @ P
    for lag, cov in ((0, P), (1, post)):
        res = design_prices(kalman_spec(lag, A2, Q2, C2, R2), FAST)
        assert res.scores.areas["a"].error == pytest.approx(np.trace(cov), rel=1e-6)


def test_scalar_kalman_closed_form():
    # Scalar Riccati fixed point p = a^2 p r / (p + r) + q (e.g. Anderson & Moore,
    # Optimal Filtering, 1979, ch. 4), solved as a quadratic.
    a, q, r = 0.8, 0.5, 0.4
    # p^2 + p (r - a^2 r - q) - q r = 0
    b = r - a * a * r - q
    p = (-b + np.sqrt(b * b + 4 * q * r)) / 2
    res = design_prices(kalman_spec(0, np.array([[a]]), np.array([[q]]), np.eye(1), np.array([[r]])), FAST)
    assert res.scores.areas["a"].error == pytest.approx(p, rel=1e-6)


def uncoded_spec(variances, noises, budget, vector=False):
    """Memoryless sources, noiseless sensors, one budget over the links (one
    vector link for all sources with ``vector``)."""
    budgets = f"budgets: [{{name: b, links: all, total: {budget}}}]\n"
    if not vector:
        return parse_spec(spec_text(variances, noises) + "\n" + budgets)
    k = len(variances)
    lines = ["spec: 1", "world:", "  states:"]
    lines += [f"    x{i}: {{dim: 1, dynamics: 0, noise: {v}}}" for i, v in enumerate(variances)]
    obs = ", ".join(f"x{i}: {np.eye(k)[:, [i]].tolist()}" for i in range(k))
    tracks = "[" + ", ".join(f"x{i}" for i in range(k)) + "]"
    lines += ["sensors:", f"  s: {{observes: {{{obs}}}, noise: 0}}",
              "areas:", f"  a: {{tracks: {tracks}, lag: 1}}",
              "links:", f"  - {{from: s, to: a, kind: residual, noise: {list(noises)}}}"]
    return parse_spec("\n".join(lines) + "\n" + budgets)


def spec_text(variances, noises, prices=None):
    """Memoryless sources, noiseless sensors, one area and one link per source
    (priced if ``prices`` are given; no budgets), as YAML text."""
    k = len(variances)
    lines = ["spec: 1", "world:", "  states:"]
    lines += [f"    x{i}: {{dim: 1, dynamics: 0, noise: {v}}}" for i, v in enumerate(variances)]
    lines += ["sensors:"] + [f"  s{i}: {{observes: {{x{i}: 1}}, noise: 0}}" for i in range(k)]
    lines += ["areas:"] + [f"  a{i}: {{tracks: x{i}, lag: 1}}" for i in range(k)]
    cost = [f", price: {p}" for p in prices] if prices is not None else [""] * k
    lines += ["links:"] + [f"  - {{from: s{i}, to: a{i}, kind: residual, noise: {n}{c}}}"
                           for i, (n, c) in enumerate(zip(noises, cost))]
    return "\n".join(lines)


def kkt_allocation(variances, noises, budget):
    """Water-filling for uncoded Gaussian links: P_i = max(0, sqrt(s_i N_i / mu) - N_i),
    sum P_i = B (closed-form KKT conditions of min sum s_i/(1+P_i/N_i))."""
    used = lambda mu: sum(max(0.0, np.sqrt(s * n / mu) - n) for s, n in zip(variances, noises)) - budget
    mu = brentq(used, 1e-12, 1e6, xtol=1e-15, rtol=1e-14)
    return np.array([max(0.0, np.sqrt(s * n / mu) - n) for s, n in zip(variances, noises)]), mu


def test_uncoded_gaussian_transmission():
    # Uncoded transmission of a Gaussian source over a Gaussian channel
    # (Goblick 1965; Gastpar, Rimoldi & Vetterli 2003): error s2 / (1 + P/N).
    s2, N, B = 2.0, 0.5, 3.0
    res = design_budgets(uncoded_spec([s2], [N], B), FAST)
    assert res.status == "converged"
    assert res.scores.areas["a0"].error == pytest.approx(s2 / (1 + B / N), rel=1e-4)
    assert res.budgets["b"].used <= B * (1 + 1e-6)
    assert res.budgets["b"].shadow_price == pytest.approx(s2 * N / (B + N) ** 2, rel=1e-3)


def test_shared_budget_matches_water_filling():
    variances, noises, B = [3.0, 1.0, 0.2, 0.05], [0.5, 1.0, 0.3, 0.4], 4.0
    res = design_budgets(uncoded_spec(variances, noises, B), FAST)
    powers = np.array([res.scores.links[f"s{i}->a{i}"].power for i in range(4)])
    expected, mu = kkt_allocation(variances, noises, B)
    assert expected[-1] == 0.0  # the weakest source is not worth a channel at this budget
    np.testing.assert_allclose(powers, expected, atol=1e-3 * B)
    assert res.budgets["b"].shadow_price == pytest.approx(mu, rel=1e-3)
    assert "s3->a3" in res.silent
    assert res.budgets["b"].used <= B * (1 + 1e-6)


def test_vector_link_pairs_strong_source_with_quiet_channel():
    # One vector link may route the strong source through the quiet channel
    # (the identity pairing here is the bad one); separate links cannot.
    variances, noises, B = [3.0, 0.3], [1.0, 0.1], 2.0
    separate = design_budgets(uncoded_spec(variances, noises, B), FAST)
    vector = design_budgets(uncoded_spec(variances, noises, B, vector=True), FAST)
    assert vector.objective < separate.objective * 0.95
    # Closed form of the best pairing: strongest variance with the smallest noise.
    best_pairs = (sorted(variances, reverse=True), sorted(noises))
    p, _ = kkt_allocation(*best_pairs, B)
    expected = sum(s / (1 + pi / n) for s, n, pi in zip(*best_pairs, p))
    assert vector.objective == pytest.approx(expected, rel=1e-3)


def test_shadow_price_is_slope_of_optimal_objective():
    # Envelope theorem: d(optimal objective)/dB = -mu. Central finite difference.
    variances, noises = [3.0, 1.0], [0.5, 1.0]
    B, h = 2.0, 0.02
    mid = design_budgets(uncoded_spec(variances, noises, B), FAST)
    up = design_budgets(uncoded_spec(variances, noises, B + h), FAST)
    down = design_budgets(uncoded_spec(variances, noises, B - h), FAST)
    slope = (up.objective - down.objective) / (2 * h)
    assert mid.budgets["b"].shadow_price == pytest.approx(-slope, rel=0.02)


def loop_spec(pred_price=0.02, pred_noise=0.05, res_price=0.02, res_noise=0.05, res_pin=""):
    """One sensor, one area, a residual up and a prediction down (a prediction
    with neither noise nor price when ``pred_noise`` is None)."""
    pred = f", noise: {pred_noise}, price: {pred_price}" if pred_noise is not None else ""
    pin = f", pin: {res_pin}" if res_pin else ""
    return parse_spec(f"""
spec: 1
world:
  states:
    t: {{dim: 1, dynamics: 0.95, noise: 0.1}}
sensors:
  s: {{observes: {{t: 1}}, noise: 0.2}}
areas:
  a: {{tracks: t}}
links:
  - {{from: s, to: a, kind: residual, noise: {res_noise}, price: {res_price}{pin}}}
  - {{from: a, to: s, kind: prediction{pred}}}
""")


def test_prediction_power_falls_to_silence_as_its_price_grows():
    # Fact of the trade (common practice, no source): dearer predictions, fewer sent.
    powers = []
    for price in (0.001, 0.01, 0.1, 10.0):
        res = design_prices(loop_spec(pred_price=price), FAST)
        assert res.status == "converged"
        powers.append(res.scores.links["a->s"].power)
    assert all(b <= a * 1.001 for a, b in zip(powers, powers[1:]))
    assert powers[0] > 0.1
    assert powers[-1] < 1e-6
    res = design_prices(loop_spec(pred_price=10.0), FAST)
    assert "a->s" in res.silent


def test_very_noisy_prediction_channel_goes_silent():
    # Fact of the trade (common practice, no source).
    res = design_prices(loop_spec(pred_noise=1e4), FAST)
    assert "a->s" in res.silent
    assert res.scores.links["a->s"].power < 1e-6 * 1e4


def test_free_noiseless_predictions_shrink_the_residual():
    # Fact of the trade (common practice, no source): with free, noiseless
    # predictions, the residual sent up carries less power than the raw signal.
    spec = loop_spec(pred_noise=None)
    res = design_prices(spec, FAST)
    raw = 0.1 / (1 - 0.95 ** 2) + 0.2  # Var y = q/(1-a^2) + r (AR(1) variance)
    assert res.scores.links["s->a"].power < 0.5 * raw


@pytest.mark.parametrize("c", [1e-3, 1e3])
def test_scale_law(c):
    # model.md's scale law: noise x c and price / c leave the optimum unchanged
    # and multiply the link's optimal power by c.
    base = design_prices(loop_spec(), FAST)
    scaled = design_prices(loop_spec(res_noise=0.05 * c, res_price=0.02 / c), FAST)
    assert scaled.status == "converged"
    assert scaled.objective == pytest.approx(base.objective, rel=1e-6)
    assert scaled.scores.links["s->a"].power == pytest.approx(c * base.scores.links["s->a"].power, rel=1e-4)


def test_budgets_met_on_example_with_overlapping_groups():
    spec = parse_spec("""
spec: 1
world:
  states:
    p: {dim: 2, dynamics: [[0.9, 0.05], [-0.05, 0.9]], noise: [0.05, 0.05]}
sensors:
  cam: {observes: {p: identity}, noise: [0.1, 0.1]}
  pad: {observes: {p: [[0.8, 0.6]]}, noise: 0.3}
areas:
  low: {tracks: p, weight: 0.5}
  high: {tracks: p}
links:
  - {from: cam, to: low, kind: residual, noise: 0.01}
  - {from: pad, to: high, kind: residual, noise: 0.01}
  - {from: low, to: high, kind: residual, noise: 0.05}
  - {from: high, to: low, kind: prediction, noise: 0.05}
budgets:
  - {name: all, links: all, total: 3.0}
  - {name: into-high, links: {to: high}, total: 1.0}
""")
    res = design_budgets(spec, FAST)
    assert res.status == "converged", res.message
    for b in res.budgets.values():
        assert b.used <= b.total * (1 + 1e-6)
        assert b.shadow_price >= 0
    # At least one budget binds, and a binding one is spent in full.
    binding = [b for b in res.budgets.values() if b.shadow_price > 0]
    assert binding and all(b.used == pytest.approx(b.total, rel=1e-3) for b in binding)


def brute_force(spec, starts=12, seed=1):
    """All free gains flattened; scipy's BFGS with finite differences from random starts."""
    prob = Problem(spec)
    rng = np.random.default_rng(seed)

    def f(theta):
        J, _ = prob.value_and_grad(theta)
        return J if np.isfinite(J) else 1e6

    best = np.inf
    for _ in range(starts):
        out = minimize(f, prob.random_start(rng, 0.5), method="BFGS", options={"gtol": 1e-10, "maxiter": 3000})
        best = min(best, out.fun)
    return best * prob.reference


@pytest.mark.parametrize("which", ["loop", "relay"])
def test_never_worse_than_brute_force(which):
    if which == "loop":
        spec = loop_spec()
    else:
        spec = parse_spec("""
spec: 1
world:
  states:
    t: {dim: 1, dynamics: 0.8, noise: 0.2}
sensors:
  s: {observes: {t: 1}, noise: 0.1}
areas:
  r: {dim: 1}
  a: {tracks: t, lag: 1}
links:
  - {from: s, to: r, kind: residual, noise: 0.05, price: 0.05}
  - {from: r, to: a, kind: residual, noise: 0.05, price: 0.05}
  - {from: a, to: r, kind: prediction, noise: 0.05, price: 0.05}
""")
    ours = design_prices(spec, FAST).objective
    assert ours <= brute_force(spec) * 1.005


def test_pinned_textbook_circuit_scored_beside_the_optimum():
    spec = loop_spec(res_pin="{S: 1, P: 1}")
    res = design(spec, FAST)
    assert np.allclose(res.gains.links["s->a"]["S"], 1) and np.allclose(res.gains.links["s->a"]["P"], 1)
    assert res.reference is not None
    assert res.reference.objective <= res.objective * (1 + 1e-9)


def test_overlapping_budgets_match_a_convex_program():
    # No closed form once budgets overlap, but for independent memoryless
    # sources over uncoded links the problem is convex in the powers:
    # min sum_i s_i N_i / (N_i + P_i) s.t. group sums of P within totals
    # (Boyd & Vandenberghe, Convex Optimization, 2004: a water-filling-type
    # program). CVXPY's global optimum and its dual values are the reference
    # for the designer's objective, powers and shadow prices.
    cp = pytest.importorskip("cvxpy")
    variances, noises = [3.0, 1.0, 0.6, 0.2], [0.5, 1.0, 0.3, 0.4]
    groups = {"left": ([0, 1, 2], 2.5), "right": ([1, 2, 3], 1.5)}
    text = spec_text(variances, noises) + "\nbudgets:\n" + "".join(
        f"  - {{name: {name}, links: [{', '.join(f's{i}->a{i}' for i in idx)}], total: {total}}}\n"
        for name, (idx, total) in groups.items())
    res = design_budgets(parse_spec(text), FAST)

    P = cp.Variable(len(variances), nonneg=True)
    error = sum(s * n * cp.inv_pos(n + P[i]) for i, (s, n) in enumerate(zip(variances, noises)))
    limits = {name: cp.sum(P[idx]) <= total for name, (idx, total) in groups.items()}
    cp.Problem(cp.Minimize(error), list(limits.values())).solve()

    assert res.status == "converged", res.message
    assert res.objective == pytest.approx(error.value, rel=1e-5)
    powers = np.array([res.scores.links[f"s{i}->a{i}"].power for i in range(len(variances))])
    np.testing.assert_allclose(powers, P.value, atol=2e-3)
    for name, constraint in limits.items():
        assert res.budgets[name].shadow_price == pytest.approx(float(constraint.dual_value), rel=1e-2, abs=1e-4)
        assert res.budgets[name].met


def test_screened_wake_up_finds_what_link_by_link_tests_find(monkeypatch):
    # Six fully silent noisy links are screened together for a wake-up (their
    # second derivatives do not couple); the screen must not hide the one link
    # that should wake once its price drops below s2/N (uncoded transmission:
    # P = sqrt(s2 N / price) - N > 0), and must pick the same point as testing
    # every link alone.
    import importlib

    D = importlib.import_module("hierarchy.design.silent")

    variances, noises = [1.0] * 6, [0.5] * 6
    priced = lambda prices: parse_spec(spec_text(variances, noises, prices))
    dear = design_prices(priced([3.0] * 6), FAST)
    assert len(dear.silent) == 6
    seen = []
    real, screen_min = D._wake_silent, D.SCREEN_MIN

    def both(prob, best):
        screened = real(prob, best)
        monkeypatch.setattr(D, "SCREEN_MIN", 10 ** 9)
        alone = real(prob, best)
        monkeypatch.setattr(D, "SCREEN_MIN", screen_min)
        seen.append((screened, alone))
        return screened

    monkeypatch.setattr(importlib.import_module("hierarchy.design.prices"), "_wake_silent", both)
    cheap = [3.0, 3.0, 3.0, 0.1, 3.0, 3.0]
    res = design_prices(priced(cheap), Options(restarts=1, max_iter=2000, probe_iter=0), start=dear.gains)
    assert seen and seen[0][1] is not None  # the link-by-link test wakes a link...
    for screened, alone in seen:  # ...and the screen agrees every time
        assert (screened is None) == (alone is None)
        assert screened is None or np.array_equal(screened, alone)
    assert res.status == "converged" and set(res.silent) == {f"s{i}->a{i}" for i in (0, 1, 2, 4, 5)}
    P = np.sqrt(1.0 * 0.5 / 0.1) - 0.5
    assert res.scores.links["s3->a3"].power == pytest.approx(P, rel=1e-4)


def test_the_screen_sends_no_link_that_can_buy_nothing_to_the_exact_test(monkeypatch):
    # Five silent links carry sources of variance 1e-30 at no price (as the
    # links an area sends are unpriced in generated circuits): a trial signal
    # costs nothing and buys nothing, so the half-the-cost rule lets them
    # through, and at 91 generated areas such tests were 583 of 643 in one
    # pass (54 s). The sixth, variance 1 at price 0.1 < s2/N = 2, pays.
    # Only its trials may reach the exact test, and the pass must find what
    # testing every link alone finds.
    import importlib

    from hierarchy.design.prices import _outcome

    D = importlib.import_module("hierarchy.design.silent")
    variances = [1e-30] * 5 + [1.0]
    spec = parse_spec(spec_text(variances, [0.5] * 6, [3.0] * 6))
    dear = design_prices(spec, FAST)
    assert len(dear.silent) == 6
    prob = Problem(spec, np.array([0.0] * 5 + [0.1]))
    best = _outcome(prob, prob.pack(dear.gains))
    screened, real = [], D._screen
    monkeypatch.setattr(D, "_screen", lambda *a: (lambda out: screened.append(out) or out)(real(*a)))
    woken = D._wake_silent(prob, best, every=True)
    assert screened and screened[0] and {k for k, _, _ in screened[0]} == {5}
    monkeypatch.setattr(D, "SCREEN_MIN", 10 ** 9)
    alone = D._wake_silent(prob, best, every=True)
    assert woken is not None and np.array_equal(woken, alone)
    assert prob.value(woken) < best.f


def test_a_wake_pass_on_the_sub_circuit_finds_the_whole_circuit_point():
    # The active-set design runs the exact wake-up tests on the sub-circuit
    # of the links not switched off plus the screened ones: the other links
    # are exactly zero, so each test's objective is the whole circuit's (the
    # sub-circuit invariant) and the point, embedded back, is the same.
    import importlib

    from hierarchy.design.prices import _outcome
    from hierarchy.design.subcircuit import without_links

    D = importlib.import_module("hierarchy.design.silent")
    variances, noises = [1.0] * 6, [0.5] * 6
    dear = design_prices(parse_spec(spec_text(variances, noises, [3.0] * 6)), FAST)
    spec = parse_spec(spec_text(variances, noises, [3.0, 0.1, 3.0, 0.1, 3.0, 3.0]))
    prob = Problem(spec)
    best = _outcome(prob, prob.pack(dear.gains))
    asked = []

    def narrow(ids):
        asked.append(sorted(ids))
        return Problem(without_links(spec, [l.id for l in spec.links if l.id not in ids]),
                       prob.prices[[prob.layout.link_index[i] for i in ids]])

    whole = D._wake_silent(prob, best, every=True)
    part = D._wake_silent(prob, best, every=True, narrow=narrow)
    assert asked  # the tests ran on the sub-circuit
    assert whole is not None and np.allclose(part, whole, rtol=1e-12, atol=1e-14)
    assert prob.value(part) == pytest.approx(prob.value(whole), rel=1e-12)


def test_a_wake_pass_over_every_link_wakes_each_link_that_pays():
    # Six silent sources, three of them made cheap (price 0.1 < s2/N = 2, so
    # uncoded transmission pays: P = sqrt(s2 N / price) - N > 0). A plain
    # wake-up pass returns at the first link that wakes; the pass the
    # active-set design runs (every=True) goes on from there and wakes all
    # three cheap links, never a dear one, each step lowering the objective.
    import importlib

    from hierarchy.design.quasinewton import Outcome

    D = importlib.import_module("hierarchy.design.silent")
    variances, noises = [1.0] * 6, [0.5] * 6
    dear = design_prices(parse_spec(spec_text(variances, noises, [3.0] * 6)), FAST)
    assert len(dear.silent) == 6
    cheap = parse_spec(spec_text(variances, noises, [0.1, 3.0, 0.1, 3.0, 0.1, 3.0]))
    prob = Problem(cheap)
    theta = prob.pack(dear.gains)
    start = Outcome(theta, prob.value(theta), 0.0, 0, "converged", "")

    def sending(x):
        return {i for i in range(6) if np.any(x[prob.sender_slices(f"s{i}->a{i}")[0]])}

    one = D._wake_silent(prob, start)
    every = D._wake_silent(prob, start, every=True)
    assert one is not None and every is not None
    assert len(sending(one)) == 1 and sending(one) <= {0, 2, 4}
    assert sending(every) == {0, 2, 4}
    assert prob.value(every) < prob.value(one) < start.f


@pytest.mark.parametrize("areas,seed", [(8, 1), (10, 1), (12, 2)])
def test_group_tested_switch_off_silences_the_links_one_by_one_tests_do(areas, seed):
    # Group testing (all fading links off in one value, halves only where the
    # objective rises) must pick the very links a one-by-one pass in spec
    # order picks, near a converged design where the pass runs.
    import importlib

    from hierarchy.design.quasinewton import minimise
    from hierarchy.spec.generate import generate_spec_text

    D = importlib.import_module("hierarchy.design.silent")
    spec = parse_spec(generate_spec_text(areas=areas, levels=areas // 2, density=0.3, seed=seed))
    prob = Problem(spec)
    x0 = prob.pack(prob.informed_start())
    best = minimise(prob.value_and_grad, x0, max_iter=600, unit=prob.units(x0), value=prob.value)
    powers = D._link_powers(prob, best.x)
    bar = best.f + 1e-12 * max(abs(best.f), D.F_FLOOR)
    theta = best.x.copy()
    for link in spec.links:  # the one-by-one reference
        sender = prob.sender_slices(link.id)
        if not sender or powers[link.id] > D.FADING * D._silence_floor(prob, link) / D.SILENT_FRACTION * link.dim:
            continue
        trial = theta.copy()
        for sl in sender + D._receivers(prob, link):
            trial[sl] = 0.0
        if np.any(trial != theta) and prob.value(trial) <= bar:
            theta = trial
    values = prob.values
    grouped = D._switch_off_fading(prob, best)
    assert grouped is not None and np.array_equal(grouped, theta)
    assert prob.value(grouped) <= bar
    assert np.count_nonzero(grouped != best.x) > 0
    assert prob.values - values - 1 < len(spec.links)  # fewer values than one per link


@pytest.mark.parametrize("areas,seed", [(10, 0), (12, 1)])
def test_active_set_design_is_no_worse_than_the_whole_circuit_design(areas, seed, monkeypatch):
    # The active-set design (used above ACTIVE_GAINS free gains) designs only
    # the links that carry power and tests the rest for a wake-up in the
    # whole circuit; forced on here for circuits small enough to compare
    # with the design of the whole circuit at once.
    import importlib

    from hierarchy.spec.generate import generate_spec_text

    P = importlib.import_module("hierarchy.design.prices")
    spec = parse_spec(generate_spec_text(areas=areas, levels=areas // 2, density=0.3, seed=seed))
    whole = design_prices(spec, FAST)
    monkeypatch.setattr(P, "ACTIVE_GAINS", 0)
    active = design_prices(spec, FAST)
    assert active.converged, active.message
    assert active.objective <= whole.objective + 1e-6 * abs(whole.objective)
    # Its silent links were tested in the whole circuit at the returned design
    # no less than by the whole design (where a last wake-up bought less than
    # ACTIVE_GAIN, the links are honestly reported untested).
    untested = [sum(v["verdict"] == "untested" for v in r.silent.values()) for r in (active, whole)]
    assert active.silent and untested[0] <= untested[1]


def test_a_whole_circuit_polish_cut_short_hands_back_to_the_active_rounds(monkeypatch):
    # At 64 generated areas the whole-circuit polish that follows the active
    # rounds (there on limited-memory BFGS) woke a link in each of its wake-up
    # passes and ended at the iteration limit: the design was reported
    # unconverged, 1.2e-3 above the optimum found later. Forced here: the
    # first rounds are reported to have stopped trading places, so they hand
    # over to the whole circuit, and the first whole-circuit polish is
    # reported cut short at the iteration limit. The design must
    # go back to the active rounds and end converged, no worse than the
    # whole design.
    import importlib
    from dataclasses import replace

    from hierarchy.design.quasinewton import ITERATION_LIMIT
    from hierarchy.spec.generate import generate_spec_text

    P = importlib.import_module("hierarchy.design.prices")
    spec = parse_spec(generate_spec_text(areas=10, levels=5, density=0.3, seed=0))
    whole = design_prices(spec, FAST)
    size = Problem(spec).size
    polish, calls = P._polish, []
    rounds = P._active_rounds

    def short(prob, x0, opts, max_iter, *a, **k):
        out, used = polish(prob, x0, opts, max_iter, *a, **k)
        if prob.size == size and max_iter == opts.max_iter:
            calls.append("whole")
            if calls.count("whole") == 1:
                out = replace(out, status=ITERATION_LIMIT, message="cut short (forced)")
        return out, used

    def counted(*a, **k):
        calls.append("rounds")
        best, theta, used, part, tiny, done = rounds(*a, **k)
        return best, theta, used, part, tiny or calls.count("rounds") == 1, done

    monkeypatch.setattr(P, "ACTIVE_GAINS", 0)
    monkeypatch.setattr(P, "_polish", short)
    monkeypatch.setattr(P, "_active_rounds", counted)
    active = design_prices(spec, FAST)
    assert calls[:3] == ["rounds", "whole", "rounds"], calls
    assert active.converged, active.message
    assert active.objective <= whole.objective + 1e-6 * abs(whole.objective)


def test_a_failed_whole_circuit_polish_that_changes_nothing_keeps_the_converged_design(monkeypatch):
    # At 16 generated areas / 158 links the active rounds stopped trading
    # places (the last wake-up bought under ACTIVE_GAIN) at a design
    # converged in the whole circuit; the whole-circuit polish that followed
    # failed at once ("line search cannot make progress", at an area whose M
    # had entries of 115 against eigenvalues below 1) at the very same
    # objective, and the design was reported failed. Forced here: the rounds
    # report that they stopped trading places, and every whole-circuit
    # polish fails where it starts. The design must stay converged.
    import importlib
    from dataclasses import replace

    from hierarchy.design.quasinewton import FAILED
    from hierarchy.spec.generate import generate_spec_text

    P = importlib.import_module("hierarchy.design.prices")
    spec = parse_spec(generate_spec_text(areas=10, levels=5, density=0.3, seed=0))
    size = Problem(spec).size
    polish, calls = P._polish, []
    rounds = P._active_rounds

    def failing(prob, x0, opts, max_iter, *a, **k):
        if prob.size == size and max_iter == opts.max_iter:
            calls.append("whole")
            return P._outcome(prob, x0.copy(), replace(P._outcome(prob, x0), status=FAILED,
                                                       message="line search cannot make progress (forced)")), 0
        return polish(prob, x0, opts, max_iter, *a, **k)

    def tiny(*a, **k):
        best, theta, used, part, _, done = rounds(*a, **k)
        return best, theta, used, part, True, done

    monkeypatch.setattr(P, "ACTIVE_GAINS", 0)
    monkeypatch.setattr(P, "_polish", failing)
    monkeypatch.setattr(P, "_active_rounds", tiny)
    active = design_prices(spec, FAST)
    assert "whole" in calls
    assert active.converged, active.message
    assert "forced" not in active.message


def test_the_preconditioner_blocks_are_the_hessian_blocks_of_the_objective():
    # Each block of Problem.preconditioner is the inverse of that owner's
    # block of the Hessian (in the solver's units, eigenvalues made
    # positive), here against central second differences of the value alone,
    # independent of the gradient it is built from (common practice, no
    # source: the four-point formula for a mixed second derivative).
    from hierarchy import load_spec
    from pathlib import Path

    spec = load_spec(Path(__file__).parents[1] / "specs" / "two-level.yaml")
    prob = Problem(spec)
    x = prob.pack(prob.informed_start())
    u = prob.units(x)
    P = prob.preconditioner(x, u)
    h = 1e-4
    f = lambda z: prob.value(x + z * u)
    checked = 0
    for owner, blocks in prob.by_owner.items():
        at = np.concatenate([np.arange(sl.start, sl.stop) for _, sl, _ in blocks])
        H = np.empty((len(at), len(at)))
        for a, i in enumerate(at):
            for b, j in enumerate(at):
                e, d = np.zeros(len(x)), np.zeros(len(x))
                e[i], d[j] = h, h
                H[a, b] = (f(e + d) - f(e - d) - f(d - e) + f(-e - d)) / (4 * h * h)
        w, V = np.linalg.eigh(0.5 * (H + H.T))
        w = np.maximum(np.abs(w), 1e-6 * np.abs(w).max())
        np.testing.assert_allclose(np.linalg.inv(P[np.ix_(at, at)]), (V * w) @ V.T, rtol=0,
                                   atol=2e-4 * np.abs(w).max())
        outside = np.setdiff1d(np.arange(len(x)), at)
        assert not np.any(P[np.ix_(at, outside)])
        checked += 1
    assert checked == len(prob.by_owner) >= 4
