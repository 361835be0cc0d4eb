"""Results as notebook objects: pandas tables, xarray datasets, short reprs.

Every check compares a table with the result's own numbers (a table is a
view, not a second computation), so none of the values here is hard-coded."""

import csv
import io
import math
from pathlib import Path

import numpy as np
import pytest

import hierarchy
from hierarchy import studies
from hierarchy.design import Options
from hierarchy.spec import load_spec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
FAST = Options(restarts=2, max_iter=400)
PRED = "estimate->thermometer"
PRICE = f"links[{PRED}].price"
NOISE = f"links[{PRED}].noise"

BUDGETED = """
spec: 1
name: {name}
world:
  states:
    temperature: {{dim: 1, dynamics: 0.95, noise: 0.1}}
sensors:
  thermometer: {{observes: {{temperature: 1}}, noise: 0.2}}
areas:
  estimate: {{tracks: temperature}}
links:
  - {{from: thermometer, to: estimate, kind: residual, noise: 0.05}}
{extra}budgets:
  - {{name: total, links: all, total: 1.0}}
"""


@pytest.fixture(scope="module")
def result():
    return hierarchy.load(ROOT / "specs" / "two-senses.yaml").design(FAST)


@pytest.fixture(scope="module")
def spec():
    return load_spec(ROOT / "specs" / "single-loop.yaml")


@pytest.fixture(scope="module")
def swept(spec):
    # Descending on purpose: coordinates keep the order the study walked.
    return studies.sweep(spec, PRICE, [0.3, 0.03, 0.003], FAST, workers=1, warm=False)


@pytest.fixture(scope="module")
def phase(spec):
    # A 3 x 2 grid (not square), so swapped axes would show.
    return studies.phase_map(spec, NOISE, [0.01, 0.05, 0.2], PRICE, [0.002, 0.2], FAST, workers=1, warm=False)


def _same(a, b):
    if a is None or (isinstance(a, float) and math.isnan(a)):
        return b is None or (isinstance(b, float) and math.isnan(b))
    return a == b


def test_design_tables_hold_the_results_own_numbers(result):
    areas, links = result.to_pandas()
    assert areas.index.name == "area" and links.index.name == "link"
    assert list(areas.index) == list(result.scores.areas)
    assert list(links.index) == list(result.scores.links)
    for name, a in result.scores.areas.items():
        for col in ("error", "prior", "relative", "activity", "weight", "lag"):
            assert _same(getattr(a, col), areas.loc[name, col]), (name, col)
    for lid, s in result.scores.links.items():
        for col in ("kind", "power", "noise_power", "snr", "bits", "price"):
            assert _same(getattr(s, col), links.loc[lid, col]), (lid, col)
        assert bool(links.loc[lid, "silent"]) == (lid in result.silent)
    # The spec has a shared budget: each member link carries its share.
    for name, b in result.budgets.items():
        for lid in b.links:
            assert links.loc[lid, f"share[{name}]"] == pytest.approx(result.scores.links[lid].power / b.total,
                                                                      rel=1e-12)
        assert links[f"share[{name}]"].sum() == pytest.approx(b.used / b.total, rel=1e-9)


def test_design_reprs_are_short_and_say_the_status(result):
    text = repr(result)
    assert len(text) < 250 and "\n" not in text
    assert result.status in text and result.spec.name in text
    page = result._repr_html_()
    assert page.startswith("<table>") and page.endswith("</table>")
    assert 100 < len(page) < 1000
    assert result.status in page


def test_sweep_frame_equals_the_rows(swept):
    frame = swept.to_pandas()
    assert list(frame.columns) == swept.columns
    assert len(frame) == len(swept.rows)
    for i, row in enumerate(swept.rows):
        for c in swept.columns:
            if c == "silent_links":
                assert list(frame.loc[i, c]) == row[c]
            else:
                assert _same(row.get(c), frame.loc[i, c]), (i, c)


def test_sweep_dataset_has_one_labelled_dimension(swept):
    ds = swept.to_xarray()
    assert ds["objective"].dims == (PRICE,)
    assert list(ds[PRICE].values) == [0.3, 0.03, 0.003]
    for i, v in enumerate(swept.values):
        assert float(ds["objective"].sel({PRICE: v})) == swept.rows[i]["objective"]
    assert ds[f"links[{PRED}].silent"].dtype == bool
    assert "Study(kind='sweep'" in repr(swept) and len(repr(swept)) < 250
    assert len(swept._repr_html_()) < 1000


def test_phase_dataset_puts_each_row_at_its_own_coordinates(phase):
    ds = phase.to_xarray()
    assert ds["objective"].dims == (PRICE, NOISE)
    assert ds["objective"].shape == (2, 3)
    assert list(ds[NOISE].values) == [0.01, 0.05, 0.2]
    assert list(ds[PRICE].values) == [0.002, 0.2]
    for row in phase.rows:
        at = {NOISE: row[NOISE], PRICE: row[PRICE]}
        assert float(ds["objective"].sel(at)) == row["objective"]
        assert bool(ds[f"links[{PRED}].silent"].sel(at)) == row[f"links[{PRED}].silent"]


def test_compare_dataset_has_spec_and_budget_dimensions():
    flat = parse_spec(BUDGETED.format(name="flat", extra=""), path="flat.yaml")
    rich = parse_spec(BUDGETED.format(
        name="predictive", extra="  - {from: estimate, to: thermometer, kind: prediction, noise: 0.005}\n"),
        path="predictive.yaml")
    st = studies.compare([flat, rich], [0.1, 1.0], FAST, workers=1, warm=False)
    ds = st.to_xarray()
    assert ds["objective"].dims == ("spec", "budget")
    assert list(ds["spec"].values) == ["flat", "predictive"]
    assert list(ds["budget"].values) == [0.1, 1.0]
    for row in st.rows:
        assert float(ds["energy_used"].sel(spec=row["spec"], budget=row["budget"])) == row["energy_used"]
    # A column that applies to one spec only is missing (NaN) for the other.
    power = ds[f"links[{PRED}].power"]
    assert np.all(np.isnan(power.sel(spec="flat").values))
    assert not np.any(np.isnan(power.sel(spec="predictive").values))


def test_csv_cells_read_back_as_written(swept):
    text = swept.csv_text()
    rows = list(csv.reader(io.StringIO(text)))
    assert rows[0] == swept.columns
    assert len(rows) == len(swept.rows) + 1
    for got, row in zip(rows[1:], swept.rows):
        want = [studies.tables._csv_cell(row.get(c)) for c in swept.columns]
        assert got == [str(w) for w in want]
    # Floats keep every digit: they read back to the same number.
    k = swept.columns.index("objective")
    assert [float(r[k]) for r in rows[1:]] == [r["objective"] for r in swept.rows]
