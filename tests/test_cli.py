"""The command line: real runs on the example specs, exit statuses, outputs."""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from hierarchy.cli import main
from hierarchy.loop.evaluate import evaluate
from hierarchy.loop.gains import load_gains
from hierarchy.loop.simulate import simulate
from hierarchy.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = sorted(p.name[:-len(".gains.json")] for p in (ROOT / "specs").glob("*.gains.json"))


def run(*args):
    """Run the installed command in a subprocess (as a user would)."""
    return subprocess.run([sys.executable, "-m", "hierarchy", *map(str, args)],
                          capture_output=True, text=True, cwd=ROOT, timeout=300)


def test_examples_exist():
    assert {"single-loop", "two-level", "two-senses"} <= set(EXAMPLES)


@pytest.mark.parametrize("name", EXAMPLES)
def test_example_exact_scores_inside_simulated_interval(name):
    spec = load_spec(ROOT / "specs" / f"{name}.yaml")
    gains = load_gains(ROOT / "specs" / f"{name}.gains.json", spec)
    scores = evaluate(spec, gains)
    sim = simulate(spec, gains, steps=60_000, chains=8, seed=1, level=0.99)
    assert sim.objective.contains(scores.objective)
    for area, s in scores.areas.items():
        if s.error is not None:
            assert sim.areas[area]["error"].contains(s.error), area
    for lid, s in scores.links.items():
        assert sim.links[lid]["power"].contains(s.power), lid
    assert sim.objective.relative_half_width < 0.05


def test_check_prints_levels():
    out = run("check", "specs/two-level.yaml")
    assert out.returncode == 0, out.stderr
    assert "level 0: probe" in out.stdout and "level 2: upstream-view" in out.stdout


def test_evaluate_writes_json(tmp_path):
    target = tmp_path / "scores.json"
    out = run("evaluate", "specs/single-loop.yaml", "--gains", "specs/single-loop.gains.json", "--json", target)
    assert out.returncode == 0, out.stderr
    data = json.loads(target.read_text())
    spec = load_spec(ROOT / "specs/single-loop.yaml")
    exact = evaluate(spec, load_gains(ROOT / "specs/single-loop.gains.json", spec))
    assert data["objective"] == pytest.approx(exact.objective, rel=1e-12)
    assert data["areas"]["estimate"]["error"] == pytest.approx(exact.areas["estimate"].error, rel=1e-12)


def test_design_writes_result_and_gains_that_evaluate_back(tmp_path):
    result, gains = tmp_path / "r.json", tmp_path / "g.json"
    out = run("design", "specs/two-level.yaml", "--json", result, "--gains", gains)
    assert out.returncode == 0, out.stderr
    data = json.loads(result.read_text())
    for key in ("objective", "status", "areas", "links", "budgets", "solver"):
        assert key in data
    assert data["status"] == "converged"
    again = run("evaluate", "specs/two-level.yaml", "--gains", gains, "--json", tmp_path / "e.json")
    assert again.returncode == 0, again.stderr
    e = json.loads((tmp_path / "e.json").read_text())
    assert e["objective"] == pytest.approx(data["objective"], rel=1e-9)


def test_budget_design_reports_budgets(tmp_path):
    result = tmp_path / "r.json"
    out = run("design", "specs/two-senses.yaml", "--json", result)
    assert out.returncode == 0, out.stderr
    b = json.loads(result.read_text())["budgets"]["upward"]
    assert b["used"] <= b["total"] * (1 + 1e-6) and b["shadow_price"] > 0 and b["met"]
    assert "shadow price" in out.stdout


@pytest.mark.parametrize("args,place", [
    (["check", "no-such-file.yaml"], "no-such-file.yaml"),
    (["evaluate", "specs/single-loop.yaml"], "gains"),
    (["evaluate", "specs/single-loop.yaml", "--gains", "specs/two-level.gains.json"], "two-level.gains.json"),
    (["simulate", "specs/single-loop.yaml", "--gains", "specs/single-loop.gains.json", "--steps", "5"], "--steps"),
    (["design", "specs/single-loop.yaml", "--json", "/no/such/folder/r.json"], "/no/such/folder/r.json"),
    (["frobnicate"], "invalid choice"),
])
def test_bad_input_exits_2_without_traceback(args, place):
    out = run(*args)
    assert out.returncode == 2
    assert "Traceback" not in out.stderr
    assert place in out.stderr


def test_bad_spec_line_is_named(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("spec: 1\nworld:\n  states:\n    x: {dim: 1, dynamics: 1.2, noise: 0.1}\n"
                   "sensors:\n  s: {observes: {x: 1}}\nareas:\n  a: {tracks: x}\n"
                   "links:\n  - {from: s, to: a, kind: residual}\n")
    out = run("check", bad)
    assert out.returncode == 2 and "Traceback" not in out.stderr
    assert "spectral radius 1.2" in out.stderr


def test_an_output_is_kept_by_a_failed_run_and_replaced_whole_by_a_good_one(tmp_path):
    target, notes = tmp_path / "scores.json", tmp_path / "notes.txt"
    target.write_text("precious")
    notes.write_text("the user's own file beside the output")
    out = run("evaluate", "specs/single-loop.yaml", "--json", target)  # fails: no gains
    assert out.returncode == 2
    assert target.read_text() == "precious"
    # The same command with gains gets to the write: the old file is replaced
    # by the new result as a whole, and nothing else in the folder changes
    # (no temporary file left beside it, the neighbour untouched).
    out = run("evaluate", "specs/single-loop.yaml", "--gains", "specs/single-loop.gains.json",
              "--json", target)
    assert out.returncode == 0, out.stderr
    assert f"wrote {target}" in out.stdout
    spec = load_spec(ROOT / "specs/single-loop.yaml")
    exact = evaluate(spec, load_gains(ROOT / "specs/single-loop.gains.json", spec))
    assert json.loads(target.read_text())["objective"] == pytest.approx(exact.objective, rel=1e-12)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt", "scores.json"]
    assert notes.read_text() == "the user's own file beside the output"


def test_main_returns_status_in_process(capsys):
    assert main(["check", str(ROOT / "specs/single-loop.yaml")]) == 0
    assert "valid" in capsys.readouterr().out


@pytest.mark.parametrize("env,expected", [({}, {1}), ({"OPENBLAS_NUM_THREADS": "2"}, {2})])
def test_numeric_commands_run_blas_on_one_thread_unless_told(env, expected):
    # What the design sees: every BLAS pool on one thread by default, the
    # user's own count when they set one (threadpoolctl reads the pools).
    pytest.importorskip("threadpoolctl")
    code = ("import json, sys, hierarchy.cli as cli\n"
            "from threadpoolctl import threadpool_info\n"
            "def seen(args):\n"
            "    print(json.dumps(sorted({p['num_threads'] for p in threadpool_info() if p['user_api'] == 'blas'})))\n"
            "    return 0\n"
            "cli.cmd_design = seen\n"
            "sys.exit(cli.main(['design', 'specs/single-loop.yaml']))\n")
    clean = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS",
                                                              "MKL_NUM_THREADS", "BLIS_NUM_THREADS")}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=60,
                         env={**clean, **env})
    assert out.returncode == 0, out.stderr
    assert set(json.loads(out.stdout)) == expected
