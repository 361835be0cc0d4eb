"""Scale: the acceptance table of issue 12 on generated layered circuits.

Circuits come from ``hierarchy.spec.generate`` (``A`` areas on ``A / 2`` levels,
area dimension 2, world dimension ``A``, seed 0) at two densities: the
generator's default 0.2 (about 326 links at 32 areas, 2,047 at 91) and the
density that gives about 10 links per area. Each is designed in three
forms:

* ``price``: the spec's link prices (``design_prices``);
* ``budget-1``: the links sent by areas unpriced under one total budget;
* ``budget-3``: the same links under three overlapping budgets (lower
  two thirds of the sending levels, upper two thirds, all of them).

Every run is a fresh child process with one BLAS thread, so that its peak
memory (``ru_maxrss``) is its own. The same circuit is also designed by the
baseline commit (``--baseline``, default 1dc04ee, checked out with ``git
archive`` into a temporary folder) in its own child, and the objectives are
compared (``rel`` = (ours - baseline) / |baseline|, negative is better).
Each child times one exact value-and-gradient at the informed start and one
bare ``scipy.linalg.solve_discrete_lyapunov`` of the closed loop's size (a
random stable matrix), medians of several, and prints their ratio.

    python benchmarks/scale.py --quick                 # 8 and 16 areas, price form, default density
    python benchmarks/scale.py --sizes 8,16,32         # price form, both densities
    python benchmarks/scale.py --sizes 32 --forms price,budget-1,budget-3
    python benchmarks/scale.py --sizes 64,91 --no-baseline   # the baseline takes many minutes there
    python benchmarks/scale.py --evaluate-only              # evaluation times only, both commits
    python benchmarks/scale.py --dask-sweep 91              # a price sweep at 91 areas on a local Dask cluster

Baseline results are kept in ``--cache`` (a JSON file in the temporary
folder by default), so a second run does not redesign them. Wall times
depend on what else the machine runs; CPU times are printed too.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, HERE)

SIZES = (8, 16, 32, 64, 91)
FORMS = ("price", "budget-1", "budget-3")
DEFAULT_DENSITY, LINKS_PER_AREA, SEED = 0.2, 10, 0
#: Acceptance of issue 12 (seconds): 32 areas / about 300 links, 91 areas / about 2,000 links.
LIMITS = {(32, "price"): 15, (32, "budget"): 30, (91, "price"): 300, (91, "budget"): 600}
MEMORY_MIB = 2048


def _part(new: str, old: str):
    """A module of the package by its name in rooms (``hierarchy.spec.generate``)
    or, in a baseline from before the layout move, by its flat name."""
    import importlib

    try:
        return importlib.import_module(new)
    except ImportError:
        return importlib.import_module(old)


def generate_spec_text(**kw):
    return _part("hierarchy.spec.generate", "hierarchy.generate").generate_spec_text(**kw)


def circuit_text(areas: int, density: float, form: str) -> str:
    """YAML of one benchmark circuit in one form."""

    text = generate_spec_text(areas=areas, levels=max(areas // 2, 1), density=density, seed=SEED,
                              area_dim=2, budgets=form != "price")
    if form == "price":
        return text
    head, _, tail = text.partition("\nbudgets:\n")
    groups = []  # (level, [ids], total) as the generator wrote them
    for line in tail.splitlines():
        inner = line.strip()[3:-1]
        name = inner.split("name: ")[1].split(",")[0]
        ids = inner.split("links: [")[1].split("]")[0].split(", ")
        total = float(inner.split("total: ")[1])
        groups.append((int(name.split("-")[1]), ids, total))
    groups.sort()
    if form == "budget-1":
        budgets = [("total", [i for _, ids, _ in groups for i in ids], sum(t for *_, t in groups))]
    else:
        k = max(1, round(2 * len(groups) / 3))
        low, high = groups[:k], groups[-k:]
        budgets = [("lower", [i for _, ids, _ in low for i in ids], sum(t for *_, t in low)),
                   ("upper", [i for _, ids, _ in high for i in ids], sum(t for *_, t in high)),
                   ("total", [i for _, ids, _ in groups for i in ids], 0.9 * sum(t for *_, t in groups))]
    lines = [f"  - {{name: {name}, links: [{', '.join(ids)}], total: {total:.6g}}}" for name, ids, total in budgets]
    return head + "\nbudgets:\n" + "\n".join(lines) + "\n"


def density_for(areas: int) -> float:
    """The density that gives the generated circuit about LINKS_PER_AREA links per area."""
    from hierarchy.spec import parse_spec

    def links(d):
        return len(parse_spec(generate_spec_text(areas=areas, levels=max(areas // 2, 1), density=d,
                                                 seed=SEED, area_dim=2)).links)

    lo, hi = 0.0, 1.0
    for _ in range(14):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if links(mid) < LINKS_PER_AREA * areas else (lo, mid)
    return round(hi, 4)


# -- one run (child process) ---------------------------------------------------------


def median_time(fn, runs: int = 5, seconds: float = 1.0) -> float:
    import statistics

    fn()
    times, start = [], time.perf_counter()
    while len(times) < runs or (time.perf_counter() - start < seconds and len(times) < 100):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def child(job: dict) -> dict:
    import resource

    sys.path.insert(0, job["root"])
    import numpy as np
    import scipy.linalg as sla

    import hierarchy
    from hierarchy.design import Options, design_budgets, design_prices
    from hierarchy.spec import parse_spec

    Problem = _part("hierarchy.design.problem", "hierarchy.problem").Problem

    assert os.path.dirname(os.path.dirname(os.path.abspath(hierarchy.__file__))) == job["root"]
    spec = parse_spec(circuit_text(job["areas"], job["density"], job["form"]))
    prob = Problem(spec)
    nxi = prob.layout.nxi
    rng = np.random.default_rng(0)
    A = rng.standard_normal((nxi, nxi))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    out = {"links": len(spec.links), "nxi": nxi, "free": prob.size,
           "lyap": median_time(lambda: sla.solve_discrete_lyapunov(A, np.eye(nxi)))}
    x = prob.pack(prob.informed_start())

    def value_grad():
        prob._last = None  # (a Problem that keeps its last solve would only redo the adjoint)
        prob.value_and_grad(x)

    out["value_grad"] = median_time(value_grad)
    if not job.get("design", True):
        return out
    run = design_prices if job["form"] == "price" else design_budgets
    c0, t0 = time.process_time(), time.perf_counter()
    res = run(spec, Options())
    out.update(seconds=time.perf_counter() - t0, cpu=time.process_time() - c0, iterations=res.iterations,
               evaluations=res.evaluations, status=res.status, message=res.message, objective=res.objective,
               silent=len(res.silent), peak_mib=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
               budgets_met=all(b.met for b in res.budgets.values()))
    return out


def measure(job: dict) -> dict:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    env.pop("PYTHONPATH", None)
    done = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", json.dumps(job)],
                          env=env, capture_output=True, text=True)
    if done.returncode != 0:
        return {"error": done.stderr.strip().splitlines()[-1] if done.stderr.strip() else "no output"}
    return json.loads(done.stdout.strip().splitlines()[-1])


# -- the table ---------------------------------------------------------------------------


def baseline_root(commit: str) -> str:
    """A checkout of ``commit`` (``git archive``) in a temporary folder, kept between runs."""
    root = os.path.join(tempfile.gettempdir(), f"hierarchy-baseline-{commit}")
    if not os.path.isdir(os.path.join(root, "hierarchy")):
        os.makedirs(root, exist_ok=True)
        archive = subprocess.run(["git", "-C", HERE, "archive", commit], capture_output=True, check=True).stdout
        subprocess.run(["tar", "-x", "-C", root], input=archive, check=True)
    return root


def limit_of(areas: int, form: str):
    return LIMITS.get((areas, "price" if form == "price" else "budget"))


def evaluate_only(sizes, kinds, base_root) -> int:
    """The evaluation columns alone: one value-and-gradient of this commit
    and of the baseline on each circuit (price form), beside one bare
    Lyapunov solve."""
    header = (f"{'areas':>5} {'links':>5} {'states':>6} {'gains':>6} {'v+g ms':>8} {'base v+g':>8} {'speed-up':>8} "
              f"{'lyap ms':>8} {'x':>5} {'base x':>6}")
    print()
    print(header)
    print("-" * len(header))
    for areas in sizes:
        for kind in kinds:
            density = DEFAULT_DENSITY if kind == "default" else density_for(areas)
            job = {"areas": areas, "density": density, "form": "price", "design": False}
            r = measure(dict(job, root=HERE))
            b = measure(dict(job, root=base_root)) if base_root else {"value_grad": float("nan")}
            print(f"{areas:>5} {r['links']:>5} {r['nxi']:>6} {r['free']:>6} {1e3 * r['value_grad']:>8.2f} "
                  f"{1e3 * b['value_grad']:>8.2f} {b['value_grad'] / r['value_grad']:>8.2f} {1e3 * r['lyap']:>8.2f} "
                  f"{r['value_grad'] / r['lyap']:>5.2f} {b['value_grad'] / r['lyap']:>6.2f}", flush=True)
    print("v+g = one exact value and gradient at the informed start (medians, each commit in its own child);")
    print("speed-up = base / ours; lyap = one bare solve_discrete_lyapunov of the closed loop's size; x = v+g / lyap")
    return 0


#: The Dask sweep: every prediction link's price set to each value in turn.
SWEEP_PATH = "links[kind:prediction].price"
SWEEP_VALUES = (0.05, 0.1, 0.2, 0.4)


def dask_sweep(areas: int, workers: int) -> int:
    """A sweep of the ``areas``-area circuit (default density) over
    ``SWEEP_VALUES`` of ``SWEEP_PATH``, its points run on a local Dask
    cluster of ``workers`` single-threaded worker processes, through the
    same ``hierarchy.studies.sweep(dask=...)`` a user points at a cluster.

    Prints each point's status, objective and design time, and the workers'
    CPU time against the sweep's wall time (how many workers were busy on
    average)."""
    # Workers are fresh processes: they inherit one BLAS thread and this
    # checkout (not whatever ``hierarchy`` is installed).
    os.environ.update(OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1",
                      PYTHONPATH=HERE + os.pathsep + os.environ.get("PYTHONPATH", ""))
    from distributed import Client, LocalCluster

    from hierarchy.spec import parse_spec
    from hierarchy.studies import sweep

    spec = parse_spec(circuit_text(areas, DEFAULT_DENSITY, "price"))
    print(f"\nDask sweep: {areas} areas, {len(spec.links)} links; {SWEEP_PATH} over "
          f"{', '.join(map(str, SWEEP_VALUES))}; local cluster of {workers} worker processes x 1 thread")
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        t0 = time.perf_counter()
        study = sweep(spec, SWEEP_PATH, SWEEP_VALUES, dask=client, workers=workers)
        wall = time.perf_counter() - t0
        cpu = client.run(time.process_time)  # each worker process's CPU seconds since it started
    header = (f"{'price':>7} {'status':<16} {'objective':>12} {'silent':>6} {'evals':>6} {'time s':>7}  "
              f"{'kept':<9} agree")
    print(header)
    print("-" * len(header))
    for value, row in zip(SWEEP_VALUES, study.rows):
        print(f"{value:>7g} {row['status']:<16} {row['objective']:>12.8g} {len(row['silent_links']):>6} "
              f"{row['evaluations']:>6} {row['seconds']:>7.1f}  {row['search']:<9} {row['agreement']}")
    total = sum(cpu.values())
    print(f"chunks {study.chunks}; worker CPU {' + '.join(f'{c:.0f}' for c in cpu.values())} = {total:.0f} s "
          f"in {wall:.0f} s wall: {total / wall:.2f} of {len(cpu)} workers busy on average")
    print(f"(the study's own checks: each chunk walks its points forward and then backward, warm-starting each")
    print(f"from the one before, and designs cold where the walks disagree: {study.computed} designs in all;")
    print(f"kept = the walk whose design is kept, agree = designs of the point that agree with it;")
    print(f"time s = the kept design's time, each a full design with its feed-forward-first search)")
    bad = [v for v, r in zip(SWEEP_VALUES, study.rows) if r["status"] != "converged"]
    print(f"Points not converged: {', '.join(map(str, bad)) if bad else 'none'}")
    return 0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="8 and 16 areas, price form, default density")
    ap.add_argument("--sizes", help="comma-separated area counts (default 8,16,32,64,91)")
    ap.add_argument("--forms", help=f"comma-separated forms among {', '.join(FORMS)} (default all; --quick: price)")
    ap.add_argument("--densities", default="default,10",
                    help="'default' (0.2) and/or '10' (about 10 links per area); default both (--quick: default)")
    ap.add_argument("--baseline", default="1dc04ee", help="commit whose objectives and times are compared")
    ap.add_argument("--no-baseline", action="store_true", help="do not run the baseline")
    ap.add_argument("--cache", default=os.path.join(tempfile.gettempdir(), "hierarchy-scale-baseline.json"),
                    help="JSON file keeping the baseline's results between runs")
    ap.add_argument("--evaluate-only", action="store_true",
                    help="only time one value-and-gradient, this commit against the baseline (no designs)")
    ap.add_argument("--dask-sweep", type=int, metavar="AREAS",
                    help="instead of the table: a price sweep of the AREAS-area circuit on a local Dask cluster")
    ap.add_argument("--workers", type=int, default=2, help="Dask workers for --dask-sweep (default 2)")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(json.loads(args.child))))
        return 0

    from _env import blas_header, code_version

    sizes = [int(s) for s in args.sizes.split(",")] if args.sizes else ([8, 16] if args.quick else list(SIZES))
    forms = args.forms.split(",") if args.forms else (["price"] if args.quick else list(FORMS))
    kinds = ["default"] if args.quick and args.densities == "default,10" else args.densities.split(",")
    bad = [f for f in forms if f not in FORMS] + [k for k in kinds if k not in ("default", "10")]
    if bad:
        print(f"scale.py: unknown form or density {', '.join(bad)}; forms: {', '.join(FORMS)}; "
              "densities: default, 10", file=sys.stderr)
        return 2
    t_start = time.perf_counter()
    print("scale: issue 12 acceptance table (hierarchy.spec.generate circuits, fresh process per run, one BLAS thread)")
    print(f"  measured: {code_version()}; baseline: "
          f"{'(not run)' if args.no_baseline else args.baseline}; this process: " + "; ".join(blas_header()))
    print(f"  load average at start {os.getloadavg()[0]:.1f}")
    if args.dask_sweep:
        return dask_sweep(args.dask_sweep, args.workers)
    if args.evaluate_only:
        return evaluate_only(sizes, kinds, None if args.no_baseline else baseline_root(args.baseline))
    cache = {}
    if not args.no_baseline and os.path.exists(args.cache):
        with open(args.cache) as fh:
            cache = json.load(fh)
    base_root = None if args.no_baseline else baseline_root(args.baseline)
    header = (f"{'areas':>5} {'links':>5} {'gains':>6} {'form':<9} {'status':<16} {'objective':>12} "
              f"{'baseline':>12} {'rel':>9} {'time s':>7} {'cpu s':>7} {'base s':>7} {'base cpu':>8} {'MiB':>5} "
              f"{'evals':>6} {'v+g ms':>7} {'base v+g':>8} {'lyap ms':>7} {'x':>5}  limit")
    print()
    print(header)
    print("-" * len(header))
    misses = []
    for areas in sizes:
        for kind in kinds:
            density = DEFAULT_DENSITY if kind == "default" else density_for(areas)
            for form in forms:
                job = {"areas": areas, "density": density, "form": form}
                r = measure(dict(job, root=HERE))
                key = f"{args.baseline}:{areas}:{density}:{form}"
                b = None
                if base_root is not None:
                    b = cache.get(key) or measure(dict(job, root=base_root))
                    if "error" not in b:
                        cache[key] = b
                        with open(args.cache, "w") as fh:
                            json.dump(cache, fh)
                if "error" in r:
                    print(f"{areas:>5} {'':>5} {'':>6} {form:<9} error: {r['error']}", flush=True)
                    misses.append(f"{areas} areas {form}: error")
                    continue
                have_b = b is not None and "error" not in b
                rel = (r["objective"] - b["objective"]) / abs(b["objective"]) if have_b else float("nan")
                limit = limit_of(areas, form) if kind == "default" or areas in (32, 91) else None
                ok = (r["status"] == "converged" and r["peak_mib"] < MEMORY_MIB and r["budgets_met"]
                      and (not have_b or rel <= 1e-6) and (limit is None or r["seconds"] <= limit))
                if not ok:
                    misses.append(f"{areas} areas, {r['links']} links, {form}")
                lim = "" if limit is None else f"<= {limit} s: {'met' if r['seconds'] <= limit else 'NOT met'}"
                print(f"{areas:>5} {r['links']:>5} {r['free']:>6} {form:<9} {r['status']:<16} "
                      f"{r['objective']:>12.8g} {(b['objective'] if have_b else float('nan')):>12.8g} {rel:>+9.1e} "
                      f"{r['seconds']:>7.1f} {r['cpu']:>7.1f} {(b['seconds'] if have_b else float('nan')):>7.1f} "
                      f"{(b['cpu'] if have_b else float('nan')):>8.1f} "
                      f"{r['peak_mib']:>5.0f} {r['evaluations']:>6} {1e3 * r['value_grad']:>7.2f} "
                      f"{(1e3 * b['value_grad'] if have_b else float('nan')):>8.2f} "
                      f"{1e3 * r['lyap']:>7.2f} {r['value_grad'] / r['lyap']:>5.1f}  {lim}", flush=True)
                if have_b and b["status"] != "converged":
                    print(f"{'':>27}baseline status: {b['status']} ({b['message']})")
                if r["status"] != "converged":
                    print(f"{'':>27}solver: {r['message']}")
    print()
    print("gains = free gains; rel = (objective - baseline) / |baseline| (negative: lower than the baseline);")
    print("time/cpu = this commit's design (wall/CPU s), base s/cpu = the baseline's; MiB = peak memory;")
    print("evals = points evaluated; v+g = one exact value and gradient at the informed start (base v+g: the")
    print("baseline's, measured in its own child); lyap = one bare")
    print("solve_discrete_lyapunov of the closed loop's size; x = v+g / lyap. A row passes when it converged,")
    print(f"met its budgets, stayed under {MEMORY_MIB} MiB, is not above the baseline (1e-6) and within its limit.")
    print(f"Rows not passing: {'none' if not misses else '; '.join(misses)}")
    print(f"(measured in {time.perf_counter() - t_start:.0f} s; load average now {os.getloadavg()[0]:.1f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
