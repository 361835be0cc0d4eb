"""Sweeps, phase maps, architecture comparisons, resume, Dask and plots.

Small designer settings throughout (two starts, a few hundred iterations):
these tests check the studies, not the designer's precision."""

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import importlib

from hierarchy import studies
from hierarchy.cli import main
from hierarchy.design import Options
from hierarchy.errors import InputError
from hierarchy.spec import load_spec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
FAST = Options(restarts=2, max_iter=600)
PRED = "estimate->thermometer"
PRICE = f"links[{PRED}].price"

# A one-area loop in budget form, without and with a top-down prediction on a
# quiet channel: the predictive circuit is the flat one plus a link it may
# leave silent.
LOOP = """
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
FLAT = parse_spec(LOOP.format(name="flat", extra=""), path="flat.yaml")
PREDICTIVE = parse_spec(LOOP.format(
    name="predictive", extra="  - {from: estimate, to: thermometer, kind: prediction, noise: 0.005}\n"),
    path="predictive.yaml")


def table(study):
    """The rows without the timing columns (which differ between runs)."""
    return [{k: v for k, v in r.items() if k not in studies.TIMING_COLUMNS} for r in study.rows]


def same_table(a, b, rel=1e-9):
    assert len(a) == len(b)
    for ra, rb in zip(a, b):
        assert ra.keys() == rb.keys()
        for k in ra:
            if isinstance(ra[k], float) and isinstance(rb[k], float):
                assert ra[k] == pytest.approx(rb[k], rel=rel, abs=1e-15), k
            else:
                assert ra[k] == rb[k], k


@pytest.fixture(scope="module")
def price_sweep(tmp_path_factory):
    base = tmp_path_factory.mktemp("sweep") / "price"
    spec = load_spec(ROOT / "specs" / "single-loop.yaml")
    study = studies.sweep(spec, PRICE, studies.grid(1e-4, 1, 9, log=True), FAST, log=True, output=base,
                          workers=1)
    return study, base


# -- sweeps -------------------------------------------------------------------


def test_price_sweep_silences_the_prediction_at_high_price(price_sweep):
    # Fact of the trade (common practice, no source): as a link's price rises
    # its optimal power falls, and past some price the link is not worth
    # sending at all.
    study, base = price_sweep
    power = np.array(study.column(f"links[{PRED}].power"))
    silent = study.column(f"links[{PRED}].silent")
    assert all(study.column("converged"))
    # Predictions pay at the cheap end: real power, and a lower objective
    # than where the link is silent.
    assert power[0] > 1.0 and not silent[0]
    assert study.rows[0]["objective"] < study.rows[-1]["objective"] - 1e-3
    assert np.all(np.diff(power) <= 1e-9 * power[0])  # falls with the price
    assert silent[-1] and power[-1] == pytest.approx(0.0, abs=1e-12)
    ranges = study.silent_ranges()[PRED]
    assert len(ranges) == 1
    r = ranges[0]
    assert r["to"] == 1.0 and r["above"] is None and r["below"] is not None
    assert 1e-4 < r["below"] < r["from"] < 1.0
    first = study.values.index(r["from"])
    assert all(silent[first:]) and not any(silent[:first])
    # ...and the same in the files.
    data = json.loads(Path(f"{base}.json").read_text())
    assert data["silent_ranges"][PRED] == ranges
    assert data["kind"] == "sweep" and data["not_converged"] == []
    lines = Path(f"{base}.csv").read_text().splitlines()
    header = lines[0].split(",")
    col = header.index(f"links[{PRED}].silent")
    assert [ln.split(",")[col] for ln in lines[1:]] == ["true" if s else "false" for s in silent]


def test_continuation_wakes_a_silent_prediction_when_it_pays():
    # Walking from expensive to cheap: the prediction starts silent and must
    # come back where it pays (same powers as the walk the other way).
    spec = load_spec(ROOT / "specs" / "single-loop.yaml")
    down = studies.sweep(spec, PRICE, [1.0, 1e-2, 1e-4], FAST, workers=1)
    assert down.column(f"links[{PRED}].silent") == [True, False, False]
    up = studies.sweep(spec, PRICE, [1e-4, 1e-2, 1.0], FAST, workers=1)
    assert down.rows[2]["objective"] == pytest.approx(up.rows[0]["objective"], rel=1e-6)
    assert down.rows[2][f"links[{PRED}].power"] == pytest.approx(up.rows[0][f"links[{PRED}].power"], rel=1e-3)


def test_sweep_every_column_and_gains_norms(price_sweep):
    study, _ = price_sweep
    for col in ("objective", "weighted_error", "areas[estimate].error", f"links[{PRED}].through_gain",
                "links[thermometer->estimate].power", "iterations", "status"):
        assert col in study.columns
    assert study.gains[0]["links"][PRED]["G"]  # the design of each point is kept


# -- value paths ----------------------------------------------------------------


def test_paths_set_values_on_the_typed_spec():
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    s = studies.set_value(spec, "links[probe->station-view].noise", 0.3)
    assert np.allclose(s.link("probe->station-view").noise, 0.3 * np.eye(2))
    s = studies.set_value(spec, "world.states[upstream].noise", 0.5)
    assert s.world.states[0].noise[0, 0] == 0.5 and spec.world.states[0].noise[0, 0] == 0.03
    s = studies.set_value(spec, "areas[upstream-view].weight", 3)
    assert s.area("upstream-view").weight == 3.0


@pytest.mark.parametrize("path, words", [
    ("links[probe->nowhere].price", ["no link `probe->nowhere`", "probe->station-view"]),
    ("links[probe->station-view].nosie", ["no settable value `nosie`", "did you mean `noise`", "price, noise"]),
    ("wires[a].price", ["no section `wires`", "links, budgets, areas"]),
    ("links.price", ["cannot read this value path", "SECTION[NAME].FIELD"]),
])
def test_bad_paths_name_the_path_and_the_choices(path, words):
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    with pytest.raises(InputError) as err:
        studies.set_value(spec, path, 0.1)
    text = str(err.value)
    assert text.startswith(path)
    for w in words:
        assert w in text


@pytest.mark.parametrize("spec_file, path, value, words", [
    ("two-senses.yaml", "links[camera-view->fused].noise", 0.0, ["in budget `upward`", "positive definite"]),
    ("two-level.yaml", "links[probe->station-view].price", 0.0, ["no price and is in no budget"]),  # the reader's words
    ("two-level.yaml", "world.states[upstream].dynamics", 1.0, ["spectral radius"]),
    ("two-level.yaml", "budgets[none].total", 1.0, ["has no budget `none`", "no budgets"]),
])
def test_ill_posed_values_are_refused(spec_file, path, value, words):
    spec = load_spec(ROOT / "specs" / spec_file)
    with pytest.raises(InputError) as err:
        studies.set_value(spec, path, value)
    for w in words:
        assert w in str(err.value)


def test_cli_refuses_a_bad_path_before_designing(capsys, tmp_path):
    code = main(["sweep", "specs/single-loop.yaml", "links[estimate->thermometr].price", "--from", "0.1",
                 "--to", "1", "--out", str(tmp_path / "x")])
    err = capsys.readouterr().err
    assert code == 2 and "did you mean `estimate->thermometer`" in err
    assert not list(tmp_path.iterdir())


# -- comparison -------------------------------------------------------------------


def test_richer_architecture_front_never_above_the_poorer_one(tmp_path):
    # The predictive loop contains the flat loop (leave the prediction
    # silent), so at every budget its optimum is at least as good.
    totals = studies.grid(0.05, 5, 5, log=True)
    study = studies.compare([FLAT, PREDICTIVE], totals, FAST, log=True, workers=1, output=tmp_path / "cmp")
    assert study.extra["labels"] == ["flat", "predictive"]
    n = len(totals)
    flat, rich = study.rows[:n], study.rows[n:]
    for f, r in zip(flat, rich):
        assert f["converged"] and r["converged"]
        assert r["budget"] == f["budget"]
        assert r["energy_used"] <= r["budget"] * (1 + 1e-6)
        assert r["weighted_error"] <= f["weighted_error"] * (1 + 1e-5), r["budget"]
    # Here predictions pay above the smallest budget, and the table says so.
    best = study.extra["best"]
    assert any(b["best"] == "predictive" and b["relative_min"] > 1e-3 for b in best)
    assert not any(b["best"] == "flat" for b in best)
    data = json.loads((tmp_path / "cmp.json").read_text())
    assert data["best"] == best and data["kind"] == "compare"


@pytest.mark.parametrize("rich, poor", [("compare-predictive", "compare-flat"), ("compare-deep", "compare-shallow")])
def test_example_pairs_are_valid_and_comparable(rich, poor):
    a, b = (load_spec(ROOT / "specs" / f"{name}.yaml") for name in (rich, poor))
    for spec in (a, b):
        assert studies.varied_budget(spec, spec.name) == "total"
        assert (ROOT / "specs" / f"{Path(spec.path).name}").read_text().startswith("# Compare pair")
    assert studies.spec_digest(studies.set_value(a, "budgets[total].total", 3.7)) != studies.spec_digest(a)
    assert studies.spec_digest(a.world) == studies.spec_digest(b.world)
    assert importlib.import_module("hierarchy.studies.compare")._targets(a) == importlib.import_module("hierarchy.studies.compare")._targets(b)
    if rich == "compare-predictive":  # the same circuit plus top-down predictions
        assert {l.id for l in b.links} < {l.id for l in a.links}
        assert all(l.kind == "prediction" for l in a.links if l.id not in {m.id for m in b.links})


def test_compare_needs_one_budget_to_vary():
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    with pytest.raises(InputError, match="no budget"):
        studies.compare([spec], [1.0])


# -- resume -----------------------------------------------------------------------


def test_resume_after_a_failure_midway_recomputes_nothing(tmp_path, monkeypatch):
    spec = load_spec(ROOT / "specs" / "single-loop.yaml")
    values = studies.grid(1e-3, 0.1, 6, log=True)
    real = studies.runner._design_point
    calls = []

    def failing(*args):
        if len(calls) == 3:
            raise RuntimeError("injected failure after 3 points")
        calls.append(1)
        return real(*args)

    monkeypatch.setattr(studies.runner, "_design_point", failing)
    with pytest.raises(RuntimeError, match="injected"):
        studies.sweep(spec, PRICE, values, FAST, output=tmp_path / "run", workers=1)
    assert len(list((tmp_path / "run.parts").glob("*.json"))) == 3
    assert not (tmp_path / "run.csv").exists()

    calls.clear()
    monkeypatch.setattr(studies.runner, "_design_point", lambda *a: (calls.append(1), real(*a))[1])
    again = studies.sweep(spec, PRICE, values, FAST, output=tmp_path / "run", workers=1)
    monkeypatch.setattr(studies.runner, "_design_point", real)
    whole = studies.sweep(spec, PRICE, values, FAST, output=tmp_path / "whole", workers=1)
    # The three finished points are reused; everything else (the rest of the
    # forward walk, the backward walk, cold designs where the walks disagree)
    # is designed once, exactly as in a fresh run.
    assert (again.reused, again.computed, len(calls)) == (3, whole.computed - 3, whole.computed - 3)
    same_table(table(again), table(whole), rel=0)
    # A changed spec does not reuse stale points.
    other = studies.set_value(spec, "sensors[thermometer].noise", 0.3)
    changed = studies.sweep(other, PRICE, values, FAST, output=tmp_path / "run", workers=1)
    assert changed.reused == 0


def test_ctrl_c_keeps_finished_points_and_a_rerun_resumes(tmp_path):
    out = tmp_path / "run"
    args = ["sweep", "specs/two-level.yaml", "links[upstream-view->station-view].price", "--from", "1e-3",
            "--to", "1", "--points", "8", "--log", "--workers", "1", "--restarts", "2", "--no-plot",
            "--out", str(out)]
    # The command starts with Ctrl-C at its default, as from a terminal. A
    # child inherits an ignored SIGINT, and Python keeps one it was started
    # with; a background job of a non-interactive shell (as a CI runner may
    # start the suite) starts that way, and the sweep then ran to the end.
    proc = subprocess.Popen([sys.executable, "-m", "hierarchy", *args], cwd=ROOT, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    parts = tmp_path / "run.parts"

    def finished():  # not the temporary files of a write in progress
        return [p for p in parts.glob("*.json") if not p.name.startswith(".")] if parts.exists() else []

    deadline = time.time() + 120
    while time.time() < deadline and len(finished()) < 2 and proc.poll() is None:
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    done = len(finished())
    assert proc.returncode == 130, err
    assert 2 <= done < 8, f"the sweep was not interrupted midway:\n{err}"
    assert f"interrupted: {done} of 8 points are finished and kept in" in err
    assert not out.with_suffix(".csv").exists()
    for p in finished():
        json.loads(p.read_text())  # every kept point is whole
    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    study = studies.sweep(spec, "links[upstream-view->station-view].price", studies.grid(1e-3, 1, 8, log=True),
                          Options(restarts=2), log=True, output=out, workers=1)
    # The kept points are reused and every other design is made once: one
    # part file per design, none designed twice.
    assert study.reused == done and study.computed >= 8 - done
    assert study.reused + study.computed == len(finished())


# -- parallel and Dask ----------------------------------------------------------------


def test_dask_cluster_gives_the_same_table_as_local_processes():
    distributed = pytest.importorskip("distributed")
    spec = load_spec(ROOT / "specs" / "single-loop.yaml")
    values = studies.grid(1e-4, 0.1, 6, log=True)
    local = studies.sweep(spec, PRICE, values, FAST, workers=2)
    assert local.chunks == [[0, 2], [3, 5]]
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, protocol="tcp://",
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        remote = studies.sweep(spec, PRICE, values, FAST, workers=2, dask=cluster.scheduler_address)
    assert remote.chunks == local.chunks
    same_table(table(remote), table(local))


# -- phase maps and plots ---------------------------------------------------------------


def test_phase_map_finds_the_scale_law_boundary(tmp_path):
    # docs/model.md's scale law: price x noise decides whether the link is used, so
    # on a log-log grid the silent set depends on price * noise only.
    spec = load_spec(ROOT / "specs" / "single-loop.yaml")
    xs = studies.grid(0.005, 0.5, 3, log=True)
    ys = studies.grid(1e-3, 0.1, 3, log=True)
    study = studies.phase_map(spec, f"links[{PRED}].noise", xs, PRICE, ys, FAST, x_log=True, y_log=True,
                              workers=1, output=tmp_path / "ph")
    silent = {(r[f"links[{PRED}].noise"], r[PRICE]): r[f"links[{PRED}].silent"] for r in study.rows}
    assert not silent[(xs[0], ys[0])] and silent[(xs[-1], ys[-1])]
    for (x1, y1), s1 in silent.items():
        for (x2, y2), s2 in silent.items():
            if abs(np.log(x1 * y1) - np.log(x2 * y2)) < 1e-9:
                assert s1 == s2
    from hierarchy.report import plots

    fig = plots.phase_figure(study, f"links[{PRED}].power")
    gids = {a.get_gid() for ax in fig.axes for a in ax.get_children()}
    assert f"boundary:{PRED}" in gids
    plots.save_study_plot(study, tmp_path / "ph.svg")
    assert (tmp_path / "ph.svg").stat().st_size > 1000


def test_sweep_plot_shades_the_silent_range(price_sweep, tmp_path):
    from hierarchy.report import plots

    study, _ = price_sweep
    fig = plots.sweep_figure(study, [f"links[{PRED}].power", "areas[estimate].error"])
    assert len(fig.axes) == 2  # power and error panels
    r = study.silent_ranges()[PRED][0]
    for ax in fig.axes:
        spans = [p for p in ax.patches if p.get_gid() == f"silent:{PRED}"]
        assert len(spans) == 1
        x0, x1 = spans[0].get_x(), spans[0].get_x() + spans[0].get_width()
        assert r["below"] < x0 <= r["from"] and x1 >= r["to"]
    labels = [t.get_text() for t in fig.axes[0].texts]
    assert f"{PRED} silent" in labels
    for suffix in ("png", "svg", "pdf"):
        path = tmp_path / f"sweep.{suffix}"
        plots.save_study_plot(study, path)
        assert path.stat().st_size > 1000


def test_unconverged_points_are_marked_and_drawn_hollow(tmp_path):
    from hierarchy.report import plots

    spec = load_spec(ROOT / "specs" / "two-level.yaml")
    study = studies.sweep(spec, "links[upstream-view->station-view].price", [0.01, 0.02],
                          Options(restarts=1, max_iter=3, probe_iter=3), workers=1, output=tmp_path / "u")
    assert study.column("converged") == [False, False]
    assert json.loads((tmp_path / "u.json").read_text())["not_converged"] == [0, 1]
    fig = plots.sweep_figure(study, ["objective"])
    hollow = [ln for ln in fig.axes[0].lines if ln.get_markerfacecolor() == "none"]
    assert hollow and len(hollow[0].get_xdata()) == 2
    assert "NOT converged" in fig._suptitle.get_text()


def test_compare_plot_and_cli_end_to_end(tmp_path, capsys):
    (tmp_path / "flat.yaml").write_text(LOOP.format(name="flat", extra=""))
    (tmp_path / "predictive.yaml").write_text(LOOP.format(
        name="predictive", extra="  - {from: estimate, to: thermometer, kind: prediction, noise: 0.005}\n"))
    code = main(["compare", str(tmp_path / "flat.yaml"), str(tmp_path / "predictive.yaml"), "--budgets",
                 "0.1:2:3", "--log", "--workers", "1", "--restarts", "2", "--no-progress",
                 "--out", str(tmp_path / "c"), "--plot", str(tmp_path / "c.png")])
    out = capsys.readouterr().out
    assert code == 0
    assert "best architecture by budget range" in out and "predictive" in out
    assert (tmp_path / "c.png").stat().st_size > 1000
    assert (tmp_path / "c.csv").read_text().startswith("spec,budget,energy_used,status")
