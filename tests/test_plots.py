"""Study figures: small multiples beyond a few links, the circuit drawings'
colours for link kinds, units on every axis, --log-y per quantity, and a
comparison plot that says the same as the comparison table."""

from pathlib import Path

import numpy as np
import pytest
from matplotlib.colors import to_hex

from hierarchy import studies
from hierarchy.report import plots
from hierarchy.report import drawing as render
from hierarchy.cli import main
from hierarchy.design import Options
from hierarchy.errors import InputError
from hierarchy.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
QUICK = Options(restarts=1, max_iter=300)


@pytest.fixture(scope="module")
def budget_sweep(tmp_path_factory):
    """Five links (more than share a panel) swept over the shared budget."""
    spec = load_spec(ROOT / "specs/two-senses.yaml")
    out = tmp_path_factory.mktemp("sweep") / "s"
    study = studies.sweep(spec, "budgets[upward].total", studies.grid(0.05, 3, 3, log=True), QUICK, log=True,
                          workers=1, output=out)
    return spec, study


def series_colours(ax):
    return {ln.get_label(): to_hex(ln.get_color()) for ln in ax.lines if not ln.get_label().startswith("_")}


def test_many_links_get_one_panel_each_in_their_kind_colour(budget_sweep):
    spec, study = budget_sweep
    kinds = {l.id: l.kind for l in spec.links}
    assert len(kinds) > plots.MAX_SHARED_LINKS
    fig = plots.sweep_figure(study, kinds=kinds)
    axes = [ax for ax in fig.axes if ax.get_visible()]
    by_title = {ax.get_title(): ax for ax in axes if ax.get_title()}
    assert set(by_title) == {f"links[{lid}].power" for lid in kinds}
    for lid, kind in kinds.items():
        ax = by_title[f"links[{lid}].power"]
        colours = {to_hex(ln.get_color()) for ln in ax.lines}
        assert colours == {render.RESIDUAL_COLOUR.lower() if kind == "residual"
                           else render.PREDICTION_COLOUR.lower()}
        # A panel shades only its own link's silence: bands never stack.
        assert {p.get_gid() for p in ax.patches} <= {f"silent:{lid}"}
    # The area errors share one panel, in colours no link kind uses.
    errors = [ax for ax in axes if not ax.get_title()]
    assert len(errors) == 1
    used = set(series_colours(errors[0]).values())
    assert used and not used & {render.RESIDUAL_COLOUR.lower(), render.PREDICTION_COLOUR.lower()}


def test_every_axis_has_its_unit_and_units_can_be_named(budget_sweep):
    spec, study = budget_sweep
    fig = plots.sweep_figure(study, kinds={l.id: l.kind for l in spec.links})
    for ax in fig.axes:
        assert ax.get_ylabel().endswith("(model units\u00b2)"), ax.get_ylabel()
    xlabels = [ax.get_xlabel() for ax in fig.axes if ax.get_xlabel()]
    assert xlabels and all(x == "budgets[upward].total (model units\u00b2)" for x in xlabels)
    named = plots.sweep_figure(study, units={"power": "mW", "total": "mW"})
    assert any(ax.get_ylabel() == "power (mW)" for ax in named.axes)
    assert any(ax.get_xlabel() == "budgets[upward].total (mW)" for ax in named.axes)


def test_log_y_applies_to_the_quantities_named(budget_sweep):
    _, study = budget_sweep
    scales = {}
    for ax in plots.sweep_figure(study, log_y="power").axes:
        scales.setdefault(ax.get_ylabel().split(" ")[0], set()).add(ax.get_yscale())
    assert scales == {"power": {"log"}, "error": {"linear"}}
    every = {ax.get_yscale() for ax in plots.sweep_figure(study, log_y=True).axes}
    assert every == {"log"}
    with pytest.raises(InputError, match="not a quantity"):
        plots.check_log_y("links[a->b].price")


def test_a_bad_log_y_word_is_refused_before_any_design(tmp_path, capsys):
    code = main(["sweep", str(ROOT / "specs/single-loop.yaml"), "links[estimate->thermometer].price", "--from",
                 "0.01", "--to", "1", "--log-y", "pwr", "--out", str(tmp_path / "s"), "--no-progress"])
    assert code == 2
    assert "--log-y" in capsys.readouterr().err
    assert not list(tmp_path.iterdir())


def test_one_colour_language_everywhere():
    assert plots.KIND_COLOURS == {"residual": render.RESIDUAL_COLOUR, "prediction": render.PREDICTION_COLOUR}
    assert not set(plots.PALETTE) & {render.RESIDUAL_COLOUR, render.PREDICTION_COLOUR, render.SILENT_COLOUR}


def test_compare_plot_divides_as_the_table_does(tmp_path):
    specs = [load_spec(ROOT / "specs/compare-flat.yaml"), load_spec(ROOT / "specs/compare-predictive.yaml")]
    study = studies.compare(specs, [0.05, 2.0], QUICK, log=True, workers=1, output=tmp_path / "c")
    fig = plots.compare_figure(study)
    bottom = fig.axes[1]
    assert "own objective" in bottom.get_ylabel()
    labels = study.extra["labels"]
    lines = {ln.get_label(): np.asarray(ln.get_ydata(), float) for ln in bottom.lines
             if ln.get_label() in labels}
    totals = list(study.axes[0]["values"])
    checked = 0
    for r in study.extra["best"]:
        if r["relative_min"] is None or r["best"] not in labels:
            continue
        span = range(totals.index(r["from"]), totals.index(r["to"]) + 1)
        runner_up = [lab for lab in labels if lab != r["best"]][0]
        # The table's "relative" (margin over the runner-up) is the plotted excess of the runner-up.
        plotted = [lines[runner_up][i] for i in span]
        assert min(plotted) == pytest.approx(100 * r["relative_min"], rel=1e-9)
        assert max(plotted) == pytest.approx(100 * r["relative_max"], rel=1e-9)
        assert all(lines[r["best"]][i] == pytest.approx(0.0, abs=1e-12) for i in span)
        checked += 1
    assert checked


# -- ax=: drawing onto someone else's axes -------------------------------------------


def _axes(n=1):
    from matplotlib.figure import Figure

    fig = Figure()
    return fig, [fig.add_subplot(n, 1, k + 1) for k in range(n)]


def test_sweep_draws_on_the_given_axes(budget_sweep):
    spec, study = budget_sweep
    fig, (ax,) = _axes()
    assert plots.sweep_figure(study, ["objective"], ax=ax) is ax
    assert fig.axes == [ax]  # nothing added beside it
    drawn = next(ln for ln in ax.lines if ln.get_label() == "objective")
    assert list(drawn.get_ydata()) == study.column("objective")
    assert ax.get_xlabel().startswith("budgets[upward].total")
    # Small multiples take one Axes per panel, in the figure's order.
    kinds = {l.id: l.kind for l in spec.links}
    show = [f"links[{lid}].power" for lid in kinds]
    fig, many = _axes(len(show))
    assert plots.sweep_figure(study, show, kinds=kinds, ax=many) == many
    for a, col in zip(many, show):
        assert [ln.get_label() for ln in a.lines if not ln.get_label().startswith("_")] == [col]
    with pytest.raises(InputError, match="panel"):
        plots.sweep_figure(study, show, ax=many[0])


def test_phase_and_compare_draw_on_the_given_axes(tmp_path):
    spec = load_spec(ROOT / "specs/single-loop.yaml")
    price = "links[estimate->thermometer].price"
    phase = studies.phase_map(spec, "links[estimate->thermometer].noise", [0.01, 0.2], price, [0.002, 0.2],
                              QUICK, workers=1, warm=False)
    fig, (ax,) = _axes()
    assert plots.phase_figure(phase, ax=ax) is ax
    assert len(ax.collections) >= 1 and fig.axes == [ax]
    fig, pair = _axes(2)
    assert plots.study_figure(phase, ax=pair) == pair
    assert pair[1].get_title() == "objective"
    specs = [load_spec(ROOT / "specs/compare-flat.yaml"), load_spec(ROOT / "specs/compare-predictive.yaml")]
    cmp = studies.compare(specs, [0.05, 2.0], QUICK, log=True, workers=1, warm=False)
    fig, (ax,) = _axes()
    assert plots.compare_figure(cmp, ax=ax) is ax
    fronts = {ln.get_label() for ln in ax.lines} & set(cmp.extra["labels"])
    assert fronts == set(cmp.extra["labels"])
    with pytest.raises(InputError, match="ax="):
        plots.compare_figure(cmp, ax=[ax, ax, ax])
