"""Write the adversarial corpus of tests/adversarial/ (issue 16).

Hostile or broken inputs of our own, in four folders: ``specs/`` (YAML),
``gains/`` (gains JSON), ``results/`` (result JSON) and ``parts/`` (a
study's finished-point files, the data a resumed study reads back). The
files are kept in the repository; this script documents how each was made
and remakes them exactly (``python tests/adversarial/make_corpus.py``).
tests/test_adversarial.py runs every file through every reader and the
commands that read it: each must be read, or refused with one message;
never a traceback, never a hang. Special files (named pipes, devices,
folders, dangling links) cannot be kept in git; the test makes them.
"""

from __future__ import annotations

import json
from pathlib import Path

HERE = Path(__file__).resolve().parent

#: A small valid spec every spec case starts from (one sensor, one area).
BASE = """spec: 1
name: corpus base
world:
  states:
    x: {dim: 1, dynamics: 0.9, noise: 0.1}
sensors:
  eye: {observes: {x: 1}, noise: 0.2}
areas:
  v1: {tracks: x}
links:
  - {from: eye, to: v1, kind: residual, noise: 0.05, price: 0.02}
  - {from: v1, to: eye, kind: prediction, noise: 0.05, price: 0.02}
"""


def _replace(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new, 1)


def specs() -> dict:
    bomb = "a: &a [x, x, x, x, x, x, x, x, x]\n" + "".join(
        f"{c}: &{c} [*{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}]\n"
        for p, c in zip("abcdefgh", "bcdefghi"))
    out = {
        "empty.yaml": "",
        "only-comments.yaml": "# nothing here\n# at all\n",
        "bom-valid.yaml": "\ufeff" + BASE,
        "utf16.yaml": BASE.encode("utf-16"),
        "latin1-name.yaml": _replace("corpus base", "caf\xe9").encode("latin-1"),
        "binary.yaml": bytes(range(256)) * 4,
        "nul-bytes.yaml": BASE.encode() + b"\x00\x00\x00",
        "control-chars.yaml": _replace("corpus base", "a\x07b\x1bc"),
        "tab-indent.yaml": BASE.replace("  x:", "\tx:"),
        "alias-bomb.yaml": bomb + BASE,
        "alias-in-matrix.yaml": _replace("dynamics: 0.9", "dynamics: &d [[0.9]]").replace(
            "observes: {x: 1}", "observes: {x: *d}"),
        "deep-list.yaml": "spec: 1\nworld: " + "[" * 5000 + "]" * 5000 + "\n",
        "deep-map.yaml": "spec: 1\nworld: " + "{a: " * 3000 + "1" + "}" * 3000 + "\n",
        "huge-number.yaml": _replace("noise: 0.1", "noise: 1e400"),
        "nan-noise.yaml": _replace("noise: 0.1", "noise: .nan"),
        "inf-dynamics.yaml": _replace("dynamics: 0.9", "dynamics: .inf"),
        "negative-dim.yaml": _replace("dim: 1", "dim: -1"),
        "zero-dim.yaml": _replace("dim: 1", "dim: 0"),
        "dim-5001.yaml": _replace("dim: 1", "dim: 5001"),
        "dim-string.yaml": _replace("dim: 1", "dim: one"),
        "dim-bool.yaml": _replace("dim: 1", "dim: true"),
        "dim-float.yaml": _replace("dim: 1", "dim: 1.5"),
        "dim-huge-int.yaml": _replace("dim: 1", "dim: " + "9" * 400),
        "duplicate-key.yaml": _replace("areas:\n", "areas:\n  v1: {tracks: x}\n"),
        "unknown-top-key.yaml": BASE + "colour: blue\n",
        "version-2.yaml": BASE.replace("spec: 1", "spec: 2"),
        "no-world.yaml": "\n".join(l for l in BASE.splitlines() if "world" not in l and "states" not in l
                                   and "dynamics" not in l) + "\n",
        "world-is-list.yaml": _replace("world:\n  states:\n    x: {dim: 1, dynamics: 0.9, noise: 0.1}",
                                       "world: [1, 2, 3]"),
        "root-list.yaml": "- spec\n- 1\n",
        "root-scalar.yaml": "42\n",
        "unknown-state.yaml": _replace("observes: {x: 1}", "observes: {y: 1}"),
        "unknown-target.yaml": _replace("tracks: x", "tracks: nowhere"),
        "link-unknown-node.yaml": _replace("{from: eye, to: v1,", "{from: ghost, to: v1,"),
        "self-link.yaml": _replace("{from: eye, to: v1,", "{from: v1, to: v1,"),
        "bad-kind.yaml": _replace("kind: residual", "kind: sideways"),
        "budget-negative.yaml": BASE + "budgets:\n  - {name: b, links: all, total: -1}\n",
        "budget-no-links.yaml": BASE + "budgets:\n  - {name: b, links: [], total: 1}\n",
        "escape-name.yaml": _replace("name: corpus base", 'name: "\\e]0;owned\\a\\e[2J\\e[31mred"'),
        "bidi-name.yaml": _replace("name: corpus base", 'name: "abc\\u202Eevil\\u2066"'),
        "escape-area.yaml": BASE.replace("v1", '"v\\e[5m1"'),
        "long-name.yaml": _replace("corpus base", "n" * 20000),
        "unicode-names.yaml": BASE.replace("v1", "\u8996\u899a").replace("eye", "\u0447\u0443\u0432"),
        "lag-51.yaml": _replace("tracks: x}", "tracks: x, lag: 51}"),
        "lag-times-world.yaml": _replace("dim: 1, dynamics: 0.9", "dim: 200, dynamics: 0.9").replace(
            "observes: {x: 1}", "observes: {x: identity}").replace("tracks: x}", "tracks: x, lag: 30}"),
        "non-psd-noise.yaml": _replace("dim: 1, dynamics: 0.9, noise: 0.1",
                                       "dim: 2, dynamics: 0.9, noise: [[1, 2], [2, 1]]").replace(
            "observes: {x: 1}", "observes: {x: identity}"),
        "asymmetric-noise.yaml": _replace("dim: 1, dynamics: 0.9, noise: 0.1",
                                          "dim: 2, dynamics: 0.9, noise: [[1, 0.5], [0, 1]]").replace(
            "observes: {x: 1}", "observes: {x: identity}"),
        "unstable-world.yaml": _replace("dynamics: 0.9", "dynamics: 1.5"),
        "marginal-world.yaml": _replace("dynamics: 0.9", "dynamics: 1.0"),
        "pin-wrong-shape.yaml": _replace("tracks: x}", "tracks: x, pin: {M: [[1, 2], [3, 4]]}}"),
        "pin-nan.yaml": _replace("tracks: x}", "tracks: x, pin: {M: .nan}}"),
        "pin-1e12-cancelling.yaml": _replace("tracks: x}", "tracks: x, pin: {M: 1e12}}").replace(
            "price: 0.02}\n  - {from: v1", "price: 0.02, pin: {S: 1e12, P: 1e12, K: 1e-12}}\n  - {from: v1").replace(
            "kind: prediction, noise: 0.05, price: 0.02}", "kind: prediction, noise: 0.05, price: 0.02, "
                                                          "pin: {G: 1e12}}"),
        "pin-non-normal.yaml": json.dumps({
            "spec": 1, "name": "non-normal pins",
            "world": {"states": {"x": {"dim": 3, "dynamics": 0.9, "noise": 0.1}}},
            "sensors": {"eye": {"observes": {"x": "identity"}, "noise": 0.1}},
            "areas": {"a": {"tracks": "x", "pin": {"M": [[0.5, 3e9, -8e9], [0, -0.3, 6e9], [0, 0, 0.2]]}}},
            "links": [{"from": "eye", "to": "a", "kind": "residual", "noise": 0.05, "price": 0.1,
                       "pin": {"S": "identity", "K": 0.3}}]}),
        "merge-keys.yaml": _replace("areas:\n  v1: {tracks: x}", "base: &b {tracks: x}\nareas:\n  v1: {<<: *b}"),
        "python-tag.yaml": "!!python/object/apply:os.system ['echo owned']\n",
        "two-documents.yaml": BASE + "---\n" + BASE,
        "json-spec.yaml": json.dumps({"spec": 1, "world": {"states": {"x": {"dynamics": 0.5, "noise": 1}}},
                                      "sensors": {"eye": {"observes": {"x": 1}}}, "areas": {"v1": {"tracks": "x"}}}),
        "key-is-list.yaml": "spec: 1\n? [a, b]\n: 1\n",
        "crlf.yaml": BASE.replace("\n", "\r\n"),
        "only-cr.yaml": BASE.replace("\n", "\r"),
        "noisy-free-link.yaml": _replace("noise: 0.05, price: 0.02}\n  - {from: v1",
                                         "noise: 0.05}\n  - {from: v1"),
    }
    return out


def gains() -> dict:
    ok = {"format": "hierarchy-gains", "version": 1, "areas": {"v1": {"M": [[0.9]]}},
          "links": {"eye->v1": {"S": [[1.0]], "P": [[1.0]], "K": [[0.5]]}, "v1->eye": {"G": [[1.0]]}}}

    def variant(**changes):
        d = json.loads(json.dumps(ok))
        for path, value in changes.items():
            keys = path.split("__")
            node = d
            for k in keys[:-1]:
                node = node[k.replace("_to_", "->")]
            node[keys[-1].replace("_to_", "->")] = value
        return json.dumps(d)

    return {
        "valid.json": json.dumps(ok),
        "empty.json": "",
        "not-json.json": "this is not json",
        "truncated.json": json.dumps(ok)[:-7],
        "root-list.json": "[1, 2, 3]",
        "root-string.json": '"gains"',
        "wrong-format.json": variant(format="hierarchy-result"),
        "wrong-version.json": variant(version=99),
        "nan-entry.json": json.dumps(ok).replace("0.9", "NaN"),
        "infinity-entry.json": json.dumps(ok).replace("0.9", "Infinity"),
        "overflow-entry.json": json.dumps(ok).replace("0.9", "1e309"),
        "huge-int.json": json.dumps(ok).replace("0.9", "9" * 5000),
        "string-entry.json": variant(areas__v1__M=[["0.9"]]),
        "bool-entry.json": variant(areas__v1__M=[[True]]),
        "null-matrix.json": variant(areas__v1__M=None),
        "ragged.json": variant(links__eye_to_v1__K=[[1.0], [1.0, 2.0]]),
        "wrong-shape.json": variant(links__eye_to_v1__K=[[1.0, 2.0], [3.0, 4.0]]),
        "unknown-link.json": variant(links__ghost_to_v1={"K": [[1.0]]}),
        "unknown-gain.json": variant(links__eye_to_v1__Z=[[1.0]]),
        "unstable.json": variant(areas__v1__M=[[3.0]]),
        "deep.json": "[" * 20000 + "]" * 20000,
        "bom.json": "\ufeff" + json.dumps(ok),
        "duplicate-keys.json": json.dumps(ok)[:-1] + ', "areas": {}}',
        "escape-key.json": variant(areas={"v\x1b[31m1": {"M": [[0.9]]}}),
        "utf16.json": json.dumps(ok).encode("utf-16"),
    }


def results() -> dict:
    link = {"kind": "residual", "power": 0.8, "noise_power": 0.05, "snr": 16.0, "bits": 2.0, "price": 0.02,
            "silent": False}
    ok = {"format": "hierarchy-result", "version": 1, "spec": "corpus", "objective": 0.3, "status": "converged",
          "form": "price", "areas": {"v1": {"error": 0.2, "relay": False}},
          "links": {"eye->v1": link, "v1->eye": dict(link, kind="prediction", power=0.0, silent=True)}}

    def with_(**changes):
        d = json.loads(json.dumps(ok))
        d.update(changes)
        return json.dumps(d)

    return {
        "valid.json": json.dumps(ok),
        "empty.json": "",
        "root-list.json": "[]",
        "no-format.json": json.dumps({k: v for k, v in ok.items() if k != "format"}),
        "format-number.json": with_(format=7),
        "no-links.json": json.dumps({k: v for k, v in ok.items() if k != "links"}),
        "links-list.json": with_(links=[1, 2]),
        "bad-link-id.json": with_(links={"eye-v1": link}),
        "empty-end.json": with_(links={"->v1": link}),
        "bad-kind.json": with_(links={"eye->v1": dict(link, kind="sideways")}),
        "power-null.json": with_(links={"eye->v1": dict(link, power=None)}),
        "power-string.json": with_(links={"eye->v1": dict(link, power="lots")}),
        "power-infinite.json": json.dumps(ok).replace("0.8", "1e999"),
        "power-nan.json": json.dumps(ok).replace("0.8", "NaN"),
        "no-sensors.json": with_(areas={"v1": {"error": 0.2}, "v2": {"error": 0.1}},
                                 links={"v1->v2": link}),
        "no-areas.json": with_(areas={}),
        "deep.json": "{\"a\": " * 20000 + "1" + "}" * 20000,
        "escape-names.json": with_(spec="\x1b]0;owned\x07", areas={"v\x1b[31m1": {"error": 0.2}},
                                   links={"eye->v\x1b[31m1": link}),
        "title-huge.json": with_(spec="s" * 20000),
        "status-object.json": with_(status={"a": 1}, objective="high"),
    }


def parts() -> dict:
    row = {"status": "converged", "converged": True, "objective": 0.3}
    return {
        "wrong-format.json": json.dumps({"format": "hierarchy-result", "key": "K", "row": row}),
        "wrong-key.json": json.dumps({"format": "hierarchy-point", "key": "someone-else", "row": row}),
        "row-list.json": json.dumps({"format": "hierarchy-point", "key": "K", "row": [1, 2]}),
        "root-list.json": "[1]",
        "truncated.json": json.dumps({"format": "hierarchy-point", "key": "K", "row": row})[:-10],
        "deep.json": "[" * 20000 + "]" * 20000,
        "binary.json": bytes(range(256)),
        "empty.json": "",
    }


FOLDERS = {"specs": specs, "gains": gains, "results": results, "parts": parts}


def main() -> None:
    for folder, make in FOLDERS.items():
        target = HERE / folder
        target.mkdir(exist_ok=True)
        for name, content in make().items():
            data = content if isinstance(content, bytes) else content.encode("utf-8")
            (target / name).write_bytes(data)


if __name__ == "__main__":
    main()
