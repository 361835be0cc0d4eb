"""Trustworthy optima: the designer escapes the known traps, keeps the
sub-circuit invariant, and claims no more than it checked.

The traps are the exactly stationary saddles of the bilinear gains (docs/model.md,
"Solver hazards"): a link with sender and receiver at zero, and a stream of
such links that pays only with all of them on."""

import numpy as np
import pytest
import scipy.linalg as sla
from hypothesis import HealthCheck, given, settings, strategies as st

import importlib
from hierarchy.design import Options, design
from hierarchy.loop.gains import Gains, gain_shapes, load_gains
from hierarchy.spec.generate import generate_spec_text
from hierarchy.spec import load_spec, parse_spec
from hierarchy.studies import compare, set_value
from hierarchy.design.subcircuit import contains, embed, without_links, without_predictions

from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
QUICK = Options(restarts=2, max_iter=1500)


def relay_chain(hops: int, price: float = 0.002):
    """A gauge whose readings reach the one targeted area only through
    ``hops - 1`` untargeted relays."""
    names = [f"r{i}" for i in range(1, hops)]
    chain = ["gauge"] + names + ["top"]
    return gauge_and_relays(names, zip(chain[:-1], chain[1:]), price)


def gauge_and_relays(relays, pairs, price: float = 0.002):
    """A gauge on one world level, untargeted relay areas ``relays``, a
    targeted area ``top`` and residual links ``pairs`` (sender, receiver)."""
    areas = "".join(f"  {n}: {{dim: 1}}\n" for n in relays)
    links = "".join(f"  - {{from: {a}, to: {b}, kind: residual, noise: 0.02, price: {price}}}\n"
                    for a, b in pairs)
    return parse_spec(f"""spec: 1
world:
  states:
    level: {{dim: 1, dynamics: 0.95, noise: 0.05}}
sensors:
  gauge: {{observes: {{level: 1}}, noise: 0.05}}
areas:
{areas}  top: {{tracks: level, weight: 1.0}}
links:
{links}""")


def zero_gains(spec) -> Gains:
    shapes = gain_shapes(spec)
    return Gains({a: {n: np.zeros(s) for n, s in b.items()} for a, b in shapes["areas"].items()},
                 {l: {n: np.zeros(s) for n, s in b.items()} for l, b in shapes["links"].items()})


def test_two_senses_finds_the_pad_stream():
    spec = load_spec(ROOT / "specs" / "two-senses.yaml")
    res = design(spec)
    # The design carried on from the hand-written gains (both senses on) is the
    # better basin; the default design must reach it without being told.
    hand = design(spec, start=load_gains(ROOT / "specs" / "two-senses.gains.json", spec), compare_unpinned=False)
    assert res.converged
    assert res.objective <= hand.objective * (1 + 1e-6)
    for lid in ("pad->pad-view", "pad-view->fused"):
        assert lid not in res.silent
        assert res.scores.links[lid].power > 1e-3


@pytest.mark.parametrize("hops", [2, 3])
def test_a_silent_stream_wakes_only_as_a_whole(hops, monkeypatch):
    spec = relay_chain(hops)
    # Every gain at zero: each link is a saddle, and no one-link test can see
    # the chain's worth (the relays are untargeted, the first link's signal
    # reaches no target). The prior error is the world's stationary variance
    # (scipy's Lyapunov solver).
    prior = float(sla.solve_discrete_lyapunov(np.array([[0.95]]), np.array([[0.05]]))[0, 0])
    start = zero_gains(spec)
    woken = design(spec, QUICK, start=start, compare_unpinned=False)
    assert woken.objective < 0.5 * prior
    assert not woken.silent
    monkeypatch.setattr(importlib.import_module("hierarchy.design.prices"), "_wake_streams", lambda *a: (None, 0))
    alone = design(spec, QUICK, start=start, compare_unpinned=False)
    assert alone.objective == pytest.approx(prior, rel=1e-6)


@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(areas=st.integers(2, 4), density=st.sampled_from([0.4, 0.8]), seed=st.integers(0, 50))
def test_sub_circuit_invariant_on_generated_circuits(areas, density, seed):
    # docs/model.md, "sub-circuit invariant": silencing the extra links of a
    # larger circuit gives the smaller one's design with the same scores.
    big = parse_spec(generate_spec_text(areas=areas, levels=2, density=density, seed=seed))
    small = without_predictions(big)
    if small is None:
        return
    assert contains(big, small)
    rs, rb = design(small, QUICK, compare_unpinned=False), design(big, QUICK, compare_unpinned=False)
    assert rb.objective <= rs.objective * (1 + 1e-9)
    # The embedding is exactly the smaller design in the larger circuit.
    from hierarchy.loop.evaluate import evaluate

    assert evaluate(big, embed(rs.gains, small, big)).objective == pytest.approx(rs.objective, rel=1e-10)


def test_compare_never_lets_an_architecture_lose_to_one_it_contains():
    flat = load_spec(ROOT / "specs" / "compare-flat.yaml")
    pred = load_spec(ROOT / "specs" / "compare-predictive.yaml")
    totals = [0.02, 2.0]
    st = compare([flat, pred], totals, QUICK, workers=1)
    by = {(r["spec"], r["budget"]): r for r in st.rows}
    for t in totals:
        assert by[("compare-predictive", t)]["objective"] <= by[("compare-flat", t)]["objective"] * (1 + 1e-9)
    assert all(r["agreement"].count("/") == 1 for r in st.rows)


def test_contains_sees_added_links_only():
    pred = load_spec(ROOT / "specs" / "compare-predictive.yaml")
    smaller = without_links(pred, ["deck-view->tilt"])
    assert contains(pred, smaller) and not contains(smaller, pred)
    louder = set_value(smaller, "links[tilt->deck-view].noise", 0.5)
    assert not contains(pred, louder)


def test_silent_links_say_what_was_tested():
    spec = load_spec(ROOT / "specs" / "single-loop.yaml")
    res = design(spec)
    assert res.silent, "the single loop's prediction is silent at its price"
    for info in res.silent.values():
        assert info["verdict"] == "not worth sending"
        assert info["tested"] in ("alone", "stream", "unreachable")
    # Two parallel relay streams from silence, cut short: one stream wakes, the
    # design it leads to gets its one iteration and is never wake-tested, so
    # nothing is claimed about the other stream.
    chains = two_relay_streams()
    cut = design(chains, Options(restarts=1, max_iter=1, probe_iter=1), start=zero_gains(chains),
                 compare_unpinned=False, floor=False)
    assert cut.status == "iteration limit"
    assert len(cut.silent) == 2 and all(info["verdict"] == "untested" for info in cut.silent.values())


def two_relay_streams():
    """A gauge whose readings reach the targeted area through either of two
    untargeted relays (two streams of two links each)."""
    return gauge_and_relays(["r1", "q1"], [("gauge", "r1"), ("r1", "top"), ("gauge", "q1"), ("q1", "top")])


def test_searches_are_reported_and_agree_on_the_example():
    res = design(load_spec(ROOT / "specs" / "two-senses.yaml"))
    k, n = res.agreement
    assert n == 2 and k >= 1
    assert {s["search"] for s in res.searches} == {"multistart", "feed-forward first"}
    assert min(s["objective"] for s in res.searches) == res.objective


def test_a_tight_budget_still_wakes_the_stream_that_pays():
    # Ship deck at 1 % of a useful budget: the residual up to the swell area
    # pays only at a power far below its noise, and that area hears nothing
    # else (its memory is arbitrary while silent). A heavier search (16 starts,
    # longer probes) is the reference; the default design must reach it, with
    # both of its searches agreeing.
    spec = set_value(load_spec(ROOT / "specs" / "compare-predictive.yaml"), "budgets[total].total", 0.02)
    res = design(spec, compare_unpinned=False)
    heavy = design(spec, Options(restarts=16, probe_iter=150, max_iter=6000), compare_unpinned=False)
    assert res.converged and res.budgets["total"].met
    assert res.objective <= heavy.objective * (1 + 1e-6)
    assert res.agreement == (2, 2)
    assert "deck-view->swell-view" not in res.silent


@pytest.mark.parametrize("path, lid", [("two-level", "probe->station-view"),
                                       ("compare-predictive", "deck-view->tilt")])
def test_a_narrowed_link_is_a_sub_circuit(path, lid):
    # docs/model.md, "sub-circuit invariant", for a link sending on fewer channels:
    # any design of the narrow circuit (here random stable starts) is a design
    # of the wide one with the same scores, predictions included (the residual
    # that subtracts a narrowed prediction reads it through U').
    from hierarchy.loop.evaluate import evaluate
    from hierarchy.design.problem import Problem
    from hierarchy.design.subcircuit import narrowed, widen

    spec = load_spec(ROOT / "specs" / f"{path}.yaml")
    sub, U = narrowed(spec, lid)
    assert sub.link(lid).dim == spec.link(lid).dim - 1
    prob = Problem(sub)
    rng = np.random.default_rng(4)
    for _ in range(3):
        g = prob.unpack(prob.random_start(rng))
        a = evaluate(sub, g).objective
        assert evaluate(spec, widen(g, sub, spec, lid, U)).objective == pytest.approx(a, rel=1e-10)


def test_two_levels_find_the_basin_of_a_rank_one_residual():
    # The river gauge's best design sends one combination of the probe's two
    # readings (a rank-one residual) and leaves the rest to the lower area's
    # memory. One of 32 random starts finds that basin (seed 1 of a 16-start
    # multistart with long probes); the default design must reach it too.
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    res = design(spec, compare_unpinned=False, floor=False)
    heavy = design(spec, Options(restarts=16, probe_iter=150, max_iter=6000, seed=1), compare_unpinned=False,
                   floor=False)
    assert res.converged
    assert res.objective <= heavy.objective * (1 + 1e-6)
    assert any(s["search"].startswith("narrow ") for s in res.searches)


def test_the_kept_design_says_when_it_is_lower_than_every_converged_search():
    """The lowest usable design is kept even if its search did not converge,
    but its status stays unconverged and its message names the converged
    search and how far above it ended."""
    from types import SimpleNamespace as NS

    _best_of = importlib.import_module("hierarchy.design.search")._best_of

    def res(objective, converged, message):
        return NS(objective=objective, converged=converged, status="converged" if converged else "failed",
                  message=message, budgets={}, iterations=10, evaluations=20, restarts=1)

    settled, stuck = res(1.0, True, "ok"), res(0.9, False, "line search cannot make progress")
    best = _best_of([("multistart", settled), ("feed-forward first", stuck)])
    assert best is stuck and best.status == "failed"
    assert "not a confirmed local optimum" in best.message and "'multistart'" in best.message
    assert "'feed-forward first'" in best.message and "0.11 higher" in best.message
    assert best.iterations == 20 and best.evaluations == 40
    # A converged best keeps its own message untouched.
    settled, worse = res(1.0, True, "ok"), res(1.2, False, "iteration limit")
    assert _best_of([("multistart", worse), ("feed-forward first", settled)]).message == "ok"
