"""Sweep speed: warm starts against cold starts, two local workers against one.

A sweep of ``links[upstream-view->station-view].price`` over 40 points from
1e-3 to 1 (log grid) on specs/two-level.yaml, with the designer's default
options (4 starts, 3000 iterations), run three times in one process:

* warm, 1 worker: each point starts from the previous point's gains;
* cold, 1 worker: each point from the designer's own starts (``warm=False``);
* warm, 2 workers: the grid cut into two chunks run by two local processes
  (the second chunk's first point starts cold).

It prints, for each run, the total solver iterations, evaluations and wall
time, how many points did not converge, and the largest objective excess
over the cold run (a warm start must not buy speed with worse designs); then
the ratios cold / warm (iterations and time) and 1 worker / 2 workers
(time). The goal of the issue: warm starts at least 3x fewer total
iterations than cold starts.

    python benchmarks/sweep_speed.py            # 40 points (a few minutes on a quiet machine)
    python benchmarks/sweep_speed.py --quick    # 12 points

No files are written (no resume folder). Times depend on the machine's
load, printed at the start and the end; iteration counts do not.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from hierarchy.design import Options  # noqa: E402
from hierarchy.spec import load_spec  # noqa: E402
from hierarchy.studies import grid, sweep  # noqa: E402

SPEC = os.path.join(ROOT, "specs", "two-level.yaml")
PATH = "links[upstream-view->station-view].price"
GOAL = 3.0


def run(spec, values, warm, workers):
    t0 = time.perf_counter()
    study = sweep(spec, PATH, values, Options(), log=True, warm=warm, workers=workers)
    seconds = time.perf_counter() - t0
    rows = study.rows
    return {
        "iterations": sum(r["iterations"] for r in rows),
        "evaluations": sum(r["evaluations"] for r in rows),
        "seconds": seconds,
        "not_converged": sum(1 for r in rows if not r["converged"]),
        "objective": [r["objective"] for r in rows],
        "silent": [tuple(r["silent_links"]) for r in rows],
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="12 points instead of 40")
    args = parser.parse_args(argv)
    points = 12 if args.quick else 40
    try:
        import threadpoolctl  # noqa: F401

        blas = "1 thread per point (threadpoolctl)"
    except ImportError:
        blas = f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}"
    print(f"python {platform.python_version()}, {os.cpu_count()} CPUs, BLAS {blas}, "
          f"load average {os.getloadavg()[0]:.2f}")
    print(f"sweep of {PATH} on specs/two-level.yaml: {points} points, 1e-3 .. 1 (log), default Options()\n")
    spec = load_spec(SPEC)
    values = grid(1e-3, 1, points, log=True)
    runs = {}
    for label, warm, workers in (("warm, 1 worker", True, 1), ("cold, 1 worker", False, 1),
                                 ("warm, 2 workers", True, 2)):
        runs[label] = run(spec, values, warm, workers)
        r = runs[label]
        print(f"  {label:16s} {r['iterations']:7d} iterations {r['evaluations']:7d} evaluations "
              f"{r['seconds']:8.2f} s  not converged: {r['not_converged']}", flush=True)
    cold = runs["cold, 1 worker"]
    print()
    for label, r in runs.items():
        worst = max((a - b) / abs(b) for a, b in zip(r["objective"], cold["objective"]))
        same = sum(a == b for a, b in zip(r["silent"], cold["silent"]))
        print(f"  {label:16s} largest objective excess over cold: {worst:+.2e} (relative); "
              f"same silent links as cold at {same}/{points} points")
    warm, two = runs["warm, 1 worker"], runs["warm, 2 workers"]
    it_ratio = cold["iterations"] / warm["iterations"]
    print(f"\ncold / warm: {it_ratio:.2f}x iterations, {cold['seconds'] / warm['seconds']:.2f}x time")
    print(f"1 worker / 2 workers (warm): {warm['seconds'] / two['seconds']:.2f}x time "
          f"(2 workers: {two['iterations']} iterations, the second chunk starts cold)")
    verdict = "met" if it_ratio >= GOAL else "NOT met"
    print(f"goal: warm starts at least {GOAL:g}x fewer total iterations than cold: {verdict} ({it_ratio:.2f}x)")
    print(f"load average at the end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
