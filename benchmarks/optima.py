"""How close the default design comes to the best design known, on circuits
built to trap a local search.

Each case is a circuit of our own whose landscape has a known trap: a stream
of silent links that only pays with all of them on, a prediction layer that
a search started without it never grows, a nested pair of architectures,
links that are silent at the optimum, budgets from 0.01x to 100x of a useful
level. Its best known objective is the lowest of a closed form (where one
exists, named beside it), the default design, and an exhaustive multistart
(many more random starts, longer probes, several seeds, and, for a circuit
with predictions, a design of its feed-forward sub-circuit carried on).

Printed tables:

1. per case: best known, the default design, their relative gap (goal: at
   most 1e-4), status and how many of the designer's searches agree;
2. nested pairs (a circuit and the same circuit with more links): the
   larger one's default design is never worse than the smaller one's;
3. a warm-started ``compare`` over 10 budgets against direct designs of
   the same specs at the same budgets (never worse);
4. default design time of each example spec against the code of a baseline
   commit (``--baseline``, default the commit before this work), run in
   subprocesses of this same run (goal: within 3x).

    python benchmarks/optima.py            # everything (several minutes)
    python benchmarks/optima.py --quick    # fewer multistart seeds, no timing table
"""

from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

from _env import blas_header, code_version  # noqa: E402

from hierarchy.design import AGREE_RTOL, Options, design  # noqa: E402
from hierarchy.spec.generate import generate_spec_text  # noqa: E402
from hierarchy.spec import load_spec, parse_spec  # noqa: E402
from hierarchy.studies import compare, grid, set_value  # noqa: E402
from hierarchy.design.subcircuit import embed, without_predictions  # noqa: E402

GOAL = 1e-4
BASELINE = "71e4662"

# -- the trap circuits (scenarios of our own) --------------------------------------

RELAY_CHAIN = """
spec: 1
name: {name}
world:
  states:
    level: {{dim: 1, dynamics: 0.95, noise: 0.05}}
sensors:
  gauge: {{observes: {{level: 1}}, noise: 0.05}}
areas:
{relays}
  top: {{tracks: level, weight: 1.0}}
links:
{links}
"""


def relay_chain(hops: int, price: float) -> str:
    """A river gauge whose readings reach the only targeted area through
    ``hops - 1`` untargeted relays: every link is useless unless all are on."""
    names = [f"relay{i}" for i in range(1, hops)]
    relays = "\n".join(f"  {n}: {{dim: 1}}" for n in names)
    chain = ["gauge"] + names + ["top"]
    links = "\n".join(f"  - {{from: {a}, to: {b}, kind: residual, noise: 0.02, price: {price}}}"
                      for a, b in zip(chain[:-1], chain[1:]))
    return RELAY_CHAIN.format(name=f"relay chain of {hops} hops", relays=relays, links=links)


TWO_RELAYS = """
spec: 1
name: two gauges through relays
world:
  states:
    flow: {dim: 2, dynamics: [[0.9, 0.1], [0.0, 0.8]], noise: [0.05, 0.05]}
sensors:
  near: {observes: {flow: [[1.0, 0.0]]}, noise: 0.05}
  far: {observes: {flow: [[0.3, 1.0]]}, noise: 0.1}
areas:
  near-relay: {dim: 1}
  far-relay: {dim: 1}
  hub: {tracks: flow, weight: 1.0}
links:
  - {from: near, to: near-relay, kind: residual, noise: 0.02, price: 0.01}
  - {from: far, to: far-relay, kind: residual, noise: 0.02, price: 0.01}
  - {from: near-relay, to: hub, kind: residual, noise: 0.02, price: 0.01}
  - {from: far-relay, to: hub, kind: residual, noise: 0.02, price: 0.01}
  - {from: hub, to: near-relay, kind: prediction, noise: 0.02, price: 0.01}
"""


def uncoded(variance, noise, price) -> str:
    """A memoryless source sent once over a priced Gaussian link (lag 1)."""
    return f"""
spec: 1
name: uncoded link
world:
  states:
    x: {{dim: 1, dynamics: 0, noise: {variance}}}
sensors:
  s: {{observes: {{x: 1}}, noise: 0}}
areas:
  a: {{tracks: x, lag: 1}}
links:
  - {{from: s, to: a, kind: residual, noise: {noise}, price: {price}}}
"""


def uncoded_closed_form(variance, noise, price) -> float:
    # Uncoded transmission (Goblick 1965): error s2 / (1 + P/N); the priced
    # optimum of s2/(1 + P/N) + price P is P = N (sqrt(s2/(N price)) - 1) when
    # positive, giving 2 sqrt(s2 N price) - price N; otherwise silence, s2.
    r = math.sqrt(variance / (noise * price))
    return 2 * math.sqrt(variance * noise * price) - price * noise if r > 1 else variance


SHARED = [3.0, 1.0, 0.2], [0.5, 1.0, 0.3]


def shared_budget(total) -> str:
    """Independent memoryless sources on separate links under one budget."""
    (var, noise) = SHARED
    k = len(var)
    lines = ["spec: 1", "name: three sources, one budget", "world:", "  states:"]
    lines += [f"    x{i}: {{dim: 1, dynamics: 0, noise: {v}}}" for i, v in enumerate(var)]
    lines += ["sensors:"] + [f"  s{i}: {{observes: {{x{i}: 1}}, noise: 0}}" for i in range(k)]
    lines += ["areas:"] + [f"  a{i}: {{tracks: x{i}, lag: 1}}" for i in range(k)]
    lines += ["links:"] + [f"  - {{from: s{i}, to: a{i}, kind: residual, noise: {n}}}" for i, n in enumerate(noise)]
    lines += [f"budgets: [{{name: total, links: all, total: {total}}}]"]
    return "\n".join(lines) + "\n"


def shared_closed_form(total) -> float:
    # Water-filling over uncoded links (model.md's closed-form KKT solution):
    # P_i = max(0, sqrt(s_i N_i / mu) - N_i), sum P_i = B.
    from scipy.optimize import brentq

    var, noise = SHARED
    used = lambda mu: sum(max(0.0, math.sqrt(s * n / mu) - n) for s, n in zip(var, noise)) - total
    mu = brentq(used, 1e-14, 1e8, xtol=1e-300, rtol=1e-15)
    P = [max(0.0, math.sqrt(s * n / mu) - n) for s, n in zip(var, noise)]
    return sum(s / (1 + p / n) for s, n, p in zip(var, noise, P))


def with_total(spec, total):
    return set_value(spec, f"budgets[{spec.budgets[0].name}].total", total)


def cases():
    """(name, spec, closed form or None)."""
    ex = lambda name: load_spec(ROOT / "specs" / f"{name}.yaml")
    pred = ex("compare-predictive")
    out = [
        ("two-senses (pad stream)", ex("two-senses"), None),
        ("two-senses, price form", set_value(without_budget(ex("two-senses")), "links[camera-view->fused].price",
                                             0.005), None),
        ("relay chain, 2 hops", parse_spec(relay_chain(2, 0.002)), None),
        ("relay chain, 3 hops", parse_spec(relay_chain(3, 0.002)), None),
        ("relay chain, 4 hops", parse_spec(relay_chain(4, 0.002)), None),
        ("two gauges via relays", parse_spec(TWO_RELAYS), None),
        ("nested, budget 0.01x", with_total(pred, 0.02), None),
        ("nested, budget 1x", with_total(pred, 2.0), None),
        ("nested, budget 100x", with_total(pred, 200.0), None),
        ("uncoded, silent optimum", parse_spec(uncoded(1.0, 0.5, 4.0)), uncoded_closed_form(1.0, 0.5, 4.0)),
        ("uncoded, active optimum", parse_spec(uncoded(2.0, 0.5, 0.05)), uncoded_closed_form(2.0, 0.5, 0.05)),
        ("shared budget 0.01x", parse_spec(shared_budget(0.04)), shared_closed_form(0.04)),
        ("shared budget 100x", parse_spec(shared_budget(400.0)), shared_closed_form(400.0)),
        ("two-level example", ex("two-level"), None),
        ("deep example", ex("compare-deep"), None),
        ("generated, 4 areas", parse_spec(generate_spec_text(4, 2, 0.6, seed=3)), None),
    ]
    return out


def without_budget(spec):
    """Two-senses in price form: the budget's links get a price instead."""
    priced = {lid for b in spec.budgets for lid in b.links}
    links = tuple(replace(l, price=0.01) if l.id in priced and l.price == 0 else l for l in spec.links)
    return replace(spec, links=links, budgets=())


def exhaustive(spec, seeds):
    """The lowest objective of many heavier searches."""
    best = math.inf
    for seed in seeds:
        r = design(spec, Options(restarts=16, probe_iter=150, max_iter=6000, seed=seed), compare_unpinned=False)
        if _usable(r):
            best = min(best, r.objective)
    sub = without_predictions(spec)
    if sub is not None:
        part = design(sub, Options(restarts=16, probe_iter=150, seed=seeds[0]), compare_unpinned=False)
        r = design(spec, Options(max_iter=6000), start=embed(part.gains, sub, spec), compare_unpinned=False)
        if _usable(r):
            best = min(best, r.objective)
    return best


def _usable(r) -> bool:
    return math.isfinite(r.objective) and all(b.met for b in r.budgets.values())


def rel(a, b) -> float:
    return (a - b) / max(abs(b), 1e-300)


def table_optima(seeds):
    print(f"1. default design vs best known (goal: gap <= {GOAL:g}; exhaustive multistart: seeds {list(seeds)})")
    print(f"{'case':28s} {'best known':>12s} {'source':>12s} {'default':>12s} {'gap':>10s} "
          f"{'status':>10s} {'agree':>6s} {'time':>7s}  ok")
    fails = 0
    for name, spec, closed in cases():
        t0 = time.perf_counter()
        r = design(spec, compare_unpinned=False)
        dt = time.perf_counter() - t0
        heavy = exhaustive(spec, seeds)
        known = min(v for v in (closed, heavy, r.objective if _usable(r) else math.inf) if v is not None)
        source = "closed form" if closed is not None and closed <= known * (1 + 1e-9) else (
            "multistart" if heavy <= r.objective else "default")
        gap = rel(r.objective, known)
        ok = gap <= GOAL and _usable(r)
        fails += not ok
        k, n = r.agreement
        print(f"{name:28s} {known:12.7f} {source:>12s} {r.objective:12.7f} {gap:10.2e} {r.status:>10s} "
              f"{k}/{n:<4d} {dt:6.2f}s  {'yes' if ok else 'NO'}")
    return fails


def table_nested():
    print("\n2. nested pairs: the larger circuit's default design is never worse than the smaller one's")
    print(f"{'pair':44s} {'smaller':>12s} {'larger':>12s} {'larger-smaller':>15s}  ok")
    ex = lambda name: load_spec(ROOT / "specs" / f"{name}.yaml")
    pairs = []
    for total in (0.02, 0.2, 2.0, 20.0, 200.0):
        pairs.append((f"ship deck, budget {total:g}", with_total(ex("compare-flat"), total),
                      with_total(ex("compare-predictive"), total)))
    for name in ("two-senses", "two-level", "single-loop"):
        big = ex(name)
        pairs.append((f"{name} without / with predictions", without_predictions(big), big))
    fails = 0
    for name, small, big in pairs:
        rs, rb = design(small, compare_unpinned=False), design(big, compare_unpinned=False)
        d = rb.objective - rs.objective
        ok = d <= 1e-9 * abs(rs.objective)
        fails += not ok
        print(f"{name:44s} {rs.objective:12.7f} {rb.objective:12.7f} {d:15.3e}  {'yes' if ok else 'NO'}")
    return fails


def table_compare():
    print("\n3. warm-started compare over 10 budgets vs direct designs at the same budgets (never worse beyond "
          f"{AGREE_RTOL:g}, the tolerance within which the designer calls two searches agreeing)")
    ex = lambda name: load_spec(ROOT / "specs" / f"{name}.yaml")
    flat, pred = ex("compare-flat"), ex("compare-predictive")
    totals = list(grid(0.02, 200.0, 10, log=True))
    t0 = time.perf_counter()
    st = compare([flat, pred], totals, workers=1)
    dt = time.perf_counter() - t0
    print(f"{'spec':20s} {'budget':>9s} {'compare':>12s} {'direct':>12s} {'excess':>10s} {'search':>18s}  ok")
    fails = 0
    for row in st.rows:
        base = flat if row["spec"] == "compare-flat" else pred
        direct = design(with_total(base, row["budget"]), compare_unpinned=False)
        excess = rel(row["objective"], direct.objective)
        ok = excess <= AGREE_RTOL
        fails += not ok
        print(f"{row['spec']:20s} {row['budget']:9.3g} {row['objective']:12.7f} {direct.objective:12.7f} "
              f"{excess:10.2e} {row['search']:>18s}  {'yes' if ok else 'NO'}")
    print(f"best: {[(b['best'], b['from'], b['to']) for b in st.extra['best']]}; compare took {dt:.1f} s")
    return fails


TIMER = """
import sys, time
from hierarchy.design import design
from hierarchy.spec import load_spec
for path in sys.argv[1:]:
    spec = load_spec(path)
    best = min(_t for _t in [(lambda t0: (design(spec), time.perf_counter() - t0)[1])(time.perf_counter())
                             for _ in range(3)])
    print(path, best)
"""


def table_timing(baseline):
    print(f"\n4. default design time of each example spec: this tree vs commit {baseline} (best of 3, goal <= 3x)")
    specs = sorted(str(p) for p in (ROOT / "specs").glob("*.yaml"))
    with tempfile.TemporaryDirectory() as tmp:
        subprocess.run(f"git -C {ROOT} archive {baseline} hierarchy | tar -x -C {tmp}", shell=True, check=True)
        times = {}
        for label, path in (("baseline", tmp), ("now", str(ROOT))):
            env = {**os.environ, "PYTHONPATH": path, "OPENBLAS_NUM_THREADS": "1"}
            out = subprocess.run([sys.executable, "-c", TIMER, *specs], env=env, capture_output=True, text=True,
                                 check=True, cwd=ROOT).stdout
            times[label] = {line.split()[0]: float(line.split()[1]) for line in out.splitlines()}
    fails = 0
    print(f"{'spec':32s} {'baseline':>9s} {'now':>9s} {'ratio':>7s}  ok")
    for p in specs:
        b, n = times["baseline"][p], times["now"][p]
        ok = n <= 3 * b
        fails += not ok
        print(f"{Path(p).name:32s} {b:8.2f}s {n:8.2f}s {n / b:7.2f}  {'yes' if ok else 'NO'}")
    return fails


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="one multistart seed, no timing table")
    ap.add_argument("--baseline", default=BASELINE, help="commit whose designer the timing table runs")
    args = ap.parse_args(argv)
    print(f"code: {code_version()}")
    print("\n".join(blas_header()))
    fails = table_optima((0,) if args.quick else (0, 1, 2))
    fails += table_nested()
    fails += table_compare()
    if not args.quick:
        fails += table_timing(args.baseline)
    print(f"\n{'all goals met' if fails == 0 else f'{fails} row(s) miss their goal'}")
    return 0 if fails == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
