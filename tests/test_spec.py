"""Tests for hierarchy.spec: parsing, shorthand, defaults, errors and schema."""

from __future__ import annotations

import doctest
import json
import re
import sys
from pathlib import Path

import jsonschema
import numpy as np
import pytest
import yaml

import hierarchy.spec as spec_module
from hierarchy.errors import SpecError
from hierarchy.spec import MAX_DOCUMENT, SCHEMA_PATH, load_spec, parse_spec, spec_schema
from hierarchy.spec import yamlfile
from hierarchy.spec.yamlfile import _read_yaml
from helpers import count_calls
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tools"))
import write_schema  # noqa: E402
from write_schema import main  # noqa: E402

# Line numbers below are relative to this text: links start on line 11.
BASE = """\
spec: 1
world:
  states:
    x: {dim: 2, dynamics: 0.9, noise: 1.0}
    y: {dynamics: 0.5, noise: 0.2}
sensors:
  eye: {observes: {x: identity}, noise: 0.1}
areas:
  v1: {tracks: x}
  v2: {tracks: [x, y]}
"""
LINKS_LINE = 12  # line of the first link item


def with_links(*links: str, budgets: tuple = ()) -> str:
    text = BASE + "links:\n" + "".join(f"  - {link}\n" for link in links)
    if budgets:
        text += "budgets:\n" + "".join(f"  - {b}\n" for b in budgets)
    return text


def fails(text: str, place: str, line: int | None = None,
          match: str | None = None) -> SpecError:
    """Parse ``text``, expect a SpecError at ``place`` (and ``line``)."""
    with pytest.raises(SpecError) as info:
        parse_spec(text)
    err = info.value
    assert err.place == place, str(err)
    if line is not None:
        assert err.line == line, str(err)
    assert err.fix and err.fix.strip(), str(err)
    if match is not None:
        assert re.search(match, err.message), str(err)
    return err


# The example of spec-format.md, verbatim.
FORMAT_EXAMPLE = """\
spec: 1
name: two-level example          # free text
world:
  states:                        # named blocks of the world state, in this order
    slow: {dim: 1, dynamics: 0.98, noise: 0.04}
    fast:
      dim: 2
      dynamics: [[0.7, 0.1], [0.0, 0.7]]
      noise: [0.1, 0.1]
      driven_by: {slow: [[0.3], [0.3]]}   # block A[fast, slow]
sensors:
  skin:
    observes: {fast: identity}   # block C[skin, fast]; blocks not named are zero
    noise: 0.05
areas:
  low:  {dim: 2, tracks: fast, weight: 1.0}
  high: {dim: 1, tracks: slow, weight: 1.0, lag: 0}
  relay: {dim: 2}                # no target: a free relay
links:
  - {from: skin, to: low,  kind: residual,   noise: 0.01, price: 0.1}
  - {from: low,  to: skin, kind: prediction, noise: 0.01, price: 0.1}
  - {from: low,  to: high, kind: residual,   noise: 0.01}
  - {from: high, to: low,  kind: prediction, noise: 0.01, dim: 1}
budgets:
  - {name: total, links: all, total: 2.0}
  - {name: low-out, links: {from: low}, total: 1.0}
"""


# ---------------------------------------------------------------- good specs


def test_format_example_parses():
    spec = parse_spec(FORMAT_EXAMPLE)
    assert spec.name == "two-level example"
    assert spec.version == 1
    assert spec.world.names == ("slow", "fast")
    np.testing.assert_allclose(spec.world.A, [[0.98, 0, 0], [0.3, 0.7, 0.1],
                                              [0.3, 0, 0.7]])
    np.testing.assert_allclose(spec.world.Q, np.diag([0.04, 0.1, 0.1]))
    assert [a.name for a in spec.areas] == ["low", "high", "relay"]
    assert [l.id for l in spec.links] == ["skin->low", "low->skin",
                                          "low->high", "high->low"]
    assert [l.dim for l in spec.links] == [2, 2, 2, 1]
    total, low_out = spec.budgets
    assert total.links == tuple(l.id for l in spec.links)
    assert total.selector == "all"
    assert low_out.links == ("low->skin", "low->high")
    assert low_out.selector == "from low"
    assert spec.warnings == ()


def test_reference_doc_example_parses():
    doc = (Path(__file__).parents[1] / "docs" / "spec.md").read_text()
    example = re.search(r"## A complete file\n\n```yaml\n(.*?)```", doc,
                        re.S).group(1)
    spec = parse_spec(example)
    assert [l.dim for l in spec.links] == [2, 2, 2, 2]
    assert spec.budgets[0].links == ("low->high", "high->low")
    assert spec.warnings == ()


def test_matrices_are_read_only():
    spec = parse_spec(FORMAT_EXAMPLE)
    assert not spec.world.states[1].dynamics.flags.writeable
    assert not spec.sensors[0].noise.flags.writeable
    with pytest.raises(TypeError):
        spec.sensors[0].observes["fast"] = None


def test_order_is_kept_as_written():
    text = """\
spec: 1
world: {states: {zeta: {}, alpha: {}}}
sensors: {s2: {observes: {zeta: 1}}, s1: {observes: {alpha: 1}}}
areas: {b: {tracks: zeta}, a: {tracks: alpha}}
links:
  - {from: s2, to: b, kind: residual}
  - {from: s1, to: a, kind: residual}
"""
    spec = parse_spec(text)
    assert spec.world.names == ("zeta", "alpha")
    assert [s.name for s in spec.sensors] == ["s2", "s1"]
    assert [a.name for a in spec.areas] == ["b", "a"]
    assert [l.id for l in spec.links] == ["s2->b", "s1->a"]


@pytest.mark.parametrize("written, expected", [
    ("0.5", 0.5 * np.eye(2)),
    ("[0.1, 0.2]", np.diag([0.1, 0.2])),
    ("[[0.1, 0.2], [0.0, 0.3]]", [[0.1, 0.2], [0.0, 0.3]]),
    ("identity", np.eye(2)),
    ("zero", np.zeros((2, 2))),
    ("-0.5", -0.5 * np.eye(2)),
    ("5.0e-1", 0.5 * np.eye(2)),
    ("5e-1", 0.5 * np.eye(2)),  # YAML 1.1 would read this as text
])
def test_matrix_shorthand_expands(written, expected):
    text = BASE.replace("v1: {tracks: x}",
                        f"v1: {{tracks: x, pin: {{M: {written}}}}}")
    np.testing.assert_allclose(parse_spec(text).area("v1").pin["M"], expected)


def test_defaults():
    spec = parse_spec(with_links(
        "{from: eye, to: v1, kind: residual}",
        "{from: v1, to: eye, kind: prediction}",
        "{from: v2, to: v1, kind: prediction}",
        "{from: v1, to: v2, kind: residual}",
    ))
    assert spec.name == "unnamed"
    assert [l.dim for l in spec.links] == [2, 2, 2, 2]
    v1, v2 = spec.areas
    assert (v1.dim, v1.weight, v1.lag, v1.activity_price) == (2, 1.0, 0, 0.0)
    assert v2.dim == 3 and v2.tracks == ("x", "y")
    link = spec.links[0]
    assert link.price == 0.0 and link.pin == {}
    np.testing.assert_array_equal(link.noise, np.zeros((2, 2)))
    assert spec.budgets == ()


def test_link_dim_defaults_follow_signal_sizes():
    text = BASE.replace("v2: {tracks: [x, y]}", "v2: {tracks: y, dim: 4}")
    spec = parse_spec(text + """\
links:
  - {from: v2, to: v1, kind: prediction}
  - {from: v2, to: eye, kind: prediction}
  - {from: eye, to: v2, kind: residual}
  - {from: v1, to: v2, kind: residual}
""")
    # prediction: the receiver's size; residual: the sender's size
    assert [l.dim for l in spec.links] == [2, 2, 2, 2]
    assert spec.link("v1->v2").dim == 2 and spec.area("v2").dim == 4


def test_relay_area_defaults():
    spec = parse_spec(BASE + "  r: {dim: 3}\n")
    relay = spec.area("r")
    assert (relay.dim, relay.tracks, relay.weight, relay.lag) == (3, (), 0.0, 0)
    assert not relay.has_target


def test_state_dim_is_inferred():
    text = BASE.replace("y: {dynamics: 0.5, noise: 0.2}",
                        "y: {dynamics: [0.5, 0.4, 0.3]}\n"
                        "    z: {noise: [[1, 0], [0, 1]]}\n"
                        "    w: {dynamics: 0.1}")
    dims = {b.name: b.dim for b in parse_spec(text).world.states}
    assert dims == {"x": 2, "y": 3, "z": 2, "w": 1}


def test_sensor_dim_is_inferred():
    text = BASE.replace(
        "eye: {observes: {x: identity}, noise: 0.1}",
        "eye: {observes: {x: identity}, noise: 0.1}\n"
        "  ear: {observes: {y: zero, x: [[1, 0]]}}\n"
        "  nose: {observes: {y: 2}}")
    spec = parse_spec(text)
    assert [s.dim for s in spec.sensors] == [2, 1, 1]
    np.testing.assert_array_equal(spec.sensor("ear").C(spec.world),
                                  [[1, 0, 0]])
    np.testing.assert_array_equal(spec.sensor("nose").C(spec.world),
                                  [[0, 0, 2]])


def test_pins_are_read():
    spec = parse_spec(with_links(
        "{from: eye, to: v1, kind: residual, pin: {S: identity, P: 1, K: 0.5}}",
        "{from: v1, to: eye, kind: prediction, pin: {G: [[1, 0], [0, 1]]}}",
    ))
    residual, prediction = spec.links
    assert set(residual.pin) == {"S", "P", "K"}
    np.testing.assert_array_equal(residual.pin["K"], 0.5 * np.eye(2))
    np.testing.assert_array_equal(prediction.pin["G"], np.eye(2))


def test_fully_pinned_noisy_link_needs_no_cost():
    spec = parse_spec(with_links(
        "{from: eye, to: v1, kind: residual, noise: 0.1, pin: {S: 1}}"))
    assert spec.links[0].noise[0, 0] == 0.1


def test_merge_keys_work():
    text = BASE.replace("v1: {tracks: x}",
                        "v1: &base {tracks: x, lag: 1}\n  v3:\n"
                        "    <<: *base\n    lag: 2")
    spec = parse_spec(text)
    assert spec.area("v1").lag == 1 and spec.area("v3").lag == 2


def test_load_spec_names_the_spec_after_the_file(tmp_path):
    path = tmp_path / "my-circuit.yaml"
    path.write_text(BASE)
    spec = load_spec(path)
    assert spec.name == "my-circuit"
    assert spec.path == str(path)


# ---------------------------------------------------------------- warnings


def test_warns_about_a_dead_prediction():
    spec = parse_spec(with_links("{from: v1, to: eye, kind: prediction}"))
    assert len(spec.warnings) == 1
    assert "links[0] (v1->eye)" in spec.warnings[0]
    assert "never used" in spec.warnings[0]


def test_warns_about_an_all_zero_pinned_gain():
    spec = parse_spec(with_links("{from: eye, to: v1, kind: residual, "
                                 "pin: {K: zero}}"))
    assert spec.warnings == ("links[0] (eye->v1).pin.K: the pinned gain is all "
                             "zeros, so nothing passes through this link",)


# ---------------------------------------------------------------- files and YAML


def test_missing_file(tmp_path):
    path = tmp_path / "nope.yaml"
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert info.value.place == str(path)
    assert "does not exist" in info.value.message and info.value.fix


def test_folder_instead_of_file(tmp_path):
    with pytest.raises(SpecError) as info:
        load_spec(tmp_path)
    assert info.value.place == str(tmp_path) and info.value.fix


def test_file_that_is_not_utf8(tmp_path):
    path = tmp_path / "latin.yaml"
    path.write_bytes(b"name: caf\xe9\n")
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert "UTF-8" in info.value.message and info.value.fix


def test_file_too_large(tmp_path):
    path = tmp_path / "huge.yaml"
    path.write_bytes(b" " * (MAX_DOCUMENT + 1))
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert "too large" in info.value.message and info.value.fix


def test_text_too_large():
    fails(" " * (MAX_DOCUMENT + 1), "<spec text>", match="too large")


@pytest.mark.parametrize("text", ["", "# only a comment\n", "---\n"])
def test_empty_document(text):
    fails(text, "<spec text>", match="empty")


@pytest.mark.parametrize("text", ["- 1\n- 2\n", "just words\n", "42\n"])
def test_top_level_must_be_a_mapping(text):
    fails(text, "<spec text>", line=1, match="top level must be a mapping")


def test_yaml_syntax_error_reports_line_and_column():
    err = fails("spec: 1\nworld:\n  states: {x: [1, 2}\n", "<spec text>",
                line=3, match="not valid YAML")
    assert "column" in err.message


def test_yaml_error_names_the_path(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text("spec: 1\n\tworld: 2\n")
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert info.value.place == str(path) and info.value.line == 2


def test_two_documents_are_refused():
    fails("spec: 1\n---\nspec: 1\n", "<spec text>", line=2,
          match="single document")


def test_python_tags_are_refused():
    fails(BASE + "name: !!python/object/apply:os.system [echo]\n",
          "<spec text>", line=11, match="constructor for the tag")


def test_duplicate_key_at_top():
    err = fails(BASE + "spec: 1\n", "spec", line=11, match="written twice")
    assert "line 1" in err.message


def test_duplicate_key_nested():
    text = BASE.replace("v1: {tracks: x}", "v1:\n    tracks: x\n    lag: 0\n"
                                           "    lag: 1")
    fails(text, "areas.v1.lag", line=12, match="written twice")


def test_duplicate_key_in_a_link():
    fails(with_links("{from: eye, to: v1, kind: residual, kind: residual}"),
          "links[0].kind", line=LINKS_LINE, match="written twice")


def test_alias_bomb_is_refused_quickly():
    lines = ['spec: 1', 'a0: &a0 ["lol", "lol", "lol", "lol", "lol", "lol", '
                        '"lol", "lol", "lol", "lol"]']
    for i in range(1, 10):
        refs = ", ".join([f"*a{i - 1}"] * 10)
        lines.append(f"a{i}: &a{i} [{refs}]")
    # Work counted, not timed: one visit per alias edge of the file, and the
    # expanded tree is never built.
    with count_calls((yamlfile, "size"), (yaml.composer, "compose_node"),
                     (yaml.constructor, "construct_document")) as calls:
        err = fails("\n".join(lines) + "\n", "a5", match="too large")
    assert err.line == 7
    assert 0 < calls["size"] <= calls["compose_node"] < 200
    assert calls["construct_document"] == 0


def test_self_referencing_alias_is_refused():
    fails("spec: 1\nworld: &w {states: *w}\n", "world.states", line=2,
          match="alias refers to a node that contains it")


def test_deep_nesting_is_refused():
    with pytest.raises(SpecError):
        parse_spec("spec: " + "[" * 20000 + "]" * 20000 + "\n")


def test_key_with_no_value():
    fails(BASE + "links:\n", "links", line=11, match="has no value")


def test_list_as_key_is_refused():
    fails("spec: 1\n? [a, b]\n: 1\n", "top level", line=2,
          match="plain word")


# ---------------------------------------------------------------- top level


def test_missing_version():
    err = fails(BASE.replace("spec: 1\n", ""), "spec", match="missing")
    assert "spec: 1" in err.fix


@pytest.mark.parametrize("value, words", [
    ("2", "version 2"), ("'1'", "text '1'"), ("true", "boolean")])
def test_wrong_version(value, words):
    err = fails(BASE.replace("spec: 1", f"spec: {value}"), "spec", line=1)
    assert words in err.message
    assert "spec: 1" in err.fix


def test_unknown_top_level_key_suggests_nearest():
    err = fails(BASE + "budget: []\n", "budget", line=11,
                match="unknown key `budget`")
    assert "`budgets`" in err.fix


def test_unknown_nested_key_suggests_nearest():
    err = fails(BASE.replace("noise: 0.1}", "nosie: 0.1}"),
                "sensors.eye.nosie", line=7, match="unknown key")
    assert "did you mean `noise`" in err.fix


def test_unknown_key_in_a_link_names_the_link():
    err = fails(with_links("{from: eye, to: v1, kind: residual, prize: 1}"),
                "links[0] (eye->v1).prize", line=LINKS_LINE)
    assert "`price`" in err.fix


def test_world_is_required():
    fails("spec: 1\nsensors: {}\n", "world", line=1, match="missing")


@pytest.mark.parametrize("section", ["sensors", "areas"])
def test_a_circuit_needs_a_sensor_and_an_area(section):
    text = re.sub(rf"{section}:\n(  .*\n)+", "", BASE)
    fails(text, section, match="missing")
    fails(text + f"{section}: {{}}\n", section, match="at least one")


def test_name_must_be_text():
    fails(BASE + "name: 12\n", "name", line=11, match="expected some text")


# ---------------------------------------------------------------- numbers and matrices


@pytest.mark.parametrize("value, where, words", [
    ("true", "", "boolean"),
    ("yes", "", "boolean"),
    (".nan", "", "finite"),
    ("-.inf", "", "finite"),
    ("'0.5'", "", "text, not a number"),
    ("hello", "", "expected a matrix"),
    ("{a: 1}", "", "mapping"),
    ("[]", "", "empty list"),
    ("[1, [2]]", "", "mixes numbers and lists"),
    # a bad row or entry is named precisely
    ("[[1, 0], [0]]", "[1]", "different lengths"),
    ("[[1, 0], [0, true]]", "[1][1]", "boolean"),
    ("[0.5, '1']", "[1]", "text, not a number"),
])
def test_bad_matrix_values(value, where, words):
    text = BASE.replace("x: {dim: 2, dynamics: 0.9,",
                        f"x: {{dim: 2, dynamics: {value},")
    err = fails(text, "world.states.x.dynamics" + where, line=4)
    assert words in err.message


def test_quoted_number_says_remove_quotes():
    err = fails(BASE.replace("noise: 0.1}", "noise: '0.5'}"),
                "sensors.eye.noise", line=7)
    assert "quotes" in err.message and "remove the quotes" in err.fix


def test_full_matrix_of_wrong_shape():
    err = fails(BASE.replace("dynamics: 0.9", "dynamics: [[0.9, 0, 0]]"),
                "world.states.x.dynamics", line=4)
    assert "expected a 2 x 2 matrix" in err.message
    assert "got 1 x 3" in err.message


def test_flat_list_in_a_non_square_place():
    err = fails(BASE.replace("{x: identity}, noise: 0.1",
                             "{x: [1, 1]}, dim: 1"),
                "sensors.eye.observes.x", line=7, match="diagonal")
    assert "list of lists" in err.fix


def test_identity_in_a_non_square_place():
    err = fails(BASE.replace("{x: identity}, noise: 0.1",
                             "{x: identity}, dim: 1"),
                "sensors.eye.observes.x", line=7, match="square")
    assert "1 x 2" in err.message


def test_diagonal_of_wrong_length():
    fails(BASE.replace("noise: 1.0", "noise: [1, 2, 3]"),
          "world.states.x.noise", line=4, match="diagonal of 3 numbers")


def test_covariance_must_be_symmetric():
    fails(BASE.replace("noise: 1.0", "noise: [[1, 0.5], [0.4, 1]]"),
          "world.states.x.noise", line=4, match="symmetric")


def test_covariance_must_be_psd():
    fails(BASE.replace("noise: 0.1}", "noise: [[1, 2], [2, 1]]}"),
          "sensors.eye.noise", line=7, match="positive semidefinite")


def test_covariance_tolerates_rounding():
    text = BASE.replace("noise: 1.0", "noise: [[1, 1], [1, 1.0000000000001]]")
    assert parse_spec(text).world.states[0].noise[0, 1] == 1


# ---------------------------------------------------------------- world


def test_unstable_world_is_refused():
    err = fails(BASE.replace("dynamics: 0.5", "dynamics: 1.02"), "world",
                line=2)
    assert "spectral radius 1.02" in err.message
    assert "< 1" in err.message


def test_driven_blocks_count_for_stability():
    text = BASE.replace(
        "y: {dynamics: 0.5, noise: 0.2}",
        "y: {dynamics: 0.9, noise: 0.2, driven_by: {x: [[0, 5]]}}")
    text = text.replace("dynamics: 0.9, noise: 1.0",
                        "dynamics: 0.9, noise: 1.0, driven_by: {y: [[0], [1]]}")
    fails(text, "world", line=2, match="spectral radius")


def test_driven_by_unknown_state():
    err = fails(BASE.replace("noise: 0.2}", "noise: 0.2, driven_by: {xx: 1}}"),
                "world.states.y.driven_by.xx", line=5, match="no state")
    assert "`x`" in err.fix


def test_driven_by_itself():
    fails(BASE.replace("noise: 0.2}", "noise: 0.2, driven_by: {y: 1}}"),
          "world.states.y.driven_by.y", line=5, match="itself")


def test_driven_by_block_shape():
    err = fails(BASE.replace("noise: 0.2}", "noise: 0.2, driven_by: {x: [[1]]}}"),
                "world.states.y.driven_by.x", line=5)
    assert "1 x 2" in err.message


@pytest.mark.parametrize("value, words", [
    ("0", "at least 1"), ("1.5", "whole number"), ("'2'", "text")])
def test_bad_state_dim(value, words):
    err = fails(BASE.replace("x: {dim: 2,", f"x: {{dim: {value},"),
                "world.states.x.dim", line=4)
    assert words in err.message


def test_world_needs_states():
    fails(BASE.replace("  states:\n    x: {dim: 2, dynamics: 0.9, noise: 1.0}\n"
                       "    y: {dynamics: 0.5, noise: 0.2}\n",
                       "  states: {}\n"),
          "world.states", line=3, match="at least one state")


# ---------------------------------------------------------------- sensors


def test_sensor_observes_unknown_state():
    err = fails(BASE.replace("{x: identity}", "{xs: identity}"),
                "sensors.eye.observes.xs", line=7, match="no state")
    assert "`x`" in err.fix


def test_sensor_needs_observes():
    fails(BASE.replace("observes: {x: identity}, ", ""), "sensors.eye.observes",
          line=7, match="missing")
    fails(BASE.replace("{x: identity}", "{}"), "sensors.eye.observes", line=7,
          match="at least one")


def test_sensor_blocks_must_agree_on_size():
    err = fails(BASE.replace("{x: identity}", "{x: identity, y: [[1], [1], [1]]}"),
                "sensors.eye.observes.y", line=7)
    assert "expected a 2 x 1 matrix" in err.message and "3 x 1" in err.message


def test_sensor_size_cannot_be_guessed():
    fails(BASE.replace("{x: identity}, noise: 0.1", "{x: zero}"),
          "sensors.eye", line=7, match="cannot tell the size")


# ---------------------------------------------------------------- areas and names


def test_area_tracks_unknown_state():
    err = fails(BASE.replace("tracks: [x, y]", "tracks: [x, yy]"),
                "areas.v2.tracks[1]", line=10, match="no state")
    assert "`y`" in err.fix


def test_area_tracks_a_state_twice():
    fails(BASE.replace("tracks: [x, y]", "tracks: [x, x]"),
          "areas.v2.tracks[1]", line=10, match="twice")


def test_area_dim_below_tracked_size():
    err = fails(BASE.replace("{tracks: [x, y]}", "{tracks: [x, y], dim: 2}"),
                "areas.v2.dim", line=10, match="at least 3")
    assert "dim: 3" in err.fix


def test_relay_needs_a_dim():
    fails(BASE + "  r: {lag: 0}\n", "areas.r", line=11, match="size must be given")


def test_relay_cannot_have_a_weight():
    fails(BASE + "  r: {dim: 1, weight: 0.5}\n", "areas.r.weight", line=11,
          match="no error to weigh")


def test_relay_may_have_zero_weight():
    assert parse_spec(BASE + "  r: {dim: 1, weight: 0}\n").area("r").weight == 0


def test_relay_cannot_have_a_lag():
    fails(BASE + "  r: {dim: 1, lag: 2}\n", "areas.r.lag", line=11)


@pytest.mark.parametrize("key, value, words", [
    ("lag", "-1", "at least 0"),
    ("lag", "51", "too large"),
    ("weight", "-0.1", "at least 0"),
    ("activity_price", "-1", "at least 0"),
    ("weight", ".inf", "finite"),
])
def test_bad_area_numbers(key, value, words):
    err = fails(BASE.replace("v1: {tracks: x}", f"v1: {{tracks: x, {key}: {value}}}"),
                f"areas.v1.{key}", line=9)
    assert words in err.message


def test_area_pin_shape():
    fails(BASE.replace("v1: {tracks: x}", "v1: {tracks: x, pin: {M: [[1, 0, 0]]}}"),
          "areas.v1.pin.M", line=9, match="expected a 2 x 2 matrix")


def test_area_pin_unknown_gain():
    err = fails(BASE.replace("v1: {tracks: x}", "v1: {tracks: x, pin: {N: 1}}"),
                "areas.v1.pin.N", line=9, match="unknown key")
    assert "M" in err.fix


def test_sensor_and_area_share_names():
    fails(BASE + "  eye: {dim: 1}\n", "areas.eye", line=11,
          match="already the name of a sensor")


@pytest.mark.parametrize("name, place, words", [
    ("'a.b'", "areas.a.b", "'.'"),
    ("'a[1]'", "areas.a[1]", "'['"),
    ("'a->b'", "areas.a->b", "'->'"),
    ("'  '", "areas.  ", "empty"),
    ("yes", "areas.True", "boolean"),
    ("7", "areas.7", "number"),
])
def test_bad_node_names(name, place, words):
    err = fails(BASE + f"  {name}: {{dim: 1}}\n", place, line=11)
    assert words in err.message


# ---------------------------------------------------------------- links


def test_link_to_unknown_node():
    err = fails(with_links("{from: eye, to: v3, kind: residual}"),
                "links[0] (eye->v3).to", line=LINKS_LINE, match="no sensor or area")
    assert "v1, v2" in err.fix  # no close match: all names are listed


def test_link_kind_must_be_known():
    err = fails(with_links("{from: eye, to: v1, kind: residul}"),
                "links[0] (eye->v1).kind", line=LINKS_LINE)
    assert "`residual`" in err.fix


def test_link_needs_from_to_kind():
    fails(with_links("{from: eye, to: v1}"), "links[0] (eye->v1).kind",
          line=LINKS_LINE, match="missing")
    fails(with_links("{to: v1, kind: residual}"), "links[0].from",
          line=LINKS_LINE, match="missing")


def test_prediction_out_of_a_sensor():
    err = fails(with_links("{from: eye, to: v1, kind: prediction}"),
                "links[0] (eye->v1).from", line=LINKS_LINE, match="sensor")
    assert "residual" in err.fix


def test_residual_into_a_sensor():
    err = fails(with_links("{from: v1, to: eye, kind: residual}"),
                "links[0] (v1->eye).to", line=LINKS_LINE, match="sensor")
    assert "prediction" in err.fix


def test_link_to_itself():
    fails(with_links("{from: v1, to: v1, kind: prediction}"),
          "links[0] (v1->v1).to", line=LINKS_LINE, match="itself")


def test_duplicate_link_id():
    fails(with_links("{from: eye, to: v1, kind: residual}",
                     "{from: v2, to: v1, kind: residual}",
                     "{from: eye, to: v1, kind: residual, dim: 1}"),
          "links[2] (eye->v1)", line=LINKS_LINE + 2, match="already a link")


def test_prediction_and_residual_on_one_pair_is_a_duplicate():
    err = fails(with_links("{from: v1, to: v2, kind: prediction}",
                           "{from: v1, to: v2, kind: residual}"),
                "links[1] (v1->v2)", line=LINKS_LINE + 1)
    assert "links[0]" in err.message


def test_link_place_uses_index_and_id():
    fails(with_links("{from: eye, to: v1, kind: residual}",
                     "{from: v2, to: v1, kind: residual, noise: [[1, 2]]}"),
          "links[1] (v2->v1).noise", line=LINKS_LINE + 1,
          match="expected a 3 x 3 matrix")


def test_links_must_be_a_list():
    fails(BASE + "links: {from: eye}\n", "links", line=11,
          match="expected a list")


def test_negative_price():
    fails(with_links("{from: eye, to: v1, kind: residual, noise: 1, price: -1}"),
          "links[0] (eye->v1).price", line=LINKS_LINE, match="at least 0")


def test_pin_P_needs_a_paired_prediction():
    err = fails(with_links("{from: eye, to: v1, kind: residual, pin: {P: 1}}"),
                "links[0] (eye->v1).pin.P", line=LINKS_LINE,
                match="no prediction link v1->eye")
    assert "remove P" in err.fix


def test_pin_K_on_a_prediction_into_a_sensor():
    fails(with_links("{from: v1, to: eye, kind: prediction, pin: {K: 1}}",
                     "{from: eye, to: v1, kind: residual}"),
          "links[0] (v1->eye).pin.K", line=LINKS_LINE, match="sensor")


def test_pin_of_the_other_kind_of_link():
    err = fails(with_links("{from: v1, to: v2, kind: prediction, pin: {S: 1}}"),
                "links[0] (v1->v2).pin.S", line=LINKS_LINE, match="no gain S")
    assert "G, K" in err.fix


def test_pin_shapes_follow_the_link():
    err = fails(with_links("{from: v2, to: v1, kind: residual, dim: 1, "
                           "pin: {S: [[1, 0]]}}"),
                "links[0] (v2->v1).pin.S", line=LINKS_LINE)
    assert "expected a 1 x 3 matrix" in err.message


# ---------------------------------------------------------------- well-posedness


def test_priced_link_needs_noise():
    err = fails(with_links("{from: eye, to: v1, kind: residual, price: 0.1}"),
                "links[0] (eye->v1).noise", line=LINKS_LINE,
                match="not positive definite")
    assert "noise" in err.fix
    assert "energy is free" in err.message


def test_budgeted_link_needs_positive_definite_noise():
    fails(with_links("{from: eye, to: v1, kind: residual, noise: [1, 0]}",
                     budgets=("{name: b, links: all, total: 1}",)),
          "links[0] (eye->v1).noise", line=LINKS_LINE, match="budget `b`")


def test_noisy_link_needs_a_price_or_budget():
    err = fails(with_links("{from: eye, to: v1, kind: residual, noise: 0.1}"),
                "links[0] (eye->v1)", line=LINKS_LINE, match="no price")
    assert "price" in err.fix and "budget" in err.fix


def test_noisy_residual_with_a_pair_needs_P_pinned_too():
    fails(with_links("{from: eye, to: v1, kind: residual, noise: 0.1, pin: {S: 1}}",
                     "{from: v1, to: eye, kind: prediction}"),
          "links[0] (eye->v1)", line=LINKS_LINE, match="no price")


def test_noisy_prediction_with_G_pinned_needs_no_cost():
    spec = parse_spec(with_links("{from: v2, to: v1, kind: prediction, "
                                 "noise: 0.1, pin: {G: [[1, 0, 0], [0, 1, 0]]}}"))
    assert spec.links[0].pin["G"].shape == (2, 3)
    assert spec.warnings == ()


# ---------------------------------------------------------------- budgets


NOISY = "{from: eye, to: v1, kind: residual, noise: 0.1}"


def test_budget_selectors():
    spec = parse_spec(with_links(
        NOISY, "{from: v1, to: v2, kind: residual, noise: 0.1}",
        budgets=("{name: a, links: all, total: 1}",
                 "{name: b, links: [v1->v2], total: 1}",
                 "{name: c, links: {to: v1}, total: 1}",
                 "{name: d, links: {from: v1}, total: 0}")))
    assert [(b.name, b.links, b.selector) for b in spec.budgets] == [
        ("a", ("eye->v1", "v1->v2"), "all"),
        ("b", ("v1->v2",), "v1->v2"),
        ("c", ("eye->v1",), "to v1"),
        ("d", ("v1->v2",), "from v1"),
    ]


def test_budget_unknown_link_id():
    err = fails(with_links(NOISY, budgets=("{name: b, links: [eye->v2], total: 1}",)),
                "budgets[0].links[0]", line=LINKS_LINE + 2, match="no link")
    assert "`eye->v1`" in err.fix


def test_budget_selecting_no_links():
    fails(with_links(NOISY, budgets=("{name: b, links: {from: v2}, total: 1}",)),
          "budgets[0].links", line=LINKS_LINE + 2, match="selects no links")


def test_budget_all_without_links():
    fails(BASE + "budgets:\n  - {name: b, links: all, total: 1}\n",
          "budgets[0].links", line=12, match="selects no links")


def test_budget_unknown_node():
    err = fails(with_links(NOISY, budgets=("{name: b, links: {to: v0}, total: 1}",)),
                "budgets[0].links.to", line=LINKS_LINE + 2, match="no sensor or area")
    assert "v1" in err.fix


def test_budget_with_both_ends():
    fails(with_links(NOISY, budgets=("{name: b, links: {from: eye, to: v1}, "
                                     "total: 1}",)),
          "budgets[0].links", line=LINKS_LINE + 2, match="exactly one")


def test_budget_with_a_bare_id():
    err = fails(with_links(NOISY, budgets=("{name: b, links: eye->v1, total: 1}",)),
                "budgets[0].links", line=LINKS_LINE + 2)
    assert "[A->B]" in err.fix


def test_budget_duplicate_names():
    fails(with_links(NOISY, budgets=("{name: b, links: all, total: 1}",
                                     "{name: b, links: all, total: 2}")),
          "budgets[1].name", line=LINKS_LINE + 3, match="already a budget")


def test_budget_negative_total():
    fails(with_links(NOISY, budgets=("{name: b, links: all, total: -2}",)),
          "budgets[0].total", line=LINKS_LINE + 2, match="at least 0")


def test_budget_needs_name_and_total():
    fails(with_links(NOISY, budgets=("{links: all, total: 1}",)),
          "budgets[0].name", line=LINKS_LINE + 2, match="missing")
    fails(with_links(NOISY, budgets=("{name: b, links: all}",)),
          "budgets[0].total", line=LINKS_LINE + 2, match="missing")


def test_budget_lists_a_link_twice():
    fails(with_links(NOISY, budgets=("{name: b, links: [eye->v1, eye->v1], "
                                     "total: 1}",)),
          "budgets[0].links[1]", line=LINKS_LINE + 2, match="twice")


# ---------------------------------------------------------------- size guard


def test_single_dim_too_large():
    fails(BASE.replace("x: {dim: 2,", "x: {dim: 5001,"), "world.states.x.dim",
          line=4, match="too large")


def test_world_too_large_in_total():
    fails(BASE.replace("x: {dim: 2,", "x: {dim: 5000,"), "world.states",
          line=3, match="too large.*5001.*5000")


def test_areas_too_large_in_total():
    fails(BASE + "  r1: {dim: 3000}\n  r2: {dim: 3000}\n", "areas", line=8,
          match="too large")


def test_links_too_large_in_total():
    text = BASE + "  r1: {dim: 2600}\n  r2: {dim: 2}\n" + """\
links:
  - {from: r2, to: r1, kind: prediction}
  - {from: v1, to: r1, kind: prediction}
"""
    fails(text, "links", line=13, match="too large")


def test_lag_too_large():
    fails(BASE.replace("v1: {tracks: x}", "v1: {tracks: x, lag: 51}"),
          "areas.v1.lag", line=9, match="too large.*50")


# ---------------------------------------------------------------- JSON Schema


def _validator():
    return jsonschema.Draft202012Validator(spec_schema())


def test_schema_is_valid_draft_2020_12():
    jsonschema.Draft202012Validator.check_schema(spec_schema())


def test_shipped_schema_is_up_to_date():
    shipped = json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))
    assert shipped == spec_schema(), \
        "run `python -m hierarchy.spec --write-schema` to refresh it"


def test_schema_accepts_the_format_example():
    data = _read_yaml(FORMAT_EXAMPLE, "example").value
    assert list(_validator().iter_errors(data)) == []


@pytest.mark.parametrize("matrix, ok", [
    (0.5, True), (3, True), ([0.1, 0.2], True), ([[1, 0], [0, 1]], True),
    ("identity", True), ("zero", True),
    (True, False), ("0.5", False), ([], False), ([[]], False), ("eye", False),
])
def test_schema_matrix_shorthand(matrix, ok):
    data = _read_yaml(FORMAT_EXAMPLE, "example").value
    data["sensors"]["skin"]["noise"] = matrix
    assert _validator().is_valid(data) is ok


def test_schema_rejects_unknown_keys_and_wrong_pins():
    data = _read_yaml(FORMAT_EXAMPLE, "example").value
    data["links"][0]["nosie"] = 1
    assert not _validator().is_valid(data)
    data = _read_yaml(FORMAT_EXAMPLE, "example").value
    data["links"][0]["pin"] = {"G": 1}  # links[0] is a residual
    assert not _validator().is_valid(data)
    data["links"][0]["pin"] = {"S": 1, "K": 1}
    assert _validator().is_valid(data)


def test_schema_lists_every_key_the_parser_knows():
    props = spec_schema()["properties"]
    assert list(props) == ["spec", "name", "world", "sensors", "areas",
                           "links", "budgets", "units"]
    link = props["links"]["items"]["properties"]
    assert list(link) == ["from", "to", "kind", "dim", "noise", "price", "delay", "pin"]
    assert link["noise"]["default"] == "zero"


EXAMPLE_SPECS = sorted((Path(__file__).parents[1] / "specs").glob("*.yaml"))


@pytest.mark.parametrize("path", EXAMPLE_SPECS or [pytest.param(
    None, marks=pytest.mark.skip(reason="no example specs in specs/ yet"))],
    ids=lambda p: p.name if p else "none")
def test_example_specs_validate_and_parse(path):
    text = path.read_text(encoding="utf-8")
    errors = [e.message for e in _validator().iter_errors(
        _read_yaml(text, str(path)).value)]
    assert errors == []
    load_spec(path)


def test_main_prints_the_schema(capsys):
    assert main([]) == 0
    assert json.loads(capsys.readouterr().out) == spec_schema()


def test_main_writes_the_schema(tmp_path, monkeypatch):
    target = tmp_path / "schema.json"
    monkeypatch.setattr(write_schema, "SCHEMA_PATH", target)
    assert main(["--write-schema"]) == 0
    assert json.loads(target.read_text()) == spec_schema()


def test_docstring_examples_run():
    import importlib
    import pkgutil

    attempted = 0
    for info in pkgutil.iter_modules(spec_module.__path__):
        result = doctest.testmod(importlib.import_module(f"hierarchy.spec.{info.name}"))
        assert result.failed == 0, info.name
        attempted += result.attempted
    assert attempted > 0
