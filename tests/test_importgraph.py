"""`hierarchy import-graph`: a directed area graph becomes a spec skeleton.

The graph files are read here with NetworkX's own readers (and rewritten
with its writers) as the outside reference; the rules (prices from distances,
noises from weights, levels from feedforward chains) are closed forms stated
in docs/spec.md.
"""

from pathlib import Path

import networkx as nx
import numpy as np
import pytest
import yaml

from hierarchy.circuit import Circuit
from hierarchy.cli import main
from hierarchy.spec.importgraph import import_graph, read_area_graph
from hierarchy.spec import load_spec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
GRAPHML = ROOT / "specs" / "graphs" / "two-senses-areas.graphml"
CSV = ROOT / "specs" / "graphs" / "two-senses-areas.csv"
KIND = {"feedforward": "residual", "lateral": "residual", "feedback": "prediction"}


def links_of(text):
    return {(l["from"], l["to"]): l for l in yaml.safe_load(text)["links"]}


def test_graphml_import_follows_the_stated_rules_and_checks(tmp_path, capsys):
    out = tmp_path / "areas.yaml"
    assert main(["import-graph", str(GRAPHML), "-o", str(out)]) == 0
    assert main(["check", str(out)]) == 0
    assert "is valid" in capsys.readouterr().out
    g = nx.read_graphml(GRAPHML)  # NetworkX's reader: the reference reading of the file
    links = links_of(out.read_text())
    assert set(links) == set(g.edges())
    mean_d = np.mean([d["distance"] for *_, d in g.edges(data=True)])
    mean_w = np.mean([d["weight"] for *_, d in g.edges(data=True)])
    for u, v, d in g.edges(data=True):
        link = links[(u, v)]
        assert link["kind"] == KIND[d["kind"]]
        assert link["price"] == pytest.approx(0.05 * d["distance"] / mean_d, rel=1e-12)
        assert link["noise"] == pytest.approx(0.02 * mean_w / d["weight"], rel=1e-12)
    spec = load_spec(out)
    sensors = {n for n, d in g.nodes(data=True) if d.get("role") == "sensor"}
    assert {s.name for s in spec.sensors} == sensors
    for a in spec.areas:
        assert a.level == g.nodes[a.name]["level"]
    # and the circuit the tool builds places every node on the graph's level
    from hierarchy.graph import levels

    assert levels(Circuit(spec).graph) == {n: d["level"] for n, d in g.nodes(data=True)}


def test_csv_and_gml_give_the_same_skeleton_as_graphml(tmp_path):
    ref = yaml.safe_load(import_graph(GRAPHML))
    from_csv = yaml.safe_load(import_graph(CSV))  # no levels or roles: both are inferred
    # GML written by NetworkX's own writer from the GraphML reading
    g = nx.read_graphml(GRAPHML)
    nx.write_gml(g, tmp_path / "areas.gml")
    from_gml = yaml.safe_load(import_graph(tmp_path / "areas.gml"))
    for other in (from_csv, from_gml):
        for key in ("world", "sensors", "areas", "links"):
            assert other[key] == ref[key], key


def test_inferred_levels_are_shortest_feedforward_chains():
    graph = read_area_graph(CSV)
    g = nx.read_edgelist(CSV, delimiter=",", comments="#", create_using=nx.DiGraph,
                         data=[("kind", str), ("distance", str), ("weight", str)])
    g.remove_nodes_from(["source", "target"])  # the header row, read by read_edgelist as an edge
    ff = g.edge_subgraph([(u, v) for u, v, k in g.edges(data="kind") if k == "feedforward"])
    sensors = [n for n in g if g.in_degree(n) == 0 or all(k != "feedforward" for *_, k in g.in_edges(n, "kind"))]
    assert set(graph.sensors) == set(sensors) == {"eye", "skin"}
    dist = nx.multi_source_dijkstra_path_length(ff, set(sensors), weight=lambda u, v, d: 1)
    assert graph.levels == {n: dist[n] for n in g}


def test_unlabelled_edges_take_their_kind_from_levels(tmp_path):
    g = nx.read_graphml(GRAPHML)
    for _, _, d in g.edges(data=True):
        del d["kind"]
    nx.write_graphml(g, tmp_path / "nolabels.graphml")
    links = links_of(import_graph(tmp_path / "nolabels.graphml"))
    ref = links_of(import_graph(GRAPHML))
    assert {e: l["kind"] for e, l in links.items()} == {e: l["kind"] for e, l in ref.items()}


def test_budget_and_no_distances(tmp_path):
    g = nx.read_graphml(GRAPHML)
    for _, _, d in g.edges(data=True):
        del d["distance"], d["weight"]
    nx.write_graphml(g, tmp_path / "plain.graphml")
    text = import_graph(tmp_path / "plain.graphml", price=0, budget=2.0)
    spec = parse_spec(text)
    assert spec.budgets[0].total == 2.0 and set(spec.budgets[0].links) == {l.id for l in spec.links}
    assert all(l.price == 0 and l.noise[0, 0] == pytest.approx(0.02) for l in spec.links)


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.mark.parametrize("name, text, words", [
    ("u.gml", "graph [ node [ id 0 label \"a\" ] node [ id 1 label \"b\" ] edge [ source 0 target 1 ] ]",
     ["undirected"]),
    ("fb.csv", "source,target,kind\neye,V1,feedforward\nV1,eye,feedback\neye,V2,feedback\nV1,V2,feedforward\n",
     ["edge eye->V2", "feedback edge out of the sensor"]),
    ("odd.csv", "source,target,kind\neye,V1,sideways\n", ["edge eye->V1", "`sideways`", "feedforward"]),
    ("nolab.csv", "source,target\neye,V1\n", ["no `kind` label", "level"]),
    ("dot.csv", "source,target,kind\neye,V1.a,feedforward\n", ["node `V1.a`", "rename"]),
    ("loop.csv", "source,target,kind\neye,V1,feedforward\nV1,V1,lateral\n", ["V1->V1", "self-loop"]),
    ("ragged.csv", "source,target,kind\neye,V1\n", ["edge line 2", "header names 3"]),
    ("dist.csv", "source,target,kind,distance\neye,V1,ff,-3\n", ["distance", "above 0"]),
    ("x.dot", "digraph { a -> b }", ["extension `.dot`"]),
])
def test_bad_graphs_stop_with_one_message_and_status_2(tmp_path, capsys, name, text, words):
    path = write(tmp_path, name, text)
    assert main(["import-graph", str(path), "-o", str(tmp_path / "out.yaml")]) == 2
    err = capsys.readouterr().err
    assert err.count("error:") == 1 and "fix:" in err and "Traceback" not in err
    for w in words:
        assert w in err, (w, err)
    assert not (tmp_path / "out.yaml").exists()


def test_an_existing_output_is_kept_without_force(tmp_path, capsys):
    out = write(tmp_path, "mine.yaml", "# my edits\n")
    assert main(["import-graph", str(GRAPHML), "-o", str(out)]) == 2
    assert "--force" in capsys.readouterr().err and out.read_text() == "# my edits\n"
    assert main(["import-graph", str(GRAPHML), "-o", str(out), "--force"]) == 0
    assert parse_spec(out.read_text()).name == "two senses, six areas"


def test_examples_in_the_docstrings_run(monkeypatch):
    import doctest

    import hierarchy.spec.importgraph as module

    monkeypatch.chdir(ROOT)  # the examples read specs/ from the repository root
    assert doctest.testmod(module).failed == 0


def test_labelled_nodes_are_named_by_their_labels_and_the_skeleton_designs(tmp_path):
    from hierarchy.design import Options, design

    g = nx.read_graphml(GRAPHML)
    ids = {n: f"n{i}" for i, n in enumerate(g)}
    h = nx.relabel_nodes(g, ids)  # as a graph editor writes it: ids n0, n1, ... and the names in `label`
    for n, i in ids.items():
        h.nodes[i]["label"] = n
    nx.write_graphml(h, tmp_path / "editor.graphml")
    text = import_graph(tmp_path / "editor.graphml")
    ref = yaml.safe_load(import_graph(GRAPHML))
    assert {k: v for k, v in yaml.safe_load(text).items() if k != "name"} == \
        {k: v for k, v in ref.items() if k != "name"}
    result = design(parse_spec(text), Options(restarts=2, max_iter=1500))
    assert result.status == "converged"


def test_one_level_of_areas_tracks_the_sensors_blocks(tmp_path):
    path = write(tmp_path, "flat.csv", "source,target,kind\neye,A,ff\nA,eye,fb\nskin,A,ff\nskin,B,ff\n")
    spec = parse_spec(import_graph(path))
    assert {a.name: a.tracks for a in spec.areas} == {"A": ("eye-input", "skin-input"), "B": ("skin-input",)}
