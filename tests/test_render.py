"""Circuit drawings: files in every format, the visual encoding read back from
the artists (never from pixels), and the `render` / `design --plot` commands."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hierarchy.graph import build_graph
from hierarchy.cli import main
from hierarchy.errors import InputError
from hierarchy.report.drawing import (
    PREDICTION_COLOUR,
    RESIDUAL_COLOUR,
    SILENT_COLOUR,
    draw_circuit,
    result_graph,
    save_circuit,
)
from hierarchy.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = sorted(p.stem for p in (ROOT / "specs").glob("*.yaml"))
MAGIC = {".png": b"\x89PNG\r\n\x1a\n", ".svg": b"<svg", ".pdf": b"%PDF"}


def run(*args):
    """The command as a user runs it (a subprocess, so a traceback would show)."""
    return subprocess.run([sys.executable, "-m", "hierarchy", *map(str, args)],
                          capture_output=True, text=True, cwd=ROOT, timeout=120)


def fake_result(name, powers=None, silent=(), budgets=None):
    """A result dict in the `hierarchy design --json` layout for an example spec,
    with chosen powers (no design run: these tests are about the drawing)."""
    spec = load_spec(ROOT / "specs" / f"{name}.yaml")
    powers = powers or {l.id: 0.1 * (i + 1) for i, l in enumerate(spec.links)}
    budgets = budgets if budgets is not None else {b.name: {"total": b.total, "links": list(b.links)}
                                                   for b in spec.budgets}
    links = {}
    for l in spec.links:
        p = 0.0 if l.id in silent else powers[l.id]
        noise = float(np.trace(l.noise))
        links[l.id] = {
            "kind": l.kind, "power": p, "noise_power": noise, "snr": p / noise if noise else None,
            "bits": 0.5 * np.log2(1 + p / noise) if noise else None, "price": l.price,
            "silent": l.id in silent, "silent_reason": "test" if l.id in silent else None,
            "share_of_budget": {b: p / row["total"] for b, row in budgets.items() if l.id in row["links"]},
        }
    areas = {a.name: {"error": 0.1 if a.has_target else None, "relay": not a.has_target} for a in spec.areas}
    return {"format": "hierarchy-result", "version": 1, "spec": spec.name, "form": "price",
            "status": "converged", "objective": 1.25, "areas": areas, "links": links,
            "budgets": {b: {**row, "used": 0.5, "shadow_price": 0.01, "met": True} for b, row in budgets.items()}}


@pytest.mark.parametrize("ext", [".png", ".svg", ".pdf"])
def test_each_format_is_written_and_non_empty(tmp_path, ext):
    path = tmp_path / f"circuit{ext}"
    save_circuit(fake_result("two-level"), path)
    data = path.read_bytes()
    assert len(data) > 1000
    head = data[:400] if ext == ".svg" else data[:len(MAGIC[ext])]
    assert MAGIC[ext] in head
    assert [p.name for p in tmp_path.iterdir()] == [path.name]  # no temporary file left behind


@pytest.mark.parametrize("name", EXAMPLES)
def test_widths_follow_the_powers_order(name):
    spec = load_spec(ROOT / "specs" / f"{name}.yaml")
    rng = np.random.default_rng(3)
    powers = {l.id: float(p) for l, p in zip(spec.links, rng.permutation(len(spec.links)) * 0.3 + 0.05)}
    fig = draw_circuit(fake_result(name, powers))
    width = {lid: a.get_linewidth() for lid, a in fig.hierarchy_links.items()}
    assert set(width) == set(powers)
    by_power = sorted(powers, key=powers.get)
    widths = [width[lid] for lid in by_power]
    assert all(a < b for a, b in zip(widths, widths[1:])), (by_power, widths)


def test_widths_follow_budget_shares():
    budgets = {"upward": {"total": 2.0, "links": ["camera-view->fused", "pad-view->fused", "fused->camera-view"]}}
    powers = {"camera->camera-view": 5.0, "pad->pad-view": 4.0,  # outside the budget: thinnest
              "camera-view->fused": 0.3, "pad-view->fused": 1.2, "fused->camera-view": 0.5}
    fig = draw_circuit(fake_result("two-senses", powers, budgets=budgets), width_by="share")
    w = {lid: a.get_linewidth() for lid, a in fig.hierarchy_links.items()}
    assert w["pad-view->fused"] > w["fused->camera-view"] > w["camera-view->fused"] > w["camera->camera-view"]
    assert w["camera->camera-view"] == w["pad->pad-view"]
    assert "60% of upward" in fig.hierarchy_labels["pad-view->fused"].get_text()


def test_share_widths_need_budgets():
    with pytest.raises(InputError, match="no budgets"):
        draw_circuit(fake_result("two-level"), width_by="share")


def test_silent_links_are_thin_grey_and_dashed_kinds_differ():
    fig = draw_circuit(fake_result("two-level", silent={"station-view->probe"}))
    arrows = fig.hierarchy_links
    silent = arrows["station-view->probe"]
    offset, dashes = silent.get_linestyle()
    assert len(dashes) == 2  # on, off: dashed
    assert np.allclose(silent.get_edgecolor()[:3], np.array([0x99, 0x99, 0x99]) / 255)
    assert silent.get_linewidth() < min(a.get_linewidth() for lid, a in arrows.items() if a is not silent)
    residual, prediction = arrows["probe->station-view"], arrows["upstream-view->station-view"]
    assert residual.get_linestyle() == "solid"
    assert len(prediction.get_linestyle()[1]) == 4  # dash-dot
    from matplotlib.colors import to_rgb
    assert np.allclose(residual.get_edgecolor()[:3], to_rgb(RESIDUAL_COLOUR))
    assert np.allclose(prediction.get_edgecolor()[:3], to_rgb(PREDICTION_COLOUR))
    assert SILENT_COLOUR not in (RESIDUAL_COLOUR, PREDICTION_COLOUR)
    # Silent links carry no label over the live ones; the legend counts them.
    assert "station-view->probe" not in fig.hierarchy_labels
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert any(t.startswith("silent") and "1 link" in t for t in legend)


def test_pair_bows_apart_and_arrows_end_outside_the_boxes():
    from matplotlib.path import Path

    fig = draw_circuit(fake_result("two-level"))
    fig.canvas.draw()
    arrows, boxes = fig.hierarchy_links, fig.hierarchy_nodes

    def path(lid):  # the drawn curve (shaft and head) in data coordinates
        p = arrows[lid].get_path()
        return p.vertices if p.codes is None else p.vertices[p.codes != Path.CLOSEPOLY]

    up, down = path("probe->station-view"), path("station-view->probe")
    # Both ends share one vertical line, so the two curves must lie on opposite sides of it.
    centre = boxes["probe"].get_x() + boxes["probe"].get_width() / 2
    assert up[:, 0].mean() > centre + 0.05 and down[:, 0].mean() < centre - 0.05
    for lid, arrow in arrows.items():
        tip = path(lid)
        target = boxes[lid.split("->")[1]]
        x0, y0, w, h = target.get_x(), target.get_y(), target.get_width(), target.get_height()
        inside = ((tip[:, 0] > x0 + 0.02) & (tip[:, 0] < x0 + w - 0.02)
                  & (tip[:, 1] > y0 + 0.02) & (tip[:, 1] < y0 + h - 0.02))
        assert not inside.any(), f"{lid} is drawn under its target's box"


def test_labels_title_and_legend():
    fig = draw_circuit(fake_result("two-level"))
    label = fig.hierarchy_labels["probe->station-view"].get_text()
    assert "P 0.1" in label and "SNR 2.5" in label and "bit/step" in label
    title = next(t.get_text() for t in fig.texts if t.get_gid() == "title")
    assert "river gauge, two levels" in title and "converged" in title and "objective 1.25" in title
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert any("residual" in t for t in legend) and any("prediction" in t for t in legend)
    assert any("silent" in t for t in legend)


@pytest.mark.parametrize("name", EXAMPLES)
def test_levels_from_the_result_alone_match_the_spec(name):
    spec = load_spec(ROOT / "specs" / f"{name}.yaml")
    from_spec = {n: d.get("level") for n, d in build_graph(spec).nodes(data=True)}
    from_json = {n: d.get("level") for n, d in result_graph(fake_result(name)).nodes(data=True)}
    assert from_json == from_spec


def test_result_from_another_spec_is_refused():
    with pytest.raises(InputError, match="does not fit the spec"):
        draw_circuit(fake_result("two-level"), spec=load_spec(ROOT / "specs/two-senses.yaml"))


def test_unknown_extension_is_refused(tmp_path):
    result = tmp_path / "r.json"
    result.write_text(json.dumps(fake_result("two-level")))
    keep = tmp_path / "old.jpg"
    keep.write_bytes(b"old picture")
    with pytest.raises(InputError) as err:
        save_circuit(fake_result("two-level"), keep)
    assert str(keep) in str(err.value) and ".png" in err.value.fix
    out = run("render", result, "-o", keep)
    assert out.returncode == 2
    assert "Traceback" not in out.stderr and "old.jpg" in out.stderr and "fix:" in out.stderr
    assert keep.read_bytes() == b"old picture"


@pytest.mark.parametrize("content, words", [("{not json", "not valid JSON"),
                                            ('{"format": "hierarchy-gains"}', "not a hierarchy result"),
                                            ("[1, 2]", "not a hierarchy result")])
def test_bad_result_file_exits_2(tmp_path, capsys, content, words):
    path = tmp_path / "r.json"
    path.write_text(content)
    assert main(["render", str(path)]) == 2
    err = capsys.readouterr().err
    assert words in err and str(path) in err
    assert not (tmp_path / "r.png").exists()


def test_design_then_render_end_to_end(tmp_path):
    result, svg = tmp_path / "two-level.json", tmp_path / "designed.svg"
    out = run("design", "specs/two-level.yaml", "--json", result, "--plot", svg, "--restarts", 1)
    assert out.returncode == 0, out.stderr
    assert b"<svg" in svg.read_bytes()[:400]
    out = run("render", result)  # default output: beside the result, same stem
    assert out.returncode == 0, out.stderr
    assert (tmp_path / "two-level.png").read_bytes().startswith(MAGIC[".png"])
    pdf = tmp_path / "c.pdf"
    assert main(["render", str(result), "-o", str(pdf), "--spec", str(ROOT / "specs/two-level.yaml")]) == 0
    assert pdf.read_bytes().startswith(MAGIC[".pdf"])


def test_check_does_not_import_matplotlib():
    code = ("import sys; from hierarchy.cli import main; import hierarchy.report.drawing; "
            "assert main(['check', 'specs/two-level.yaml']) == 0; "
            "assert 'matplotlib' not in sys.modules, 'matplotlib imported'")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert out.returncode == 0, out.stderr


def test_render_default_output_never_overwrites_its_input(tmp_path):
    # A result saved under a .png name: the default output (same stem, .png)
    # is the input itself, and must be refused before anything is written.
    result = tmp_path / "r.png"
    result.write_text(json.dumps(fake_result("single-loop")))
    before = result.read_bytes()
    out = run("render", result)
    assert out.returncode == 2 and "Traceback" not in out.stderr
    assert "this output would overwrite the input" in out.stderr
    assert result.read_bytes() == before


def test_a_closed_pipe_is_not_an_error():
    # `hierarchy ... | head`: the reader leaves early; exit quietly with 0.
    code = ("import sys, hierarchy.cli as cli\n"
            "def gone(args): raise BrokenPipeError(32, 'Broken pipe')\n"
            "cli.cmd_check = gone\n"
            "sys.exit(cli.main(['check', 'specs/two-level.yaml']))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert out.returncode == 0 and out.stderr == "", out.stderr


# -- large circuits: both views, no text on text ------------------------------------


def synthetic_powers(spec, seed=0, silent_share=0.2):
    """A result dict for any spec with log-uniform powers and some silent links
    (a drawing test: no design is run)."""
    rng = np.random.default_rng(seed)
    links = {}
    for l in spec.links:
        silent = bool(rng.random() < silent_share)
        p = 0.0 if silent else float(10 ** rng.uniform(-3, 0))
        noise = float(np.trace(l.noise))
        links[l.id] = {"kind": l.kind, "power": p, "snr": p / noise, "bits": 0.5 * np.log2(1 + p / noise),
                       "silent": silent, "silent_reason": "test" if silent else None}
    levels = {n: d.get("level") for n, d in build_graph(spec).nodes(data=True)}
    areas = {a.name: {"error": 0.1 if a.has_target else None, "relay": not a.has_target, "level": levels[a.name]}
             for a in spec.areas}
    return {"format": "hierarchy-result", "version": 1, "spec": spec.name, "status": "converged",
            "objective": 1.0, "areas": areas, "links": links, "budgets": {}}


def text_boxes(fig):
    """Window extents of every visible, non-empty text of a drawn figure."""
    from matplotlib.text import Text

    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    # Tick labels beyond an axis's view limits exist but are never drawn.
    hidden = set()
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            lo, hi = sorted(axis.get_view_interval())
            for tick in axis.get_major_ticks() + axis.get_minor_ticks():
                if not lo - 1e-9 * abs(hi - lo) <= tick.get_loc() <= hi + 1e-9 * abs(hi - lo):
                    hidden |= {id(tick.label1), id(tick.label2)}
    out = []
    for t in fig.findobj(Text):
        if t.get_visible() and t.get_text().strip() and id(t) not in hidden:
            box = t.get_window_extent(renderer)
            if box.width > 0 and box.height > 0:
                out.append((t.get_text(), box))
    return out


def outside(fig, boxes):
    """Texts that run off the figure (cut when saved)."""
    w, h = fig.bbox.width, fig.bbox.height
    return [t for t, b in boxes if b.x0 < -0.5 or b.y0 < -0.5 or b.x1 > w + 0.5 or b.y1 > h + 0.5]


def overlapping(boxes):
    """Pairs of texts whose boxes overlap by more than half a pixel."""
    bad = []
    for i, (a, p) in enumerate(boxes):
        for b, q in boxes[i + 1:]:
            if min(p.x1, q.x1) - max(p.x0, q.x0) > 0.5 and min(p.y1, q.y1) - max(p.y0, q.y0) > 0.5:
                bad.append((a, b))
    return bad


@pytest.fixture(scope="module")
def big_circuit():
    from hierarchy.spec.generate import generate_spec_text
    from hierarchy.spec import parse_spec

    spec = parse_spec(generate_spec_text(areas=32, levels=8, density=0.05, seed=2))
    assert len(spec.areas) == 32
    return spec, synthetic_powers(spec)


def test_32_areas_circuit_view_has_no_text_on_text(big_circuit):
    from hierarchy.report.drawing import MAX_LINK_LABELS

    spec, data = big_circuit
    fig = draw_circuit(data)
    boxes = text_boxes(fig)
    assert overlapping(boxes) == [] and outside(fig, boxes) == []
    # Link labels also stay off every box; every live link is labelled or tabled.
    renderer = fig.canvas.get_renderer()
    nodes = [b.get_window_extent(renderer) for b in fig.hierarchy_nodes.values()]
    for lid, label in fig.hierarchy_labels.items():
        box = label.get_window_extent(renderer)
        assert not any(min(box.x1, n.x1) > max(box.x0, n.x0) and min(box.y1, n.y1) > max(box.y0, n.y0)
                       for n in nodes), lid
    live = [lid for lid, row in data["links"].items() if not row["silent"]]
    assert set(fig.hierarchy_labels) | set(fig.hierarchy_table) == set(live)
    assert not set(fig.hierarchy_labels) & set(fig.hierarchy_table)
    assert 0 < len(fig.hierarchy_labels) <= MAX_LINK_LABELS
    # The labelled ones are the strongest that found room: none in the table is
    # stronger than every labelled link.
    power = {lid: data["links"][lid]["power"] for lid in live}
    assert max(power[l] for l in fig.hierarchy_labels) == max(power.values())
    # Areas sit on the levels the generator wrote.
    y = {n: b.get_y() for n, b in fig.hierarchy_nodes.items()}
    for a in spec.areas:
        same = [b.name for b in spec.areas if b.level == a.level]
        assert all(abs(y[a.name] - y[b]) < 1e-9 for b in same)
    low, high = min(spec.areas, key=lambda a: a.level), max(spec.areas, key=lambda a: a.level)
    assert y[high.name] > y[low.name]


def test_32_areas_matrix_view_has_no_text_on_text(big_circuit):
    from hierarchy.report.drawing import draw_matrix

    spec, data = big_circuit
    fig = draw_matrix(data)
    boxes = text_boxes(fig)
    names = {t for t, _ in boxes}
    assert {a.name for a in spec.areas} <= names and {s.name for s in spec.sensors} <= names
    assert len(boxes) > 2 * len(fig.hierarchy_order)  # row and column names, at least
    assert overlapping(boxes) == [] and outside(fig, boxes) == []
    # Rows and columns run by level, sensors first.
    order = fig.hierarchy_order
    level = {n: d["level"] for n, d in build_graph(spec).nodes(data=True)}
    assert [level[n] for n in order] == sorted(level[n] for n in order)
    for lid, (i, j) in fig.hierarchy_cells.items():
        assert (order[i], order[j]) == tuple(lid.split("->"))


def test_the_view_is_chosen_by_size(big_circuit, tmp_path):
    from hierarchy.report.drawing import MAX_DRAWN_AREAS, draw

    _, data = big_circuit
    assert len(data["areas"]) > MAX_DRAWN_AREAS
    assert hasattr(draw(data), "hierarchy_cells")  # auto: the matrix
    assert hasattr(draw(fake_result("two-level")), "hierarchy_labels")  # auto: the drawing
    with pytest.raises(InputError, match="unknown view"):
        draw(data, view="grid")


@pytest.mark.parametrize("name", EXAMPLES)
def test_example_drawings_have_no_text_on_text(name):
    from hierarchy.report.drawing import draw_matrix

    for fig in (draw_circuit(fake_result(name)), draw_matrix(fake_result(name))):
        boxes = text_boxes(fig)
        assert overlapping(boxes) == [] and outside(fig, boxes) == []


def test_the_legend_claims_only_what_was_checked():
    # docs/search.md: "not worth sending" is said only of links tested at the final design.
    data = fake_result("two-level", silent={"station-view->probe", "upstream-view->station-view"})
    for lid in data["links"]:
        if data["links"][lid]["silent"]:
            data["links"][lid]["silent_verdict"] = "not worth sending"
    legend = [t.get_text() for t in draw_circuit(data).legends[0].get_texts()]
    assert "silent (not worth sending): 2 link(s)" in legend
    data["links"]["station-view->probe"]["silent_verdict"] = "untested"
    legend = [t.get_text() for t in draw_circuit(data).legends[0].get_texts()]
    assert "silent (sends nothing): 2 link(s), 1 not tested" in legend


@pytest.mark.parametrize("view", ["circuit", "matrix"])
def test_the_drawing_goes_onto_a_given_axes(view):
    from matplotlib.figure import Figure

    from hierarchy.report.drawing import draw

    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig = Figure(figsize=(6, 5))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    data = fake_result("two-senses")
    assert draw(data, view=view, ax=ax) is ax
    if view == "circuit":
        assert set(ax.hierarchy_links) == set(data["links"])
        assert all(a.axes is ax for a in ax.hierarchy_links.values())
        assert "converged" in ax.get_title()
    else:
        assert set(ax.hierarchy_cells) == set(data["links"])
        assert ax.images and "link powers" in ax.get_title()
    fig.canvas.draw()  # the whole picture renders
    with pytest.raises(InputError, match="Axes"):
        draw_circuit(data, ax="not an axes")
