"""Monte Carlo against the exact stationary scores (hierarchy.loop.simulate)."""

import json
import math

import numpy as np
import pytest

from hierarchy.loop.closedloop import Layout, assemble
from hierarchy.errors import InputError, UnstableError
from hierarchy.loop.evaluate import evaluate, loop_radius
from hierarchy.spec.model import (
    PREDICTION,
    RESIDUAL,
    Area,
    Link,
    Sensor,
    Spec,
    StateBlock,
    World,
    frozen_array,
    frozen_map,
)
from hierarchy.loop.simulate import Estimate, compare, noise_factor, simulate

from helpers import random_gains

fa = frozen_array


def two_level_spec(lags=(0, 2, 1)):
    """Two levels (low, high) plus a lateral pathway (side) and a relay.

    * prediction low->eye into a sensor, with the residual eye->low that
      subtracts it (P);
    * residual low->high from low to high, prediction high->low back (P);
    * feed-forward residual ear->side (no P), residual low->relay and
      prediction relay->side into an area without a paired residual;
    * lags: low 0, high 2, side 1 (by default).
    """
    world = World(states=(
        # Slow block: damped rotation, noise of rank one (Omega is singular).
        StateBlock("slow", 2, fa([[0.9, 0.25], [-0.25, 0.9]]), fa([[1.0, 0.0], [0.0, 0.0]])),
        StateBlock("fast", 1, fa([[0.5]]), fa([[0.5]]), frozen_map({"slow": fa([[0.3, -0.2]])})),
    ))
    sensors = (
        Sensor("eye", frozen_map({"slow": fa([[1.0, 0.0], [0.2, 1.0]]), "fast": fa([[0.5], [0.0]])}),
               fa([[0.1, 0.02], [0.02, 0.2]])),
        Sensor("ear", frozen_map({"fast": fa([[1.0]])}), fa([[0.3]])),
    )
    low_lag, high_lag, side_lag = lags
    areas = (
        Area("low", 2, tracks=("fast",), weight=1.0, lag=low_lag, activity_price=0.1),
        Area("high", 3, tracks=("slow",), weight=0.5, lag=high_lag),
        Area("side", 1, tracks=("fast",), weight=2.0, lag=side_lag),
        Area("relay", 1),
    )
    noise = lambda d, v: fa(v * np.eye(d))  # noqa: E731
    links = (
        Link("eye", "low", RESIDUAL, 2, noise(2, 0.05), price=0.2),
        Link("low", "eye", PREDICTION, 2, noise(2, 0.02), price=0.1),
        Link("low", "high", RESIDUAL, 2, noise(2, 0.1), price=0.3),
        Link("high", "low", PREDICTION, 2, noise(2, 0.04), price=0.05),
        Link("ear", "side", RESIDUAL, 1, noise(1, 0.1), price=0.1),
        Link("low", "relay", RESIDUAL, 1, noise(1, 0.2), price=0.2),
        Link("relay", "side", PREDICTION, 1, noise(1, 0.1), price=0.1),
    )
    return Spec("two-level", world, sensors, areas, links)


@pytest.fixture(scope="module")
def two_level():
    spec = two_level_spec()
    gains = random_gains(spec)
    radius = loop_radius(assemble(Layout(spec), gains))
    assert 0.85 < radius < 0.95  # world rotation at 0.935 dominates the area block's 0.8
    return spec, gains


@pytest.fixture(scope="module")
def two_level_run(two_level):
    spec, gains = two_level
    return evaluate(spec, gains), simulate(spec, gains, steps=100_000, chains=8, seed=3)


def test_exact_scores_inside_tight_intervals(two_level_run):
    scores, sim = two_level_run
    rows = compare(scores, sim)
    # objective + 3 targeted areas + 7 links
    assert len(rows) == 1 + 3 + 7
    for row in rows:
        assert row.inside, row
        # The interval must be tight, or "inside" would prove nothing.
        assert (row.high - row.low) / 2 < 0.05 * abs(row.exact), row
    assert sim.areas["relay"]["error"] is None
    assert sim.areas["low"]["activity"].contains(scores.areas["low"].activity)
    assert sim.areas["relay"]["activity"].contains(scores.areas["relay"].activity)
    assert not sim.warnings


def test_states_run_parameters(two_level_run):
    _, sim = two_level_run
    assert (sim.steps, sim.chains, sim.batches, sim.level, sim.seed) == (100_000, 8, 20, 0.99, 3)
    assert sim.burn_in + sim.batches * sim.batch_length == sim.steps
    assert sim.burn_in >= math.ceil(math.log(1e-8) / math.log(sim.radius))
    data = json.loads(json.dumps(sim.to_dict()))
    assert data["chains"] == 8 and data["level"] == 0.99
    assert data["areas"]["relay"]["error"] is None
    assert set(data["links"]) == {l.id for l in two_level_spec().links}


def test_same_seed_same_numbers_other_seed_other_numbers(two_level):
    spec, gains = two_level
    a = simulate(spec, gains, steps=3_000, chains=2, seed=11)
    b = simulate(spec, gains, steps=3_000, chains=2, seed=11)
    c = simulate(spec, gains, steps=3_000, chains=2, seed=12)
    assert a.to_dict() == b.to_dict()
    assert a.objective.mean != c.objective.mean
    assert a.links["low->high"]["power"] != c.links["low->high"]["power"]


def test_other_lags_agree(two_level):
    spec = two_level_spec(lags=(1, 0, 2))
    _, gains = two_level  # same gain shapes: lags do not change them
    scores = evaluate(spec, gains)
    sim = simulate(spec, gains, steps=40_000, chains=8, seed=5)
    for row in compare(scores, sim):
        assert row.inside, row
        assert (row.high - row.low) / 2 < 0.1 * abs(row.exact), row


def test_unstable_loop_is_refused():
    spec = two_level_spec()
    gains = random_gains(spec, radius=1.2)
    with pytest.raises(UnstableError, match="unstable"):
        simulate(spec, gains, steps=1_000)


@pytest.mark.parametrize("kwargs", [
    {"level": 1.0}, {"level": 0.0}, {"chains": 0}, {"steps": 10, "batches": 20, "burn_in": 0},
    {"chains": 1, "batches": 1}, {"burn_in": -1}, {"steps": 2.5},
])
def test_bad_run_parameters(two_level, kwargs):
    spec, gains = two_level
    with pytest.raises(InputError):
        simulate(spec, gains, **{"steps": 1_000, **kwargs})


def test_noise_factor_of_singular_covariance():
    rng = np.random.default_rng(0)
    B = rng.normal(size=(4, 2))
    Omega = B @ B.T  # rank 2
    L = noise_factor(Omega)
    assert L.shape == (4, 2)
    np.testing.assert_allclose(L @ L.T, Omega, atol=1e-12)


def test_estimate():
    e = Estimate(2.0, 1.9, 2.1)
    assert e.contains(2.0) and not e.contains(2.2) and e.contains(2.2, atol=0.1)
    assert e.half_width == pytest.approx(0.1)
    assert e.relative_half_width == pytest.approx(0.05)


# --- scalar closed form ------------------------------------------------------

def ar1_spec(a, q, lag):
    """AR(1) world read by a noiseless sensor; the area copies the sensor with
    one step of conduction delay (M = 0, S = 1, K = 1, all pinned)."""
    world = World(states=(StateBlock("x", 1, fa([[a]]), fa([[q]])),))
    sensor = Sensor("s", frozen_map({"x": fa([[1.0]])}), fa([[0.0]]))
    area = Area("area", 1, tracks=("x",), weight=1.0, lag=lag, pin=frozen_map({"M": fa([[0.0]])}))
    link = Link("s", "area", RESIDUAL, 1, fa([[0.0]]), price=0.0,
                pin=frozen_map({"S": fa([[1.0]]), "K": fa([[1.0]])}))
    return Spec("ar1", world, (sensor,), (area,), (link,))


@pytest.mark.parametrize("a", [0.8, -0.5])
def test_ar1_naive_predictor_closed_form(a):
    # AR(1) variance, standard time-series result: Var x = q / (1 - a^2), so
    # z(t) = x(t-1) predicts x(t) with E(x(t) - x(t-1))^2 = 2 q / (1 + a).
    q = 0.7
    expected = 2 * q / (1 + a)
    spec = ar1_spec(a, q, lag=0)
    scores = evaluate(spec)  # every gain is pinned
    assert scores.areas["area"].error == pytest.approx(expected, rel=1e-10)
    sim = simulate(spec, steps=100_000, chains=8, seed=2)
    est = sim.areas["area"]["error"]
    assert est.contains(expected)
    assert est.relative_half_width < 0.02
    assert sim.objective.contains(expected)
    # The link carries the sensor value: power = Var x.
    assert sim.links["s->area"]["power"].contains(q / (1 - a * a))
    assert all(row.inside for row in compare(scores, sim))


def test_ar1_lag_one_error_is_zero():
    spec = ar1_spec(0.8, 0.7, lag=1)
    scores = evaluate(spec)
    assert abs(scores.areas["area"].error) < 1e-12
    sim = simulate(spec, steps=5_000, chains=4, seed=0)
    est = sim.areas["area"]["error"]
    assert abs(est.mean) < 1e-20 and est.high < 1e-20
    assert all(row.inside for row in compare(scores, sim))
