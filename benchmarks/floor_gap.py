"""The information floor beside the designs: bound, gap and time.

For every example spec in ``specs/`` it designs the circuit (default
options), computes the information floor (``hierarchy.design.floor``) and prints
the design's objective, the bound, the relative gap and both wall times,
with the floor's time as a ratio of the design's (the baseline, measured in
the same process). Then it times the floor alone on generated layered
circuits (``hierarchy.spec.generate``: ``areas`` areas on ``areas / 2`` levels,
world dimension ``areas``, density 0.175, seed 0, the circuits of
``benchmarks/scale.py``), with one design of the 8-area circuit as the
baseline.

    python benchmarks/floor_gap.py           # examples, then 8, 16 and 32 areas
    python benchmarks/floor_gap.py --quick   # examples, then 8 areas

The first floor of a process pays for importing CVXPY; it is timed apart.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

# Measure the checkout this script lives in, not an installed copy.
sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from _env import blas_header, code_version  # noqa: E402

from hierarchy.design import design  # noqa: E402
from hierarchy.design.floor import information_floor  # noqa: E402
from hierarchy.spec.generate import generate_spec_text  # noqa: E402
from hierarchy.spec import load_spec, parse_spec  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="generated circuits of 8 areas only")
    args = parser.parse_args(argv)
    print(f"code: {code_version()}")
    for line in blas_header():
        print(line)
    t = time.perf_counter()
    import cvxpy  # noqa: F401

    print(f"importing cvxpy: {time.perf_counter() - t:.2f} s (once per process)\n")

    print(f"{'spec':<20} {'design J':>11} {'floor':>11} {'gap':>8} {'design s':>9} {'floor s':>8} "
          f"{'ratio':>7}  status")
    for path in sorted((ROOT / "specs").glob("*.yaml")):
        spec = load_spec(path)
        res = design(spec)
        floor = information_floor(spec)
        print(f"{path.stem:<20} {res.objective:>11.6f} {floor.objective:>11.6f} "
              f"{floor.gap(res.objective):>8.2%} {res.seconds:>9.2f} {floor.seconds:>8.3f} "
              f"{floor.seconds / res.seconds:>7.3f}  {res.status}; floor {floor.status}")
        print(f"{'':<20} loose: {'; '.join(floor.loose)}")

    print("\ngenerated circuits (floor only; baseline: one design of the 8-area circuit)")
    spec8 = parse_spec(generate_spec_text(areas=8, levels=4, density=0.175, seed=0, world_dim=8))
    base = design(spec8)
    print(f"8-area design: {base.seconds:.2f} s, objective {base.objective:.6f}")
    print(f"{'areas':>5} {'links':>5} {'world':>5} {'floor':>11} {'floor s':>8} {'x design(8)':>11}  status")
    for areas in (8,) if args.quick else (8, 16, 32):
        spec = parse_spec(generate_spec_text(areas=areas, levels=areas // 2, density=0.175, seed=0,
                                             world_dim=areas))
        floor = information_floor(spec)
        extra = f"  gap to the design {floor.gap(base.objective):.2%}" if areas == 8 else ""
        print(f"{areas:>5} {len(spec.links):>5} {spec.world.dim:>5} {floor.objective:>11.6f} "
              f"{floor.seconds:>8.2f} {floor.seconds / base.seconds:>11.2f}  {floor.status}{extra}")


if __name__ == "__main__":
    main()
