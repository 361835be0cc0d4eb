"""Words a reader can trust: levels, what a wrong file is, flat lists that
silently make big sensors, budgeted links, solver counts, `hierarchy
explain`, and value paths that survive a shell."""

import subprocess
import sys
from pathlib import Path

import pytest

from hierarchy.graph import build_graph
from hierarchy.cli import main
from hierarchy.errors import InputError, SpecError
from hierarchy.report.results import EXPLANATIONS, explain_text, scores_text
from hierarchy.spec import parse_spec

ROOT = Path(__file__).resolve().parents[1]

CHAIN = """
spec: 1
world: {{states: {{x: {{dynamics: 0.9, noise: 1.0}}}}}}
sensors: {{eye: {{observes: {{x: identity}}, noise: 0.1}}}}
areas:
  low: {{tracks: x}}
  high: {{tracks: x{high}}}
links:
  - {{from: eye, to: low, kind: residual}}
  - {{from: eye, to: high, kind: residual}}
  - {{from: low, to: high, kind: residual}}
"""


def test_levels_follow_the_shortest_residual_chain_unless_given():
    # Default rule: `high` is reached straight from the sensor, so it sits on level 1 beside `low`.
    g = build_graph(parse_spec(CHAIN.format(high="")))
    assert (g.nodes["eye"]["level"], g.nodes["low"]["level"], g.nodes["high"]["level"]) == (0, 1, 1)
    # Given, the level wins; nothing else changes.
    spec = parse_spec(CHAIN.format(high=", level: 2"))
    assert spec.area("high").level == 2 and spec.area("low").level is None
    assert build_graph(spec).nodes["high"]["level"] == 2


@pytest.mark.parametrize("value, words", [("0", "at least 1"), ("1.5", "whole number"), ("top", "number")])
def test_a_bad_level_is_refused_at_its_place(value, words):
    with pytest.raises(SpecError, match=words) as err:
        parse_spec(CHAIN.format(high=f", level: {value}"))
    assert err.value.place == "areas.high.level"


def test_generated_specs_are_drawn_on_their_generated_levels():
    from hierarchy.spec.generate import generate_spec_text

    # Level-skipping residuals from the probes would put upper areas on level 1 by the default rule.
    spec = parse_spec(generate_spec_text(areas=6, levels=3, density=1.0, seed=0))
    g = build_graph(spec)
    for a in spec.areas:
        assert g.nodes[a.name]["level"] == int(a.name[1]) == a.level


def test_check_prints_the_given_level(tmp_path, capsys):
    path = tmp_path / "chain.yaml"
    path.write_text(CHAIN.format(high=", level: 3"))
    assert main(["check", str(path)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert any(line.startswith("level 1: low ") for line in lines)
    assert any(line.startswith("level 3: high ") for line in lines)


@pytest.mark.parametrize("name, words", [("gallery/two-level.json", "this is a result file"),
                                         ("specs/single-loop.gains.json", "this is a gains file")])
def test_an_output_file_given_as_a_spec_says_what_it_is(capsys, name, words):
    assert main(["design", str(ROOT / name)]) == 2
    err = capsys.readouterr().err
    assert words in err and "not a spec" in err and "fix:" in err and "unknown key" not in err


def test_a_flat_list_that_makes_a_big_sensor_is_warned_about():
    text = """
spec: 1
world: {{states: {{position: {{dim: 2, dynamics: 0.9, noise: 0.1}}}}}}
sensors: {{eye: {{observes: {{position: [0.8, 0.6]}}, noise: 0.1{dim}}}}}
areas: {{v1: {{tracks: position}}}}
links: [{{from: eye, to: v1, kind: residual}}]
"""
    spec = parse_spec(text.format(dim=""))
    assert spec.sensor("eye").dim == 2  # the documented reading: a diagonal
    [warning] = [w for w in spec.warnings if "flat list" in w]
    assert "sensors.eye.observes.position" in warning and "[[0.8, 0.6]]" in warning and "dim: 2" in warning
    assert not [w for w in parse_spec(text.format(dim=", dim: 2")).warnings if "flat list" in w]


def test_budgeted_links_name_their_budget_instead_of_price_0():
    from hierarchy.loop.evaluate import evaluate
    from hierarchy.loop.gains import load_gains
    from hierarchy.spec import load_spec

    spec = load_spec(ROOT / "specs/two-senses.yaml")
    gains = load_gains(ROOT / "specs/two-senses.gains.json", spec)
    text = scores_text(spec, evaluate(spec, gains))
    rows = {line.split()[0]: line for line in text.splitlines() if "->" in line}
    budgeted = {lid for b in spec.budgets for lid in b.links}
    for l in spec.links:
        if l.id in budgeted and l.price == 0:
            assert "budget upward" in rows[l.id]
        else:
            assert "budget" not in rows[l.id]
    assert "hierarchy explain" in text


def test_solver_counts_say_they_are_totals(capsys):
    code = main(["design", str(ROOT / "specs/two-senses.yaml"), "--max-iter", "5", "--restarts", "2"])
    out = capsys.readouterr().out
    assert code in (0, 1)
    solver = next(line for line in out.splitlines() if line.startswith("solver:"))
    assert "(in the run that ended the design); in all " in solver
    import re
    assert re.search(r"in all \d+ iterations over \d+ starts, \d+ evaluations", solver), solver


def test_explain_covers_every_printed_column(capsys):
    from hierarchy.loop.evaluate import evaluate
    from hierarchy.loop.gains import load_gains
    from hierarchy.spec import load_spec

    spec = load_spec(ROOT / "specs/two-level.yaml")
    text = scores_text(spec, evaluate(spec, load_gains(ROOT / "specs/two-level.gains.json", spec)))
    headers = [line for line in text.splitlines() if line.startswith(("area ", "link "))]
    words = {c.lower() for _, c, _ in EXPLANATIONS}
    for header in headers:
        for column in [c for c in header.split("  ") if c.strip()]:
            assert column.strip().lower() in words, column
    assert main(["explain", "noise", "power"]) == 0
    assert "trace of a channel's noise covariance" in capsys.readouterr().out
    assert main(["explain"]) == 0
    everything = capsys.readouterr().out
    assert all(c in everything for _, c, _ in EXPLANATIONS)
    with pytest.raises(InputError, match="did you mean `snr`"):
        explain_text("snrr")


def test_shell_safe_paths_and_a_path_cut_by_the_shell():
    from hierarchy.studies import parse_path
    from hierarchy.spec import load_spec

    spec = load_spec(ROOT / "specs/two-senses.yaml")
    assert parse_path(spec, "links.camera-view:fused.price") == parse_path(spec, "links[camera-view->fused].price")
    assert parse_path(spec, "budgets.upward.total") == parse_path(spec, "budgets[upward].total")
    # What bash leaves of an unquoted links[camera-view->fused].price: it reads `>` as a redirection.
    with pytest.raises(InputError, match="cut at `-`") as err:
        parse_path(spec, "links[camera-view-")
    assert "'links[low->high].price'" in err.value.fix and "links.low:high.price" in err.value.fix


def test_an_unquoted_path_in_a_real_shell_gets_the_hint(tmp_path):
    # The real thing: bash eats `>` and writes a junk file; our message says so.
    spec = ROOT / "specs/single-loop.yaml"
    out = subprocess.run(f"{sys.executable} -m hierarchy sweep {spec} links[estimate->thermometer].price "
                         f"--from 0.01 --to 1 --points 2 --no-progress", shell=True, executable="/bin/bash",
                         capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert out.returncode == 2 and "cut at `-`" in out.stderr and "Traceback" not in out.stderr
    assert [p.name for p in tmp_path.iterdir()] == ["thermometer].price"]  # the shell's, not ours
