"""How close is the exact evaluation to the cost of one bare Lyapunov solve?

For closed-loop sizes 16..256 (``Layout(spec).nxi``) this builds a synthetic
circuit in Python, draws random stable gains, and times

* the floor: one ``scipy.linalg.solve_discrete_lyapunov`` of the same size on
  a random stable matrix;
* ``hierarchy.loop.evaluate.score`` (assembly, stability check, Lyapunov solve and
  every score);
* ``hierarchy.loop.evaluate.cost_and_gradient`` (value and exact adjoint gradient).

Every time is the median of repeated runs in this process (time.perf_counter).
The goal of the issue is ``score`` within 3x of the floor at size 128.

    python benchmarks/evaluate_speed.py            # full run (about 1-2 minutes)
    python benchmarks/evaluate_speed.py --quick    # about 20 s
    python benchmarks/evaluate_speed.py --profile  # also cProfile score() at 128

Single-threaded BLAS (``OPENBLAS_NUM_THREADS=1``) is steadier on small
matrices; the header says which setting the run had.
"""

from __future__ import annotations

import argparse
import cProfile
import os
import platform
import pstats
import statistics
import sys
import time

import numpy as np
import scipy.linalg as sla

# Measure the checkout this script lives in, not whatever copy of the package
# happens to be installed.
sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import hierarchy  # noqa: E402
from _env import blas_header, code_version  # noqa: E402
from hierarchy.spec import model  # noqa: E402
from hierarchy.loop.closedloop import Layout, assemble  # noqa: E402
from hierarchy.loop.evaluate import cost_and_gradient, loop_radius, score  # noqa: E402
from hierarchy.loop.gains import Gains, gain_shapes  # noqa: E402

SIZES = (16, 32, 64, 128, 256)
GOAL_SIZE, GOAL_RATIO = 128, 3.0
N_BLOCKS = 4  # world blocks, and areas in the chain (one per block)


# -- environment ---------------------------------------------------------------


def interleaved_medians(fns, min_runs: int, min_seconds: float) -> list:
    """Median wall time of each of ``fns``, timed in alternation (one call of
    each per round) so that a slow spell of the machine hits them all alike.
    At least ``min_runs`` rounds and ``min_seconds`` in all; one warm-up each."""
    for fn in fns:
        fn()
    times = [[] for _ in fns]
    start = time.perf_counter()
    while len(times[0]) < min_runs or time.perf_counter() - start < min_seconds:
        for fn, ts in zip(fns, times):
            t0 = time.perf_counter()
            fn()
            ts.append(time.perf_counter() - t0)
        if len(times[0]) >= 5000:
            break
    return [statistics.median(ts) for ts in times]


# -- synthetic circuits ----------------------------------------------------------


def _pd(rng, k: int, scale: float) -> np.ndarray:
    """A random symmetric positive-definite k x k matrix of size ``scale``."""
    B = rng.standard_normal((k, k)) / np.sqrt(k)
    return scale * (0.5 * np.eye(k) + B @ B.T / 2.0)


def _stable(rng, k: int, radius: float) -> np.ndarray:
    """A random k x k matrix with spectral radius ``radius``."""
    A = rng.standard_normal((k, k))
    return A * (radius / np.max(np.abs(np.linalg.eigvals(A))))


def synthetic_spec(size: int, seed: int = 0) -> model.Spec:
    """A chain circuit whose closed loop has ``size`` states.

    The world has ``size/2`` states in ``N_BLOCKS`` blocks, each driven by the
    one before it (a slow cause feeding faster features). One sensor of
    ``size/4`` readings sees all blocks. Areas ``a0 .. a3`` form a chain:
    ``a_i`` tracks block ``i``, so area dims add up to ``size/2``. Residuals
    go up (sensor->a0, a_i->a_{i+1}), predictions come down, and every link is
    priced and has positive-definite noise.
    """
    if size % (2 * N_BLOCKS) or size % 4:
        raise ValueError(f"size must be a multiple of {2 * N_BLOCKS}")
    rng = np.random.default_rng(seed)
    f = model.frozen_array
    nworld = size // 2
    bdim = nworld // N_BLOCKS
    names = [f"b{i}" for i in range(N_BLOCKS)]
    blocks = []
    for i, name in enumerate(names):
        driven = {}
        if i > 0:
            driven[names[i - 1]] = f(0.3 * rng.standard_normal((bdim, bdim)) / np.sqrt(bdim))
        blocks.append(model.StateBlock(
            name=name, dim=bdim,
            dynamics=f(_stable(rng, bdim, 0.95 - 0.1 * i)),
            noise=f(_pd(rng, bdim, 0.1)),
            driven_by=model.frozen_map(driven),
        ))
    world = model.World(tuple(blocks))
    sdim = size // 4
    sensor = model.Sensor(
        name="sensor",
        observes=model.frozen_map({n: f(rng.standard_normal((sdim, bdim)) / np.sqrt(bdim)) for n in names}),
        noise=f(_pd(rng, sdim, 0.05)),
    )
    areas = tuple(model.Area(name=f"a{i}", dim=bdim, tracks=(names[i],), weight=1.0)
                  for i in range(N_BLOCKS))

    def link(src, dst, kind, dim, price):
        return model.Link(source=src, target=dst, kind=kind, dim=dim,
                          noise=f(_pd(rng, dim, 0.02)), price=price)

    links = [link("sensor", "a0", model.RESIDUAL, sdim, 0.05),
             link("a0", "sensor", model.PREDICTION, sdim, 0.05)]
    for i in range(N_BLOCKS - 1):
        links.append(link(f"a{i}", f"a{i + 1}", model.RESIDUAL, bdim, 0.1))
        links.append(link(f"a{i + 1}", f"a{i}", model.PREDICTION, bdim, 0.1))
    spec = model.Spec(name=f"synthetic chain, closed loop {size}", world=world,
                      sensors=(sensor,), areas=areas, links=tuple(links))
    return spec


def random_gains(layout: Layout, seed: int = 1, target: float = 0.98) -> Gains:
    """Random gains of every block, shrunk until the loop radius is below ``target``."""
    rng = np.random.default_rng(seed)
    shapes = gain_shapes(layout.spec)
    g = Gains()
    for area, blocks in shapes["areas"].items():
        g.areas[area] = {"M": _stable(rng, blocks["M"][0], 0.7)}
    for lid, blocks in shapes["links"].items():
        g.links[lid] = {name: rng.standard_normal(shape) / np.sqrt(shape[1])
                        for name, shape in blocks.items()}
    for _ in range(100):
        radius = loop_radius(assemble(layout, g))
        if radius < target:
            return g
        for blocks in g.links.values():
            if "K" in blocks:
                blocks["K"] *= 0.8
    raise RuntimeError(f"could not find stable gains (radius {radius:.3g})")


# -- measurements ----------------------------------------------------------------


def measure(size: int, min_runs: int, min_seconds: float) -> dict:
    spec = synthetic_spec(size)
    layout = Layout(spec)
    assert layout.nxi == size, (layout.nxi, size)
    gains = random_gains(layout)
    radius = loop_radius(assemble(layout, gains))
    assert radius < 1.0

    rng = np.random.default_rng(size)
    A = _stable(rng, size, 0.95)
    Q = _pd(rng, size, 1.0)
    floor, t_score, t_grad = interleaved_medians(
        [lambda: sla.solve_discrete_lyapunov(A, Q),
         lambda: score(layout, gains),
         lambda: cost_and_gradient(layout, gains)],
        min_runs, min_seconds)
    # Sanity: the value the gradient path returns is the objective score reports.
    J = cost_and_gradient(layout, gains)[0]
    obj = score(layout, gains).objective
    assert abs(J - obj) <= 1e-8 * max(1.0, abs(obj)), (J, obj)
    return {"size": size, "nq": layout.nq, "radius": radius, "floor": floor,
            "score": t_score, "grad": t_grad}


def _where(path: str) -> str:
    root = os.path.dirname(os.path.dirname(os.path.abspath(hierarchy.__file__)))
    if path.startswith(root + os.sep):
        return os.path.relpath(path, root)
    if "site-packages" + os.sep in path:
        return path.split("site-packages" + os.sep)[-1]
    return path


def profile_score(size: int, top: int = 5, runs: int = 20) -> str:
    """cProfile of ``score()`` at ``size``: the top functions by own time, the
    package's own functions by cumulative time, and the split of the time
    between LAPACK-backed linear algebra and everything else (Python-level
    assembly and bookkeeping, with the numpy operators it runs inline)."""
    spec = synthetic_spec(size)
    layout = Layout(spec)
    gains = random_gains(layout)
    score(layout, gains)
    prof = cProfile.Profile()
    prof.enable()
    for _ in range(runs):
        score(layout, gains)
    prof.disable()
    stats = pstats.Stats(prof).stats
    total = max(sum(v[2] for v in stats.values()), 1e-300)

    def row(key, value):
        (path, line, func), (cc, nc, tt, ct, callers) = key, value
        return f"  {nc / runs:>6.0f} {1e3 * tt / runs:8.3f} {1e3 * ct / runs:8.3f}  {_where(path)}:{line}({func})"

    lines = [f"cProfile of {runs} score() calls at size {size}: {1e3 * total / runs:.2f} ms per call "
             f"under the profiler", "",
             f"top {top} functions by own time (per score call):",
             f"  {'calls':>6} {'own ms':>8} {'cum ms':>8}  function"]
    for key, value in sorted(stats.items(), key=lambda kv: kv[1][2], reverse=True)[:top]:
        lines.append(row(key, value))
    own = [(k, v) for k, v in stats.items() if _where(k[0]).startswith("hierarchy" + os.sep)]
    lines += ["", f"top {top} functions of hierarchy/ by cumulative time (per score call):",
              f"  {'calls':>6} {'own ms':>8} {'cum ms':>8}  function"]
    for key, value in sorted(own, key=lambda kv: kv[1][3], reverse=True)[:top]:
        lines.append(row(key, value))

    def share(pred):
        return sum(v[2] for k, v in stats.items() if pred(_where(k[0]), k[2]))

    lapack = share(lambda w, f: w.startswith(("scipy" + os.sep + "linalg", "numpy" + os.sep + "linalg"))
                   or "lapack" in f.lower() or "trsyl" in f.lower())
    package = share(lambda w, f: w.startswith("hierarchy" + os.sep))
    lines += ["", "where the time goes (own time of the functions):"]
    for label, t in (("scipy.linalg / numpy.linalg (LAPACK: Lyapunov, Schur, eigenvalues)", lapack),
                     ("hierarchy/ code (Python-level assembly and scores, inline numpy products)", package),
                     ("other (numpy helpers, scipy.sparse, builtins)", total - lapack - package)):
        lines.append(f"  {label:<76} {100 * t / total:5.1f}%")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats (about 20 s)")
    ap.add_argument("--profile", action="store_true",
                    help=f"also cProfile score() at size {GOAL_SIZE} and print the top 5 functions")
    args = ap.parse_args(argv)
    # Per size: rounds (each times the floor, score and value+grad once) and seconds.
    min_runs, min_seconds = (5, 2.0) if args.quick else (15, 12.0)

    print("evaluate_speed: exact evaluation against one bare discrete Lyapunov solve")
    for line in blas_header():
        print("  " + line)
    print(f"  hierarchy from {os.path.dirname(hierarchy.__file__)}, commit {code_version()}")
    print(f"  python {platform.python_version()}, numpy {np.__version__}, "
          f"scipy {__import__('scipy').__version__}, {'quick' if args.quick else 'full'} run: "
          f"medians of >= {min_runs} interleaved rounds, >= {min_seconds:g} s per size")
    print()
    header = (f"{'size':>5} {'nq':>5} {'floor ms':>10} {'score ms':>10} {'score/floor':>12} "
              f"{'value+grad ms':>14} {'ratio':>7}")
    print(header)
    print("-" * len(header))
    rows = []
    t_start = time.perf_counter()
    for size in SIZES:
        r = measure(size, min_runs, min_seconds)
        rows.append(r)
        print(f"{r['size']:>5} {r['nq']:>5} {1e3 * r['floor']:>10.3f} {1e3 * r['score']:>10.3f} "
              f"{r['score'] / r['floor']:>12.2f} {1e3 * r['grad']:>14.3f} {r['grad'] / r['floor']:>7.2f}",
              flush=True)
    print()
    print("size = closed-loop states (Layout.nxi); nq = states + noises; ratio = value+grad / floor")
    goal = next(r for r in rows if r["size"] == GOAL_SIZE)
    ratio = goal["score"] / goal["floor"]
    verdict = "MET" if ratio <= GOAL_RATIO else "NOT MET"
    print(f"goal: score within {GOAL_RATIO:g}x of the floor at size {GOAL_SIZE}: "
          f"{ratio:.2f}x -> {verdict}")
    print(f"(measured in {time.perf_counter() - t_start:.0f} s)")
    if args.profile:
        print()
        print(profile_score(GOAL_SIZE))
    return 0


if __name__ == "__main__":
    sys.exit(main())
