"""Scale: the exact evaluation and the designer on synthetic layered circuits.

Circuits come from ``hierarchy.spec.generate`` (``areas`` areas on ``areas / 2``
levels, area dimension 2, world dimension ``areas``, density 0.175, seed 0:
302 links at 32 areas). Every measurement runs in a fresh child process, so
that its peak memory (``ru_maxrss``) is its own and its BLAS thread setting
can differ; each child also times one ``scipy.linalg.solve_discrete_lyapunov``
of its closed loop's size (a random stable matrix, median of several) and
every time is printed beside its ratio to that baseline.

Children run with single-threaded BLAS unless ``--threads`` says otherwise:
the matrices here are small (at most a few hundred rows), and on a busy
2-core machine OpenBLAS's worker threads cost far more than they give (the
thread comparison at the end shows how much).

It prints

* the targets of issue 5 at 32 areas / 302 links: price-form design <= 60 s,
  budget-form design (one budget per level instead of prices) <= 120 s, peak
  memory < 2 GiB;
* a scaling table for 2, 4, 8, 16, 32, 64 areas (price form): time per exact
  evaluation (``score``), per value-and-gradient, per designer iteration,
  iterations, total time, peak memory;
* at 8 areas, the designer's objective against the objective with 4x its
  iteration and restart budgets (goal: within 0.5%);
* at 32 areas with ``OPENBLAS_NUM_THREADS`` 1 and 2: evaluation times and a
  price-form design cut at 300 iterations (time per iteration).

    python benchmarks/scale.py            # everything (about 15 minutes)
    python benchmarks/scale.py --threads inherit   # children keep this shell's BLAS setting
    python benchmarks/scale.py --quick    # table to 16 areas, no 4x check, no thread comparison
    python benchmarks/scale.py --profile  # also cProfile one value-and-gradient at 32 areas

Wall times depend on what else the machine runs; CPU times are printed too.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time

# Measure the checkout this script lives in, not whatever copy is installed.
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

TARGET_AREAS = 32
TARGET_PRICE_S, TARGET_BUDGET_S, TARGET_MEMORY_MIB = 60.0, 120.0, 2048.0
TABLE_AREAS = (2, 4, 8, 16, 32, 64)
CHECK_AREAS, CHECK_RTOL = 8, 0.005
DENSITY, SEED = 0.175, 0


def spec_text(areas: int, budgets: bool = False) -> str:
    from hierarchy.spec.generate import generate_spec_text

    return generate_spec_text(areas=areas, levels=max(areas // 2, 1), density=DENSITY, seed=SEED,
                              area_dim=2, budgets=budgets)


def blas_lines() -> list:
    """Which BLAS this process runs, with how many threads."""
    lines = [f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', '(unset)')}  "
             f"OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', '(unset)')}  cpus={os.cpu_count()}"]
    try:
        import numpy  # noqa: F401  (loads the BLAS that threadpoolctl reports)
        from threadpoolctl import threadpool_info
    except ImportError:
        return lines + ["threadpoolctl not installed: BLAS threads not reported"]
    for info in threadpool_info():
        lines.append(f"{info.get('user_api')}: {info.get('internal_api')} {info.get('version')}, "
                     f"{info.get('num_threads')} thread(s)")
    return lines


def median_time(fn, runs: int = 5, seconds: float = 1.0) -> float:
    fn()
    times, start = [], time.perf_counter()
    while len(times) < runs or (time.perf_counter() - start < seconds and len(times) < 200):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


# -- one measurement (child process) ------------------------------------------------


def child(job: dict) -> dict:
    import numpy as np
    import scipy.linalg as sla

    from hierarchy.design import Options, design_budgets, design_prices
    from hierarchy.loop.evaluate import score
    from hierarchy.design.problem import Problem
    from hierarchy.spec import parse_spec

    spec = parse_spec(spec_text(job["areas"], job.get("budgets", False)))
    prob = Problem(spec)
    nxi = prob.layout.nxi
    rng = np.random.default_rng(0)
    A = rng.standard_normal((nxi, nxi))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    Q = np.eye(nxi)
    out = {"areas": job["areas"], "links": len(spec.links), "nxi": nxi, "free": prob.size,
           "blas": blas_lines(), "floor": median_time(lambda: sla.solve_discrete_lyapunov(A, Q))}
    if job.get("evaluate", True):
        x = prob.pack(prob.informed_start())
        gains = prob.unpack(x)
        out["score"] = median_time(lambda: score(prob.layout, gains))
        out["value_grad"] = median_time(lambda: prob.value_and_grad(x))
    scale = job.get("budget_scale", 1)
    opts = Options(restarts=4 * scale, max_iter=job.get("max_iter", 3000) * scale, probe_iter=60 * scale)
    run = design_budgets if job.get("budgets", False) else design_prices
    c0, t0 = time.process_time(), time.perf_counter()
    res = run(spec, opts)
    out.update(seconds=time.perf_counter() - t0, cpu=time.process_time() - c0, iterations=res.iterations,
               evaluations=res.evaluations, status=res.status, message=res.message, objective=res.objective,
               silent=len(res.silent), peak_mib=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)
    if res.budgets:
        out["budgets_met"] = all(b.met for b in res.budgets.values())
    return out


#: BLAS threads of the children ("inherit": this process's environment).
THREADS = {"value": "1"}


def measure(job: dict, threads: str | None = None) -> dict:
    """Run ``child(job)`` in a fresh interpreter with ``threads`` BLAS threads
    (default: the ``--threads`` option)."""
    env = dict(os.environ)
    threads = THREADS["value"] if threads is None else threads
    if threads != "inherit":
        env["OPENBLAS_NUM_THREADS"] = env["OMP_NUM_THREADS"] = threads
    done = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", json.dumps(job)],
                          env=env, capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(f"child {job} failed:\n{done.stderr}")
    return json.loads(done.stdout.strip().splitlines()[-1])


# -- report ------------------------------------------------------------------------------


def verdict(ok: bool) -> str:
    return "MET" if ok else "NOT MET"


def profile_lines(areas: int) -> list:
    import cProfile
    import io
    import pstats

    from hierarchy.design.problem import Problem
    from hierarchy.spec import parse_spec

    prob = Problem(parse_spec(spec_text(areas)))
    x = prob.pack(prob.informed_start())
    prob.value_and_grad(x)
    pr = cProfile.Profile()
    pr.enable()
    for _ in range(20):
        prob.value_and_grad(x)
    pr.disable()
    text = io.StringIO()
    pstats.Stats(pr, stream=text).sort_stats("tottime").print_stats(8)
    return [f"cProfile of 20 value-and-gradient calls at {areas} areas (top 8 by own time):"] + \
        [line for line in text.getvalue().splitlines() if line.strip()][-9:]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="table to 16 areas; skip the 4x check and thread runs")
    ap.add_argument("--profile", action="store_true", help="also profile one value-and-gradient at 32 areas")
    ap.add_argument("--threads", default="1",
                    help="BLAS threads of the measuring children (default 1; 'inherit' keeps the environment's)")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(json.loads(args.child))))
        return 0
    THREADS["value"] = args.threads

    import numpy as np
    import scipy

    t_start = time.perf_counter()
    print("scale: exact evaluation and designer on generated layered circuits")
    print("  this process: " + "; ".join(blas_lines()))
    first = measure({"areas": 2, "evaluate": False})
    print(f"  measuring children (--threads {args.threads}): " + "; ".join(first["blas"]))
    print(f"  python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}; "
          f"load average at start {os.getloadavg()[0]:.1f}")
    print(f"  circuits: hierarchy.spec.generate, areas A on A/2 levels, area dim 2, world dim A, "
          f"density {DENSITY}, seed {SEED}; each run in a fresh process")
    print()

    price = measure({"areas": TARGET_AREAS})
    budget = measure({"areas": TARGET_AREAS, "budgets": True, "evaluate": False})
    print(f"Targets at {TARGET_AREAS} areas, {price['links']} links, closed loop {price['nxi']} states, "
          f"{price['free']} free gains:")
    rows = [("price-form design", price, TARGET_PRICE_S), ("budget-form design", budget, TARGET_BUDGET_S)]
    for name, r, limit in rows:
        extra = "" if "budgets_met" not in r else f", budgets met: {'yes' if r['budgets_met'] else 'NO'}"
        print(f"  {name:<19} {r['seconds']:7.1f} s wall ({r['cpu']:.1f} s CPU), {r['iterations']} iterations, "
              f"status {r['status']}{extra}; target <= {limit:g} s: {verdict(r['seconds'] <= limit)}")
        if r["message"]:
            print(f"  {'':<19} solver: {r['message']}")
    peak = max(price["peak_mib"], budget["peak_mib"])
    print(f"  peak memory         {peak:7.0f} MiB (largest of the two runs, ru_maxrss); "
          f"target < {TARGET_MEMORY_MIB:g} MiB: {verdict(peak < TARGET_MEMORY_MIB)}")
    print()

    areas = [a for a in TABLE_AREAS if not args.quick or a <= 16]
    header = (f"{'areas':>5} {'links':>5} {'states':>6} {'gains':>6} {'lyap ms':>8} {'eval ms':>8} {'x':>5} "
              f"{'v+g ms':>8} {'x':>5} {'iter ms':>8} {'x':>5} {'iters':>6} {'total s':>8} {'cpu s':>7} "
              f"{'MiB':>6}  status")
    print("Scaling (price form):")
    print(header)
    print("-" * len(header))
    for a in areas:
        r = price if a == TARGET_AREAS else measure({"areas": a})
        f = r["floor"]
        it = r["seconds"] / max(r["iterations"], 1)
        print(f"{a:>5} {r['links']:>5} {r['nxi']:>6} {r['free']:>6} {1e3 * f:>8.2f} {1e3 * r['score']:>8.2f} "
              f"{r['score'] / f:>5.1f} {1e3 * r['value_grad']:>8.2f} {r['value_grad'] / f:>5.1f} {1e3 * it:>8.2f} "
              f"{it / f:>5.1f} {r['iterations']:>6} {r['seconds']:>8.1f} {r['cpu']:>7.1f} {r['peak_mib']:>6.0f}  "
              f"{r['status']}", flush=True)
    print("states = closed-loop states; lyap = one solve_discrete_lyapunov of that size (the baseline); eval =")
    print("score(); v+g = objective and exact gradient; iter = design wall time / iterations; x = ratio to lyap")
    print()

    if not args.quick:
        base = measure({"areas": CHECK_AREAS, "evaluate": False})
        more = measure({"areas": CHECK_AREAS, "evaluate": False, "budget_scale": 4})
        rel = (base["objective"] - more["objective"]) / abs(more["objective"])
        print(f"Quality at {CHECK_AREAS} areas: default budgets objective {base['objective']:.8g} "
              f"({base['iterations']} iterations, {base['seconds']:.1f} s); 4x iterations and restarts "
              f"{more['objective']:.8g} ({more['iterations']} iterations, {more['seconds']:.1f} s)")
        print(f"  relative difference {rel:+.2e}; goal within {CHECK_RTOL:.1%}: {verdict(abs(rel) <= CHECK_RTOL)}")
        print()
        print(f"BLAS threads at {TARGET_AREAS} areas (design cut at 300 iterations):")
        for threads in ("1", "2"):
            r = measure({"areas": TARGET_AREAS, "max_iter": 300}, threads=threads)
            print(f"  OPENBLAS_NUM_THREADS={threads}: lyap {1e3 * r['floor']:.2f} ms, eval {1e3 * r['score']:.2f} ms, "
                  f"value+grad {1e3 * r['value_grad']:.2f} ms, design {r['seconds']:.1f} s wall "
                  f"({r['cpu']:.1f} s CPU) for {r['iterations']} iterations: "
                  f"{1e3 * r['seconds'] / max(r['iterations'], 1):.1f} ms per iteration", flush=True)
        print()
    if args.profile:
        for line in profile_lines(TARGET_AREAS):
            print(line)
        print()
    print(f"(measured in {time.perf_counter() - t_start:.0f} s; load average now {os.getloadavg()[0]:.1f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
