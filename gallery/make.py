"""Make every gallery picture from the specs in specs/ with the project's own
commands, write gallery/README.md showing each picture beside the command
that made it and what it shows, and check a gallery's numbers against a
fresh run.

    python gallery/make.py                          # full settings, into gallery/
    python gallery/make.py --quick --out /tmp/g     # small settings (used by the tests)
    python gallery/make.py --check /tmp/g           # do gallery/'s numbers match the run in /tmp/g?

Quick grids are subsets of the full ones (every quick point is a full
point), so a quick run can be checked against the committed gallery point
by point.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shlex
import subprocess
import sys
from collections import namedtuple
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: stem: the picture's name; caption; shows: what a reader sees in it;
#: command: after `hierarchy`, with {out}; quick: replacements for --quick;
#: numbers: the JSON files beside the picture that hold its numbers.
Entry = namedtuple("Entry", "stem caption shows command quick numbers")

ENTRIES = [
    Entry("single-loop", "The smallest loop, designed: is the prediction worth its price?",
          "One thermometer and one area. The residual (blue, solid) carries the reading up; at this price the "
          "prediction back down is not worth sending, so it is drawn grey and dashed (silent). The box gives the "
          "area's error; the label gives the link's power, SNR and bits per step.",
          "design specs/single-loop.yaml --json {out}/single-loop.json --plot {out}/single-loop.png", {},
          ["single-loop.json"]),
    Entry("two-level", "Two levels: a slow cause above fast features.",
          "A gauging station's readings (level 1) and the slow upstream flow behind them (level 2). Line width "
          "is power: where the energy goes between the levels, and which links the design leaves silent.",
          "design specs/two-level.yaml --json {out}/two-level.json --plot {out}/two-level.png", {},
          ["two-level.json"]),
    Entry("two-senses", "Two senses converging under one shared budget.",
          "A camera and a pressure pad feed one fusing area; the links above the first level share one budget "
          "(title: how much is used and its shadow price). The widths show which sense the budget goes to.",
          "design specs/two-senses.yaml --json {out}/two-senses.json --plot {out}/two-senses.png", {},
          ["two-senses.json"]),
    Entry("two-senses-share", "The same design drawn with link widths by budget share.",
          "The design above, drawn from its result file: each link's width and label give its share of the "
          "budget it belongs to; links outside every budget are thinnest.",
          "render {out}/two-senses.json -o {out}/two-senses-share.png --width-by share", {},
          ["two-senses.json"]),
    Entry("sweep-prediction-price", "Sweep: the prediction's power falls to silence as its price grows.",
          "Top: the power of the prediction (vermillion) and of the residual (blue) against the prediction's "
          "price, log scale; the grey band is where the prediction is silent. Bottom: the area's error, which "
          "rises until the prediction stops and is flat after.",
          "sweep specs/single-loop.yaml 'links[estimate->thermometer].price' --from 1e-4 --to 1 --points 25 "
          "--log --show 'links[estimate->thermometer].power,links[thermometer->estimate].power,"
          "areas[estimate].error' --log-y power --out {out}/sweep-prediction-price --no-progress",
          {"--points 25": "--points 5"}, ["sweep-prediction-price.json"]),
    Entry("phase-prediction", "Phase map: where the prediction link is silent, by its noise and its price.",
          "Left: over a grid of the prediction's price and channel noise, whether the prediction is silent, "
          "with the edge of its silence drawn; the edge runs along price x noise = constant. Right: the "
          "objective over the same grid.",
          "phase specs/single-loop.yaml --x 'links[estimate->thermometer].price' --x-range 1e-4:1:13 --x-log "
          "--y 'links[estimate->thermometer].noise' --y-range 1e-3:10:13 --y-log --out {out}/phase-prediction "
          "--no-progress",
          {"1e-4:1:13": "1e-4:1:4", "1e-3:10:13": "1e-3:10:3"}, ["phase-prediction.json"]),
    Entry("compare-predictive", "Pareto fronts: a feed-forward hierarchy against the same one with predictions.",
          "Top: weighted error against the energy used, one front per architecture. Bottom: how far each is "
          "above the best at each total budget, as a share of its own objective (the comparison table's "
          "'relative'); shading marks where each wins.",
          "compare specs/compare-flat.yaml specs/compare-predictive.yaml --budgets 0.02:5:13 --log "
          "--out {out}/compare-predictive --no-progress",
          {"0.02:5:13": "0.02:5:3"}, ["compare-predictive.json"]),
    Entry("compare-depth", "Pareto fronts: a deep against a shallow hierarchy.",
          "The same comparison for a deep and a shallow hierarchy over the same world.",
          "compare specs/compare-deep.yaml specs/compare-shallow.yaml --budgets 0.02:5:13 --log "
          "--out {out}/compare-depth --no-progress",
          {"0.02:5:13": "0.02:5:3"}, ["compare-depth.json"]),
    Entry("deep-delays", "A deep hierarchy whose long-range feedback takes three steps, in physical units.",
          "A retina, an edge area and an object area; the object area's prediction back down (vermillion) "
          "arrives 3 steps (30 ms) after it is sent, as its label says, the local hops in one. Each label also "
          "gives the link's rate and power under the spec's neural units (2 bits per spike, the spike cost of "
          "Attwell and Laughlin 2001); the title, all links together.",
          "design specs/deep-delays.yaml --json {out}/deep-delays.json --plot {out}/deep-delays.png", {},
          ["deep-delays.json"]),
    Entry("compare-delays", "Pareto fronts: deep against shallow when long pathways are slow.",
          "The deep hierarchy above against a shallow one in which the retina reports straight to the object "
          "area over a 2-step pathway, with 3-step feedback. Under these delays the shallow circuit wins at "
          "small budgets and the deep one at large budgets; the bottom panel's shading shows where each wins.",
          "compare specs/deep-delays.yaml specs/shallow-delays.yaml --budgets 0.02:5:9 --log "
          "--out {out}/compare-delays --no-progress",
          # (The full grid: at a total of 5 the deep circuit's best design is
          # reached only by the walk from its neighbour at 2.5.)
          {}, ["compare-delays.json"]),
]

#: How close a fresh run's numbers must be to the committed ones. An optimum
#: is flat, so objectives agree far more closely than the gains behind them.
RTOL = {"objective": 1e-4, "error": 1e-3, "power": 3e-2}


def command_for(template: str, out: str, quick: bool, replacements: dict) -> str:
    cmd = template.format(out=out)
    if quick:
        for old, new in replacements.items():
            cmd = cmd.replace(old, new)
        # Every design keeps the full solver settings, so that a quick run
        # lands on the same optimum as the committed one (with fewer starts
        # and iterations, budget-form points landed elsewhere).
    return cmd


def _close(a, b, rtol, scale=0.0) -> bool:
    if a is None or b is None:
        return a is b
    return math.isclose(a, b, rel_tol=rtol, abs_tol=rtol * scale)


def _design_mismatches(name, old, new) -> tuple:
    """Differences between two design results (both converged), and whether
    anything was compared."""
    if old.get("status") != "converged" or new.get("status") != "converged":
        return [], False
    out = []
    if not _close(old["objective"], new["objective"], RTOL["objective"]):
        out.append(f"{name}: objective {old['objective']:.6g} in the gallery, {new['objective']:.6g} now")
    for area, row in old["areas"].items():
        e_old, e_new = row.get("error"), new["areas"].get(area, {}).get("error")
        if not _close(e_old, e_new, RTOL["error"]):
            out.append(f"{name}: areas.{area}.error {e_old} in the gallery, {e_new} now")
    top = max((abs(r["power"]) for r in old["links"].values()), default=0.0)
    for lid, row in old["links"].items():
        now = new["links"].get(lid)
        if now is None:
            out.append(f"{name}: link {lid} is no longer in the design")
        elif bool(row.get("silent")) != bool(now.get("silent")):
            out.append(f"{name}: link {lid} is {'silent' if row.get('silent') else 'live'} in the gallery, "
                       f"{'silent' if now.get('silent') else 'live'} now")
        elif not _close(row["power"], now["power"], RTOL["power"], top):
            out.append(f"{name}: links.{lid}.power {row['power']:.6g} in the gallery, {now['power']:.6g} now")
    return out, True


def _study_mismatches(name, old, new) -> tuple:
    """Differences at the grid points both studies share (converged in both)."""
    keys = [a["path"] for a in old["axes"]] + (["spec"] if old.get("kind") == "compare" else [])

    def key(row):
        return tuple(round(math.log(row[k]), 9) if isinstance(row[k], float) and row[k] > 0 else row[k]
                     for k in keys)
    fresh = {key(r): r for r in new["rows"]}
    out, compared = [], 0
    for r in old["rows"]:
        now = fresh.get(key(r))
        if now is None or not (r.get("converged") and now.get("converged")):
            continue
        compared += 1
        where = ", ".join(f"{k}={r[k]:.4g}" if isinstance(r[k], float) else f"{k}={r[k]}" for k in keys)
        if not _close(r["objective"], now["objective"], RTOL["objective"]):
            out.append(f"{name} at {where}: objective {r['objective']:.6g} in the gallery, "
                       f"{now['objective']:.6g} now")
        if sorted(r.get("silent_links") or []) != sorted(now.get("silent_links") or []):
            out.append(f"{name} at {where}: silent links {r.get('silent_links')} in the gallery, "
                       f"{now.get('silent_links')} now")
    return out, compared > 0


def check_numbers(gallery, fresh) -> list:
    """Every way the numbers beside the pictures in ``gallery`` differ from a
    fresh run in ``fresh`` (empty when they agree within :data:`RTOL`).

    Designs are compared when both runs converged; studies at the grid
    points both have (converged in both). A picture with nothing to compare
    counts as a difference: the check must not pass by checking nothing.
    """
    gallery, fresh = Path(gallery), Path(fresh)
    out = []
    for name in sorted({n for e in ENTRIES for n in e.numbers}):
        if not (gallery / name).exists():
            out.append(f"{name}: missing from the gallery")
            continue
        if not (fresh / name).exists():
            out.append(f"{name}: the fresh run wrote no such file")
            continue
        old, new = (json.loads((d / name).read_text()) for d in (gallery, fresh))
        if old.get("format") == "hierarchy-result":
            found, compared = _design_mismatches(name, old, new)
        else:
            found, compared = _study_mismatches(name, old, new)
        out += found
        if not compared:
            out.append(f"{name}: nothing to compare (no converged design, or no grid point in common)")
    return out


def readme(out_name: str, shown: dict) -> str:
    lines = ["# Gallery", "",
             "Every picture here was made from the specs in `specs/` by `python gallery/make.py`",
             "(run from the repository root); each is shown beside the command that made it and what it",
             "shows. Value paths are quoted so that a shell does not read the `>` of `->` as a redirection",
             "(`links.estimate:thermometer.price` is the same path without any shell characters).",
             "A test remakes the gallery on small settings and fails when these pictures' numbers (the JSON",
             "beside each) no longer match a fresh run: after changing the designer, remake them with",
             "`python gallery/make.py`.", ""]
    for e in ENTRIES:
        lines += [f"## {e.caption}", "", f"![{e.stem}]({e.stem}.png)", "", e.shows, "", "```",
                  f"hierarchy {shown[e.stem]}", "```", ""]
    lines += STORY
    return "\n".join(lines)


#: What the search that escapes local optima (docs/search.md) changed in these
#: pictures, against the gallery made before it (commit 9b56c5b).
STORY = [
    "## What changed in the story", "",
    "The gallery was first made with a designer that stopped at the first stationary point it",
    "reached. Remade with the search of docs/search.md (streams woken as a whole, narrow-link and",
    "feed-forward searches, the best of them kept), three pictures tell a different story:", "",
    "* **Two senses.** The first gallery silenced the whole pressure-pad stream (objective 0.357726):",
    "  the pad looked not worth sending. The pad stream is in fact worth its share of the budget: both",
    "  pad links now carry power and the objective is 0.354794. The camera still gets most of it.",
    "* **Two levels.** The first gallery sent both of the probe's readings up and a prediction back",
    "  down from the upstream area (0.637984). The better design (0.634065) sends one combination of",
    "  the two readings, leaves the rest to the lower area's memory, and needs no prediction from the",
    "  upstream area at these prices: the prediction is now drawn silent.",
    "* **Predictions against none, at small budgets.** At a total of 0.02 both architectures were",
    "  trapped (feed-forward 1.1979, with predictions 1.1481); now 1.1661 and 1.1211. The predictive",
    "  ship deck still wins over the whole range, by 3.9 % to 17.8 % of its objective.", "",
    "Each design's text and JSON now also carry the information floor (docs/floor.md): no circuit of",
    "the spec can go below it, so the gap (7.4 % for two senses, 10.7 % for two levels) bounds what",
    "any better design could still gain.", "",
]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small grids and solver budgets")
    parser.add_argument("--out", default="gallery", help="output folder (default gallery/)")
    parser.add_argument("--check", metavar="FRESH", help="compare the numbers in --out (default gallery/) with "
                                                         "a fresh run in FRESH, and make nothing")
    args = parser.parse_args(argv)
    out = args.out
    folder = Path(out) if os.path.isabs(out) else ROOT / out
    if args.check:
        problems = check_numbers(folder, args.check)
        for p in problems:
            print(p)
        return 1 if problems else 0
    folder.mkdir(parents=True, exist_ok=True)
    shown = {}
    for e in ENTRIES:
        cmd = command_for(e.command, out, args.quick, e.quick)
        print(f"hierarchy {cmd}", flush=True)
        done = subprocess.run([sys.executable, "-m", "hierarchy", *shlex.split(cmd)], cwd=ROOT,
                              capture_output=True, text=True)
        if done.returncode not in (0, 1):
            print(done.stderr, file=sys.stderr)
            return done.returncode
        shown[e.stem] = cmd.replace(f"{out}/", "gallery/")
    (folder / "README.md").write_text(readme(out, shown))
    return 0


if __name__ == "__main__":
    sys.exit(main())
