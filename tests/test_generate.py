"""Synthetic layered circuits: they load, validate, have the promised shape,
and design at small size."""

import numpy as np
import pytest

from hierarchy.circuit import Circuit
from hierarchy.cli import main
from hierarchy.design import Options, design_budgets, design_prices
from hierarchy.errors import InputError
from hierarchy.spec.generate import generate_spec_text
from hierarchy.spec import load_spec, parse_spec

QUICK = Options(restarts=2, max_iter=400)


def test_same_arguments_same_text_and_seeds_differ():
    text = generate_spec_text(areas=6, levels=3, density=0.5, seed=3)
    assert text == generate_spec_text(areas=6, levels=3, density=0.5, seed=3)
    assert text != generate_spec_text(areas=6, levels=3, density=0.5, seed=4)


@pytest.mark.parametrize("kwargs", [
    dict(areas=1, levels=1, density=0.0, seed=0),
    dict(areas=7, levels=3, density=0.3, seed=1, max_lag=2, relays=0.5),
    dict(areas=5, levels=2, density=1.0, seed=2, area_dim=3, world_dim=4, budgets=True),
    dict(areas=32, levels=16, density=0.175, seed=0),
])
def test_generated_specs_are_valid_and_layered(kwargs):
    spec = parse_spec(generate_spec_text(**kwargs))
    areas, levels = kwargs["areas"], kwargs["levels"]
    assert len(spec.areas) == areas
    assert [b.name for b in spec.world.states] == [f"tier-{k}" for k in range(1, levels + 1)]
    assert spec.world.dim == kwargs.get("world_dim", levels * kwargs.get("area_dim", 2))
    assert not spec.warnings
    # Probes read the bottom tier only, one per bottom-level area.
    assert all(set(s.observes) == {"tier-1"} for s in spec.sensors)
    assert len(spec.sensors) == -(-areas // levels)
    level = {s.name: 0 for s in spec.sensors}
    level.update({a.name: int(a.name[1:].split("-")[0]) for a in spec.areas})
    for a in spec.areas:
        assert a.tracks in ((), (f"tier-{level[a.name]}",))
    # Every pair of neighbouring levels is joined both ways; nothing else is
    # missing a reason: skips go up by two or more, laterals stay on a level.
    ids = {l.id for l in spec.links}
    for l in spec.links:
        gap = level[l.target] - level[l.source]
        if l.kind == "residual":
            assert gap >= 0
            if gap > 0:
                assert f"{l.target}->{l.source}" in ids  # the prediction it subtracts
        else:
            assert gap < 0 and f"{l.target}->{l.source}" in ids
    for lo in level:
        for hi in level:
            if level[hi] == level[lo] + 1:
                assert f"{lo}->{hi}" in ids and f"{hi}->{lo}" in ids
    # Every link is priced with positive-definite noise, or budgeted.
    budgeted = {lid for b in spec.budgets for lid in b.links}
    for l in spec.links:
        assert np.linalg.eigvalsh(l.noise).min() > 0
        assert (l.price > 0) != (l.id in budgeted)
    assert bool(spec.budgets) == kwargs.get("budgets", False)


def test_density_controls_skip_and_lateral_links():
    counts = [len(parse_spec(generate_spec_text(areas=8, levels=4, density=d, seed=0)).links)
              for d in (0.0, 0.5, 1.0)]
    # 2 probes, 2 areas per level: 4 neighbour pairs per level step, 2 links each.
    assert counts[0] == 4 * 4 * 2
    assert counts[0] < counts[1] < counts[2]


def test_every_area_is_reached_from_the_probes():
    spec = parse_spec(generate_spec_text(areas=9, levels=4, density=0.2, seed=5, relays=0.4))
    assert Circuit(spec).warnings == []


@pytest.mark.parametrize("bad, place", [
    (dict(areas=2, levels=3), "--levels"),
    (dict(areas=4, levels=2, density=1.5), "--density"),
    (dict(areas=4, levels=2, world_dim=5), "--world-dim"),
    (dict(areas=4, levels=2, world_dim=8), "--world-dim"),
    (dict(areas=4, levels=2, max_lag=-1), "--max-lag"),
])
def test_unusable_arguments_are_refused(bad, place):
    kwargs = dict(density=0.2, seed=0) | bad
    with pytest.raises(InputError) as err:
        generate_spec_text(**kwargs)
    assert err.value.place == place


def test_cli_writes_a_spec_that_check_accepts(tmp_path, capsys):
    out = tmp_path / "net.yaml"
    assert main(["generate", "--areas", "4", "--levels", "2", "--density", "0.5", "--seed", "1",
                 "--max-lag", "1", "-o", str(out)]) == 0
    assert "4 areas" in capsys.readouterr().out
    assert load_spec(out).areas[0].dim == 2
    assert main(["check", str(out)]) == 0
    # Overwrites atomically; a missing folder is a usage error.
    assert main(["generate", "--areas", "2", "--levels", "1", "-o", str(out)]) == 0
    assert len(load_spec(out).areas) == 2
    assert main(["generate", "--areas", "2", "--levels", "1", "-o", str(tmp_path / "no" / "x.yaml")]) == 2
    assert "folder does not exist" in capsys.readouterr().err


def test_small_generated_circuit_designs_in_price_form():
    spec = parse_spec(generate_spec_text(areas=4, levels=2, density=0.5, seed=0))
    res = design_prices(spec, QUICK)
    assert res.status != "failed"
    # Better than sending nothing: every area then sits at its prior.
    prior = sum(a.weight * a.prior for a in res.scores.areas.values())
    assert res.objective < 0.95 * prior


def test_small_generated_circuit_meets_its_budgets():
    spec = parse_spec(generate_spec_text(areas=4, levels=2, density=0.5, seed=0, budgets=True))
    res = design_budgets(spec, QUICK)
    assert res.status != "failed", res.message
    for b in res.budgets.values():
        assert b.used <= b.total * (1 + 1e-6)
