"""Grouped value paths (several places set at once) and comparisons over prices.

The outside check is the scale law of the model brief (docs/model.md, "Scale
law"; it follows from the gauge of a link: scaling a link's channel noise by c
and its price by 1/c leaves the optimal objective unchanged and scales the
link's optimal power by c): a grouped sweep of every price must agree with a
grouped sweep of every noise, and a comparison at price scale f with designs
of the same specs whose every noise is multiplied by f.
"""

from pathlib import Path

import numpy as np
import pytest

from hierarchy import studies
from hierarchy.cli import main
from hierarchy.design import Options, design
from hierarchy.errors import InputError
from hierarchy.spec.model import PREDICTION
from hierarchy.spec import load_spec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
FAST = Options(restarts=2, max_iter=600)
LOOP = ROOT / "specs" / "single-loop.yaml"  # both links: noise 0.05, price 0.02
RTOL = 1e-5  # the solver's tolerance is relative to the objective (README, "Honesty of results")


def test_a_group_sets_every_selected_place_as_single_paths_would():
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    p = studies.parse_path(spec, "links[kind:prediction].price")
    assert p.grouped and set(p.members) == {l.id for l in spec.links if l.kind == PREDICTION}
    assert studies.parse_path(spec, "links.kind:prediction.price") == p  # the shell-safe form
    grouped = studies.set_value(spec, p, 0.7)
    one_by_one = spec
    for lid in p.members:
        one_by_one = studies.set_value(one_by_one, f"links[{lid}].price", 0.7)
    assert studies.spec_digest(grouped) == studies.spec_digest(one_by_one)
    assert [l.price for l in grouped.links] == [0.7 if l.kind == PREDICTION else l.price for l in spec.links]
    every = studies.set_value(spec, "links[*].noise", 0.3)
    assert all(np.array_equal(l.noise, 0.3 * np.eye(l.dim)) for l in every.links)
    frm = studies.parse_path(spec, "links[from:station-view].price")
    assert set(frm.members) == {l.id for l in spec.links if l.source == "station-view"}
    assert studies.parse_path(spec, "areas[*].weight").members == tuple(a.name for a in spec.areas)
    assert not studies.parse_path(spec, "links[probe->station-view].price").grouped


@pytest.mark.parametrize("path, value, words", [
    ("links[kind:predicton].price", 0.1, ["no link kind `predicton`", "did you mean `prediction`"]),
    ("links[to:nowhere].price", 0.1, ["`to:nowhere` selects nothing"]),
    ("links[*].price", 0.0, ["noisy but has no price"]),  # the same rule as the reader and a single path
    ("links[*].colour", 0.1, ["no settable value `colour`"]),
    ("links[*].noise", -1, ["at least 0"]),
])
def test_bad_groups_are_refused_with_the_path_named(path, value, words):
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    with pytest.raises(InputError) as err:
        studies.set_value(spec, path, value)
    for w in words:
        assert w in str(err.value)


def test_phase_axes_may_not_set_the_same_place():
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    with pytest.raises(InputError, match="both set links"):
        studies.phase_map(spec, "links[*].price", [0.1], "links[kind:prediction].price", [0.2], FAST)


def test_grouped_price_sweep_obeys_the_scale_law():
    spec = load_spec(LOOP)
    assert {(l.noise[0, 0], l.price) for l in spec.links} == {(0.05, 0.02)}
    prices = [0.01, 0.02, 0.04]
    by_price = studies.sweep(spec, "links[*].price", prices, FAST, workers=1)
    # price p at noise 0.05  ==  price 0.02 at noise 0.05 p / 0.02 (scale law)
    by_noise = studies.sweep(spec, "links[*].noise", [0.05 * p / 0.02 for p in prices], FAST, workers=1)
    for a, b in zip(by_price.rows, by_noise.rows):
        assert a["converged"] and b["converged"]
        assert a["objective"] == pytest.approx(b["objective"], rel=RTOL)
        for l in spec.links:  # and the noisier link sends c times the power
            c = b["links[*].noise"] / 0.05
            assert b[f"links[{l.id}].power"] == pytest.approx(c * a[f"links[{l.id}].power"], rel=1e-3, abs=1e-9)
    assert "links[*].price" in by_price.columns


def _noisier(spec, f):
    """``spec`` with every link's noise times ``f`` (prices as written)."""
    from dataclasses import replace

    from hierarchy.spec.model import frozen_array

    return replace(spec, links=tuple(replace(l, noise=frozen_array(f * np.asarray(l.noise))) for l in spec.links))


def test_compare_over_prices_keeps_the_nesting_rule_and_the_scale_law(tmp_path):
    flat, pred = (load_spec(ROOT / "specs" / f"price-{n}.yaml") for n in ("flat", "predictive"))
    scales = [0.1, 1.0, 10.0]
    study = studies.compare([flat, pred], prices=scales, options=FAST, log=True, workers=1, output=tmp_path / "c")
    assert study.extra["form"] == "price" and study.axes[0]["path"] == "price_scale"
    n = len(scales)
    for f_row, p_row in zip(study.rows[:n], study.rows[n:]):
        assert f_row["converged"] and p_row["converged"]
        # The predictive circuit holds the flat one plus links it may silence: never worse.
        assert p_row["objective"] <= f_row["objective"] * (1 + RTOL)
        for row, spec in ((f_row, flat), (p_row, pred)):
            assert row["energy_used"] == pytest.approx(sum(row[f"links[{l.id}].power"] for l in spec.links))
    # Scale law: every price times f is every noise times f at the written prices.
    f = scales[-1]
    direct = design(_noisier(flat, f), FAST)
    assert study.rows[n - 1]["objective"] == pytest.approx(direct.objective, rel=RTOL)
    assert (tmp_path / "c.csv").read_text().startswith("spec,price_scale,energy_used,status")


def test_compare_cli_over_prices(tmp_path, capsys):
    flat, pred = ROOT / "specs" / "price-flat.yaml", ROOT / "specs" / "price-predictive.yaml"
    code = main(["compare", str(flat), str(pred), "--prices", "0.5:2:2", "--log", "--workers", "1",
                 "--restarts", "2", "--no-progress", "--out", str(tmp_path / "p"), "--no-plot"])
    out = capsys.readouterr().out
    assert code == 0
    assert "best architecture by price scale range" in out and "every link price x scale" in out
    # one of --budgets and --prices, not both
    with pytest.raises(SystemExit) as stop:  # argparse's own refusal, same status
        main(["compare", str(flat), str(pred), "--prices", "1:2:2", "--budgets", "1:2:2"])
    assert stop.value.code == 2
    assert "not allowed with" in capsys.readouterr().err
    # a spec without priced links cannot be compared over prices
    with pytest.raises(InputError, match="no link of this spec has a price"):
        studies.compare([load_spec(ROOT / "specs" / "compare-flat.yaml"), load_spec(flat)], prices=[1.0])
