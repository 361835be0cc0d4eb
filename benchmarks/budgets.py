"""Budget form: block coordinate descent with a CVXPY allocation, against
today's augmented Lagrangian and against the price form.

Circuits come from ``hierarchy.spec.generate`` (``A`` areas on ``A / 2``
levels, area dimension 2, density 0.175, seed 0, the links sent by areas
unpriced). Each gets two budget sets built from the generator's per-level
budgets (total ``T``, their sum):

* ``total``: one budget over every link sent by an area, total ``T``;
* ``overlap``: three overlapping budgets: that one, the predictions among
  them at ``0.3 T``, and the links sent from the lower half of the levels at
  ``0.5 T``.

For each circuit and set it prints the budget form's status, objective and
time; the same for the baseline (commit ``BASELINE``, unpacked with
``git archive`` into a temporary folder and run in its own process); and
the price form on the same circuit at the prices the budget form's shadow
prices imply (``lambda = W' mu``), with the ratio of the two times. Every
run is a fresh child process.

Then, on 5 specs, each budget's shadow price against the central finite
difference of the designed objective over its total (step ``1e-3`` of the
total; the two neighbouring designs are warm-started from the middle one,
so that all three are the same local optimum). The middle design, whose
shadow prices are checked, runs at the default options; the neighbours,
the reference, at ``REFERENCE`` tolerances: at the defaults their
objectives are only good to about 1e-9, and on the generated 4-area
circuit the difference quotient then moved by 2e-4 to 5e-4 between steps
of 3e-4, 1e-3 and 3e-3 of the total, more than the 1e-4 it is to check.
At ``REFERENCE`` the steps of 3e-4 and 1e-3 agree to 2e-5 on all three of
its budgets (the total's slope curves: at 3e-3 it is 1.4e-4 off).

    python benchmarks/budgets.py            # 8, 16, 32 areas (about 15 minutes)
    python benchmarks/budgets.py --quick    # 8 and 16 areas, 3 specs for the slopes
    python benchmarks/budgets.py --slopes   # only the shadow prices, 5 specs (about a minute)
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

BASELINE = "1dc04ee"
DENSITY, SEED = 0.175, 0
FD_STEP = 1e-3
FD_RTOL = 1e-4
#: Options of the neighbouring designs of the finite difference (the reference).
REFERENCE = dict(gtol=1e-9, ftol=1e-15, budget_rtol=1e-7)


def circuit_text(areas: int, kind: str) -> str:
    """Spec text of a generated circuit with the ``total`` or ``overlap`` budgets."""
    from hierarchy.spec.generate import generate_spec_text
    from hierarchy.spec import parse_spec

    levels = max(areas // 2, 1)
    text = generate_spec_text(areas=areas, levels=levels, density=DENSITY, seed=SEED, area_dim=2, budgets=True)
    spec = parse_spec(text)
    head = text[:text.index("budgets:")]
    ids = [lid for b in spec.budgets for lid in b.links]
    T = sum(b.total for b in spec.budgets)
    rows = [("total", ids, T)]
    if kind == "overlap":
        low = [lid for b in spec.budgets if int(b.name.split("-")[1]) <= levels // 2 for lid in b.links]
        pred = [lid for lid in ids if spec.link(lid).kind == "prediction"]
        rows += [("predictions", pred, 0.3 * T), ("lower", low, 0.5 * T)]
    return head + "budgets:\n" + "".join(f"  - {{name: {n}, links: [{', '.join(l)}], total: {t!r}}}\n"
                                         for n, l, t in rows)


# -- children ------------------------------------------------------------------

def child_budget(path: str) -> dict:
    from hierarchy.design import design_budgets
    from hierarchy.spec import load_spec

    spec = load_spec(path)
    t0, c0 = time.perf_counter(), time.process_time()
    res = design_budgets(spec)
    return {"seconds": time.perf_counter() - t0, "cpu": time.process_time() - c0,
            "status": res.status, "message": res.message,
            "objective": res.objective, "iterations": res.iterations,
            "mu": {name: b.shadow_price for name, b in res.budgets.items()},
            "met": all(b.met for b in res.budgets.values())}


def child_price(path: str, mu: dict) -> dict:
    import numpy as np

    from hierarchy.design.allocation import constraints
    from hierarchy.design import design_prices
    from hierarchy.design.problem import Problem
    from hierarchy.spec import load_spec

    spec = load_spec(path)
    rows = constraints(spec)
    prices = Problem(spec).prices + rows.W.T @ np.array([mu[n] for n in rows.names])
    t0, c0 = time.perf_counter(), time.process_time()
    res = design_prices(spec, prices=prices)
    return {"seconds": time.perf_counter() - t0, "cpu": time.process_time() - c0, "status": res.status,
            "iterations": res.iterations}


BASELINE_CHILD = """
import json, sys, time
sys.path.insert(0, sys.argv[1])
from hierarchy.design import design_budgets
from hierarchy.spec import load_spec
spec = load_spec(sys.argv[2])
t0, c0 = time.perf_counter(), time.process_time()
res = design_budgets(spec)
print(json.dumps({"seconds": time.perf_counter() - t0, "cpu": time.process_time() - c0,
                  "status": res.status, "objective": res.objective,
                  "iterations": res.iterations, "met": all(b.met for b in res.budgets.values())}))
"""


def run_child(args: list, cwd=None, pythonpath=None) -> dict:
    env = dict(os.environ, OPENBLAS_NUM_THREADS=os.environ.get("OPENBLAS_NUM_THREADS", "1"))
    if pythonpath:
        env["PYTHONPATH"] = pythonpath
    out = subprocess.run([sys.executable] + args, capture_output=True, text=True, cwd=cwd, env=env)
    if out.returncode != 0:
        raise RuntimeError(f"child {args[:3]} failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def baseline_tree(folder: str) -> str:
    """Unpack the baseline commit's tree into ``folder``; returns its path."""
    os.makedirs(folder, exist_ok=True)
    archive = subprocess.run(["git", "-C", ROOT, "archive", BASELINE], capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", folder], input=archive, check=True)
    return folder


# -- shadow prices against finite differences ----------------------------------

def slope_specs(quick: bool) -> list:
    """(label, spec text) for the finite-difference check."""
    filt = """spec: 1
world:
  states:
    x: {dim: 1, dynamics: 0.9, noise: 0.19}
sensors:
  s: {observes: {x: 1}, noise: 0.2}
areas:
  a: {tracks: x}
links:
  - {from: s, to: a, kind: residual, noise: 0.1}
  - {from: a, to: s, kind: prediction, noise: 0.1}
budgets: [{name: b, links: all, total: 0.6}]
"""
    lines = ["spec: 1", "world:", "  states:"]
    s, N = [3.0, 2.0, 1.5, 0.8], [0.3, 0.5, 0.4, 0.6]
    lines += [f"    x{i}: {{dim: 1, dynamics: 0, noise: {v}}}" for i, v in enumerate(s)]
    lines += ["sensors:"] + [f"  s{i}: {{observes: {{x{i}: 1}}, noise: 0}}" for i in range(4)]
    lines += ["areas:"] + [f"  a{i}: {{tracks: x{i}, lag: 1}}" for i in range(4)]
    lines += ["links:"] + [f"  - {{from: s{i}, to: a{i}, kind: residual, noise: {n}}}" for i, n in enumerate(N)]
    sources = "\n".join(lines) + "\n"
    overlap = sources + """budgets:
  - {name: all, links: all, total: 2.0}
  - {name: left, links: [s0->a0, s1->a1], total: 0.8}
  - {name: right, links: [s1->a1, s2->a2, s3->a3], total: 1.5, costs: {s3->a3: 2.0}}
"""
    capped = sources + "budgets: [{name: b, links: all, total: 2.0, costs: {s1->a1: 2.5}, caps: {s2->a2: 0.2}}]\n"
    with open(os.path.join(ROOT, "specs", "two-senses.yaml")) as f:
        two = f.read()
    out = [("filter (predictive, 1 budget)", filt), ("two-senses.yaml", two),
           ("4 sources, 3 overlapping", overlap)]
    if not quick:
        out += [("4 sources, weights + cap", capped), ("generated 4 areas, 3 overlapping", circuit_text(4, "overlap"))]
    return out


def finite_differences(text: str) -> list:
    """Rows (budget, shadow price, finite difference, relative gap) for one spec."""
    from dataclasses import replace

    from hierarchy.design import design_budgets
    from hierarchy.design.result import Options
    from hierarchy.spec import parse_spec

    spec = parse_spec(text)
    mid = design_budgets(spec)
    tight = Options(**REFERENCE)
    rows = []
    for k, b in enumerate(spec.budgets):
        if b.total <= 0:
            continue
        h = FD_STEP * b.total

        def at(total):
            budgets = tuple(replace(x, total=total) if i == k else x for i, x in enumerate(spec.budgets))
            return design_budgets(replace(spec, budgets=budgets), tight, start=mid.gains)

        up, down = at(b.total + h), at(b.total - h)
        fd = -(up.objective - down.objective) / (2 * h)
        mu = mid.budgets[b.name].shadow_price
        if mu > 0:
            gap = abs(mu - fd) / max(abs(fd), 1e-300)
        else:  # a slack budget: the objective must not move with its total
            gap = abs(fd) * b.total / max(abs(mid.objective), 1e-300)
        rows.append((b.name + ("" if mu > 0 else " (slack)"), mid.status, mu, fd, gap, up.status, down.status))
    return rows


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="8 and 16 areas, 3 specs for the slopes")
    parser.add_argument("--slopes", action="store_true", help="only the shadow prices against finite differences")
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        kind, path = args.child[0], args.child[1]
        out = child_budget(path) if kind == "budget" else child_price(path, json.loads(args.child[2]))
        print(json.dumps(out))
        return
    from _env import blas_header, code_version

    print(f"benchmarks/budgets.py: measured {code_version()}, baseline {BASELINE}")
    for line in blas_header():
        print(line)
    sizes = () if args.slopes else (8, 16) if args.quick else (8, 16, 32)
    me = os.path.abspath(__file__)
    header = (f"{'areas':>5} {'links':>5} {'budgets':>8} | {'status':<15} {'objective':>11} {'iter':>5} "
              f"{'cpu s':>6} | {'baseline status':<15} {'objective':>11} {'cpu s':>6} | {'obj vs base':>11} | "
              f"{'price form':<15} {'iter':>5} {'cpu s':>6} | {'cpu ratio':>9} {'wall ratio':>10}")
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        if not sizes:
            return slopes(args.quick)
        base = baseline_tree(os.path.join(tmp, "baseline"))
        for areas in sizes:
            for kind in ("total", "overlap"):
                path = os.path.join(tmp, f"c{areas}-{kind}.yaml")
                text = circuit_text(areas, kind)
                with open(path, "w") as f:
                    f.write(text)
                from hierarchy.spec import parse_spec

                nlinks = len(parse_spec(text).links)
                ours = run_child([me, "--child", "budget", path])
                old = run_child(["-c", BASELINE_CHILD, base, path], cwd=tmp, pythonpath=base)
                price = run_child([me, "--child", "price", path, json.dumps(ours["mu"])])
                rel = (ours["objective"] - old["objective"]) / abs(old["objective"])
                rows.append(f"{areas:>5} {nlinks:>5} {kind:>8} | {ours['status']:<15} {ours['objective']:>11.6g} "
                            f"{ours['iterations']:>5} {ours['cpu']:>6.1f} | {old['status']:<15} "
                            f"{old['objective']:>11.6g} {old['cpu']:>6.1f} | {rel:>+11.2e} | "
                            f"{price['status']:<15} {price['iterations']:>5} {price['cpu']:>6.1f} | "
                            f"{ours['cpu'] / price['cpu']:>9.2f} {ours['seconds'] / price['seconds']:>10.2f}")
                print(rows[-1] if len(rows) > 1 else header + "\n" + rows[-1], flush=True)
                if ours["status"] != "converged":
                    print(f"      ({areas} areas, {kind}: {ours['message']})", flush=True)
    print("\n'obj vs base': (budget form - baseline) / |baseline| (negative: lower objective, better);")
    print("'cpu ratio' ('wall ratio'): budget form CPU (wall) time / price form's at the budget form's shadow")
    print("prices, same circuit; CPU time is the steadier on a shared machine.")
    slopes(args.quick)


def slopes(quick: bool):
    print(f"\nShadow prices against the central finite difference of the designed objective "
          f"(step {FD_STEP:g} of the total, neighbours warm-started from the middle design, at {REFERENCE}):")
    print(f"{'spec':<34} {'budget':<12} {'status':<15} {'shadow price':>13} {'finite diff':>13} {'rel gap':>9} ok")
    worst = 0.0
    for label, text in slope_specs(quick):
        for name, status, mu, fd, gap, up, down in finite_differences(text):
            worst = max(worst, gap)
            print(f"{label:<34} {name:<12} {status:<15} {mu:>13.7g} {fd:>13.7g} {gap:>9.1e} "
                  f"{'yes' if gap <= FD_RTOL else 'NO'}" + ("" if up == down == "converged" else
                                                               f" (neighbours: {up}, {down})"), flush=True)
    print(f"largest relative gap {worst:.1e} (goal <= {FD_RTOL:g})")


if __name__ == "__main__":
    main()
