"""What do conduction delays cost the exact evaluation?

For generated circuits of 4 and 16 areas this times, in this process,
``hierarchy.loop.evaluate.flat_cost_and_gradient`` (value and exact gradient):

* on the circuit as generated (every link takes one step): the baseline;
* with every prediction delayed by 3 steps (2 copies of each prediction's
  signal join the closed-loop state).

Every time is the best of repeated runs (time.perf_counter). A circuit
without delays skips every step the delays added (one flag), so the
baseline is what it was before delays existed. The state grows by
``(delay - 1) x dim`` per delayed link and the Lyapunov solves grow with its
cube: give long delays to the few links that need them.

    OPENBLAS_NUM_THREADS=1 python benchmarks/delay_cost.py [--quick]   # about 1.5 minutes; --quick about 25 s
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import sys
import timeit

import numpy as np

# Measure the checkout this script lives in, not whatever copy of the package
# happens to be installed.
sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from _env import blas_header, code_version  # noqa: E402

from hierarchy.loop.evaluate import flat_cost_and_gradient  # noqa: E402
from hierarchy.spec.generate import generate_spec_text  # noqa: E402
from hierarchy.spec.model import PREDICTION  # noqa: E402
from hierarchy.design.problem import Problem  # noqa: E402
from hierarchy.spec import parse_spec  # noqa: E402


def best(fn, number, repeat):
    return min(timeit.repeat(fn, number=number, repeat=repeat)) / number


def gains_for(spec, seed=0):
    prob = Problem(spec)
    theta = 0.01 * np.random.default_rng(seed).standard_normal(prob.size)
    return prob.layout, prob.flat(theta)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats")
    args = parser.parse_args(argv)
    number, repeat = (10, 3) if args.quick else (20, 5)
    for line in blas_header():
        print(line)
    print(f"code: {code_version()}")
    print(f"{'areas':>5}  {'nxi':>5}  {'nxi delayed':>11}  {'baseline ms':>11}  "
          f"{'delayed ms':>10}  {'delayed / baseline':>18}")
    for areas in (4, 16):
        spec = parse_spec(generate_spec_text(areas=areas, levels=3, density=0.5, seed=1))
        slow = dataclasses.replace(spec, links=tuple(
            dataclasses.replace(l, delay=3) if l.kind == PREDICTION else l for l in spec.links))
        lay, g = gains_for(spec)
        lay_d, g_d = gains_for(slow)
        base = best(lambda: flat_cost_and_gradient(lay, g), number, repeat)
        delayed = best(lambda: flat_cost_and_gradient(lay_d, g_d), number, repeat)
        print(f"{areas:>5}  {lay.nxi:>5}  {lay_d.nxi:>11}  {1e3 * base:>11.3f}  "
              f"{1e3 * delayed:>10.3f}  {delayed / base:>18.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
