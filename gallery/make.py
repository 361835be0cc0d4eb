"""Make every gallery picture from the specs in specs/ with the project's own
commands, and write gallery/README.md showing each picture beside the
command that made it.

    python gallery/make.py            # full settings, into gallery/
    python gallery/make.py --quick --out /tmp/g   # small settings (used by the tests)
"""

from __future__ import annotations

import argparse
import os
import shlex
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

# (picture stem, caption, command after `hierarchy`, quick replacements)
ENTRIES = [
    ("single-loop", "The smallest loop, designed: is the prediction worth its price?",
     "design specs/single-loop.yaml --json {out}/single-loop.json --plot {out}/single-loop.png", {}),
    ("two-level", "Two levels: a slow cause above fast features.",
     "design specs/two-level.yaml --json {out}/two-level.json --plot {out}/two-level.png", {}),
    ("two-senses", "Two senses converging under one shared budget.",
     "design specs/two-senses.yaml --json {out}/two-senses.json --plot {out}/two-senses.png", {}),
    ("two-senses-share", "The same design drawn with link widths by budget share.",
     "render {out}/two-senses.json -o {out}/two-senses-share.png --width-by share", {}),
    ("sweep-prediction-price", "Sweep: the prediction's power falls to silence as its price grows.",
     "sweep specs/single-loop.yaml links[estimate->thermometer].price --from 1e-4 --to 1 --points 24 --log "
     "--show links[estimate->thermometer].power,links[thermometer->estimate].power,areas[estimate].error "
     "--log-y --out {out}/sweep-prediction-price --no-progress",
     {"--points 24": "--points 6"}),
    ("phase-prediction", "Phase map: where the prediction link is silent, by its noise and its price.",
     "phase specs/single-loop.yaml --x links[estimate->thermometer].price --x-range 1e-4:1:14 --x-log "
     "--y links[estimate->thermometer].noise --y-range 1e-3:10:12 --y-log --out {out}/phase-prediction "
     "--no-progress",
     {"1e-4:1:14": "1e-4:1:4", "1e-3:10:12": "1e-3:10:3"}),
    ("compare-predictive", "Pareto fronts: a feed-forward hierarchy against the same one with predictions.",
     "compare specs/compare-flat.yaml specs/compare-predictive.yaml --budgets 0.02:5:14 --log "
     "--out {out}/compare-predictive --no-progress",
     {"0.02:5:14": "0.02:5:3"}),
    ("compare-depth", "Pareto fronts: a deep against a shallow hierarchy.",
     "compare specs/compare-deep.yaml specs/compare-shallow.yaml --budgets 0.02:5:14 --log "
     "--out {out}/compare-depth --no-progress",
     {"0.02:5:14": "0.02:5:3"}),
]


def command_for(template: str, out: str, quick: bool, replacements: dict) -> str:
    cmd = template.format(out=out)
    if quick:
        for old, new in replacements.items():
            cmd = cmd.replace(old, new)
        if cmd.startswith(("design", "sweep", "phase", "compare")):
            cmd += " --restarts 2 --max-iter 400"
    return cmd


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small grids and solver budgets")
    parser.add_argument("--out", default="gallery", help="output folder (default gallery/)")
    args = parser.parse_args(argv)
    out = args.out
    os.makedirs(ROOT / out if not os.path.isabs(out) else out, exist_ok=True)
    lines = ["# Gallery", "",
             "Every picture here was made from the specs in `specs/` by `python gallery/make.py`",
             "(run from the repository root); each is shown beside the command that made it.", ""]
    for stem, caption, template, quick in ENTRIES:
        cmd = command_for(template, out, args.quick, quick)
        print(f"hierarchy {cmd}", flush=True)
        done = subprocess.run([sys.executable, "-m", "hierarchy", *shlex.split(cmd)], cwd=ROOT,
                              capture_output=True, text=True)
        if done.returncode not in (0, 1):
            print(done.stderr, file=sys.stderr)
            return done.returncode
        shown = cmd.replace(f"{out}/", "gallery/")
        lines += [f"## {caption}", "", f"![{stem}]({stem}.png)", "", "```", f"hierarchy {shown}", "```", ""]
    readme = Path(out if os.path.isabs(out) else ROOT / out) / "README.md"
    readme.write_text("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
