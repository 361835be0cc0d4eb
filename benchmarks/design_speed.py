"""Our designer against a naive joint optimiser, on two circuits.

For specs/two-level.yaml and benchmarks/six-area.yaml this times

* ours: ``hierarchy.design.design_prices(spec, Options())`` (stability-keeping
  BFGS with exact adjoint gradients, several starts, silent-link handling);
* naive: ``scipy.optimize.minimize(method="L-BFGS-B")`` over all free gains
  flattened (``hierarchy.design.problem.Problem``), value only (``1e6`` where the
  loop is unstable), finite-difference gradients, from the same first start
  ``prob.pack(prob.informed_start())``, default options except
  ``maxiter=15000`` and ``maxfun=10**6``.

It prints the time of each, the speed-up (naive / ours), the objective of each
(absolute, ``prob.reference * value``), their relative difference, iterations,
starts and time per iteration. The goal of the issue: ours at least 20x faster
with an objective equal or lower.

    python benchmarks/design_speed.py            # full run (about 2.5 minutes)
    python benchmarks/design_speed.py --quick    # about 20 s: naive runs are cut short

Our designer is timed as the median of repeated runs; the naive optimiser runs
once per circuit (a full run takes tens of seconds, so timer noise is small
beside it). In ``--quick`` the naive run is stopped after a few seconds, so the
speed-up printed is only a lower bound and the goal cannot be judged.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import time

import numpy as np

# Measure the checkout this script lives in, not whatever copy of the package
# happens to be installed.
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

import hierarchy  # noqa: E402
from _env import blas_header, code_version  # noqa: E402
from hierarchy.design import Options, design_prices  # noqa: E402
from hierarchy.loop.evaluate import score  # noqa: E402
from hierarchy.design.problem import Problem  # noqa: E402
from hierarchy.spec import load_spec  # noqa: E402

CIRCUITS = (("two-level", os.path.join(ROOT, "specs", "two-level.yaml")),
            ("six-area", os.path.join(ROOT, "benchmarks", "six-area.yaml")))
GOAL_SPEEDUP = 20.0
#: Objectives closer than this (relative) count as equal.
EQUAL_RTOL = 1e-6
UNSTABLE_VALUE = 1e6


# -- environment ---------------------------------------------------------------


def per_call(fn, seconds: float = 0.5) -> float:
    """Median time of one call of ``fn`` (after a warm-up)."""
    fn()
    times = []
    start = time.perf_counter()
    while len(times) < 20 or time.perf_counter() - start < seconds:
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


# -- the two optimisers ------------------------------------------------------------


def run_ours(spec, repeats: int) -> dict:
    runs = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        res = design_prices(spec, Options())
        runs.append((time.perf_counter() - t0, res))
    objectives = {r.objective for _, r in runs}
    res = runs[0][1]
    seconds = statistics.median(t for t, _ in runs)
    return {"seconds": seconds, "objective": res.objective, "iterations": res.iterations,
            "starts": res.restarts, "evaluations": res.evaluations, "status": res.status,
            "message": res.message, "repeats": repeats, "spread": (min(t for t, _ in runs), max(t for t, _ in runs)),
            "deterministic": len(objectives) == 1}


def run_naive(spec, time_limit: float) -> dict:
    """L-BFGS-B with finite-difference gradients on the value alone."""
    from scipy.optimize import minimize

    prob = Problem(spec)
    x0 = prob.pack(prob.informed_start())

    def value(theta):
        v = prob.value_and_grad(theta)[0]
        return v if np.isfinite(v) else UNSTABLE_VALUE

    state = {"nit": 0, "cut": False}
    deadline = time.perf_counter() + time_limit

    def callback(intermediate_result):
        state["nit"] += 1
        if time.perf_counter() > deadline:
            state["cut"] = True
            raise StopIteration

    evals0 = prob.evaluations
    t0 = time.perf_counter()
    res = minimize(value, x0, method="L-BFGS-B", callback=callback,
                   options={"maxiter": 15000, "maxfun": 10**6})
    seconds = time.perf_counter() - t0
    cut = state["cut"]
    rel = float(res.fun)
    # The exact score of the returned gains must be the objective the solver saw.
    exact = score(prob.layout, prob.unpack(res.x)).objective if rel < UNSTABLE_VALUE else float("inf")
    return {"seconds": seconds, "objective": prob.reference * rel, "exact": exact,
            "iterations": int(res.nit), "evaluations": prob.evaluations - evals0,
            "message": str(res.message), "success": bool(res.success), "cut": cut,
            "starts": 1, "prob": prob, "x0": x0}


def evaluation_costs(prob: Problem, x) -> tuple:
    """Per-call time of the value the naive optimiser uses (value and adjoint
    gradient, the gradient thrown away) and of the package's value-only
    evaluation, ``score`` (which also computes every per-area and per-link score)."""
    gains = prob.unpack(x)
    return per_call(lambda: prob.value_and_grad(x)), per_call(lambda: score(prob.layout, gains))


# -- report ------------------------------------------------------------------------


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true",
                    help="about 20 s: one run of ours, naive runs stopped after a few seconds")
    args = ap.parse_args(argv)
    repeats, naive_limit = (1, 7.0) if args.quick else (3, 900.0)

    print("design_speed: design_prices against naive L-BFGS-B with finite-difference gradients")
    for line in blas_header():
        print("  " + line)
    print(f"  hierarchy from {os.path.dirname(hierarchy.__file__)}, commit {code_version()}")
    print(f"  python {platform.python_version()}, numpy {np.__version__}, scipy {__import__('scipy').__version__}; "
          f"{'quick' if args.quick else 'full'} run: ours median of {repeats}, naive once"
          + (f" and stopped after {naive_limit:g} s" if args.quick else ""))
    print()
    t_start = time.perf_counter()
    results = []
    for name, path in CIRCUITS:
        spec = load_spec(path)
        ours = run_ours(spec, repeats)
        naive = run_naive(spec, naive_limit)
        vg, value_only = evaluation_costs(naive["prob"], naive["x0"])
        results.append((name, spec, ours, naive, vg, value_only))
        print(f"[{name}] {naive['prob'].size} free gains, closed loop {naive['prob'].layout.nxi} states; "
              f"ours: {ours['status']} ({ours['message']}); "
              f"naive: " + (f"STOPPED at the {naive_limit:g} s limit after {naive['iterations']} iterations"
                            if naive["cut"] else naive["message"]), flush=True)
    print()

    cols = (f"{'circuit':<10} {'who':<6} {'time s':>8} {'objective':>12} {'iters':>6} {'starts':>6} "
            f"{'evals':>7} {'ms/iter':>8} {'ms/eval':>8}")
    print(cols)
    print("-" * len(cols))
    for name, spec, ours, naive, vg, value_only in results:
        for who, r in (("ours", ours), ("naive", naive)):
            print(f"{name:<10} {who:<6} {r['seconds']:>8.2f} {r['objective']:>12.7f} {r['iterations']:>6d} "
                  f"{r['starts']:>6d} {r['evaluations']:>7d} {1e3 * r['seconds'] / max(r['iterations'], 1):>8.3f} "
                  f"{1e3 * r['seconds'] / max(r['evaluations'], 1):>8.3f}")
    print()
    cols = f"{'circuit':<10} {'speed-up':>9} {'rel. objective diff':>20}  goal (>= {GOAL_SPEEDUP:g}x, objective <= naive)"
    print(cols)
    print("-" * len(cols))
    all_met = True
    for name, spec, ours, naive, vg, value_only in results:
        speedup = naive["seconds"] / ours["seconds"]
        rel = (ours["objective"] - naive["objective"]) / abs(naive["objective"])
        not_worse = rel <= EQUAL_RTOL
        if naive["cut"]:
            verdict = f"undecided (naive stopped early: speed-up >= {speedup:.1f}x)"
            all_met = None if all_met is not False else False
        else:
            met = speedup >= GOAL_SPEEDUP and not_worse
            verdict = "MET" if met else "NOT MET" + ("" if speedup >= GOAL_SPEEDUP else " (too slow)") + \
                ("" if not_worse else " (objective higher)")
            if not met:
                all_met = False
        print(f"{name:<10} {speedup:>8.1f}x {rel:>+20.2e}  {verdict}")
    print()
    print("rel. objective diff = (ours - naive) / naive: negative means ours is lower (better);")
    print(f"objectives within {EQUAL_RTOL:g} relative count as equal.")
    print()
    print("Caveats:")
    for name, spec, ours, naive, vg, value_only in results:
        spread = ours["spread"]
        alt_time = naive["seconds"] - naive["evaluations"] * (vg - value_only)
        runs = (f"ours over {ours['repeats']} runs: {spread[0]:.2f}-{spread[1]:.2f} s, "
                + ("same objective every run" if ours["deterministic"] else "OBJECTIVE VARIED BETWEEN RUNS")
                if ours["repeats"] > 1 else "ours ran once")
        print(f"  [{name}] {runs}; naive objective re-scored exactly: {naive['exact']:.7f}")
        if naive["cut"]:
            continue
        print(f"  [{name}] the naive value computes the adjoint gradient and throws it away: "
              f"{1e3 * vg:.3f} ms per call, against {1e3 * value_only:.3f} ms for the value-only score(); "
              f"a naive run on score() would take about {alt_time:.1f} s, "
              f"a speed-up of about {alt_time / ours['seconds']:.1f}x")
    overall = {True: "MET on both circuits", False: "NOT MET", None: "UNDECIDED (quick run)"}[all_met]
    print()
    print(f"goal (>= {GOAL_SPEEDUP:g}x faster, objective equal or lower): {overall}")
    print(f"(measured in {time.perf_counter() - t_start:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
