"""Walking a chain of points both ways with warm starts, and designing cold
where the two walks disagree.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, replace
from pathlib import Path

from hierarchy.errors import InputError
from hierarchy.studies.runner import _dask_threads, _execute, _point_key, default_workers
from hierarchy.studies.tables import Study, _columns, output_base

__all__ = ['AGREE_RTOL']


#: Two designs of one point agree when their objectives are this close
#: (relative) and the same links are silent.
AGREE_RTOL = 1e-6


def _agree(a: dict, b: dict) -> bool:
    ra, rb = a["row"], b["row"]
    if not (ra.get("converged") and rb.get("converged")):
        return False
    fa, fb = ra["objective"], rb["objective"]
    return abs(fa - fb) <= AGREE_RTOL * max(abs(fa), abs(fb), 1e-300) and ra["silent_links"] == rb["silent_links"]


def _score(out: dict):
    """Sort key: usable designs (finite objective, not failed) first, then the
    lower objective, then converged before not."""
    row = out["row"]
    f = row.get("objective")
    ok = f is not None and math.isfinite(f) and row.get("status") != "failed"
    return (not ok, f if ok else math.inf, not row.get("converged"))


def _tagged(points, tag, opts, warm, starts=None) -> list:
    return [replace(p, key=_point_key(p.spec, {**p.coords, "search": tag}, opts, warm),
                    start=None if starts is None else starts[p.index]) for p in points]


def _run_study(kind, chains, opts, spec_infos, axes, coord_names, specs, *, output, workers, dask, warm,
               progress, fresh, nested=()) -> Study:
    """Design every point of ``chains``. With warm starts, each chain is
    walked forward and then backward, every point warm-started from its
    neighbour; where the two walks disagree (objective, silent links, or
    either not converged) the point is designed cold as well, and the best
    design of each point is kept. ``nested`` lists ``(big, small)`` index
    pairs of points where ``big``'s circuit contains ``small``'s: ``big`` is
    then designed from ``small``'s design too wherever it came out worse."""
    t0 = time.perf_counter()
    base = output_base(output) if output is not None else None
    parts = Path(f"{base}.parts") if base is not None else None
    if dask is not None:
        workers = workers or _dask_threads(dask)
    workers = int(workers or default_workers())
    if workers < 1:
        raise InputError(f"--workers must be at least 1; got {workers}", place="--workers", fix="use 1 or more")
    points = sorted((p for c in chains for p in c), key=lambda p: p.index)
    run = dict(opts=opts, parts=parts, workers=workers, dask=dask, progress=progress, fresh=fresh)
    computed = reused = 0

    def execute(chains_, label, warm_):
        nonlocal computed, reused
        out, c, r, bounds_ = _execute(chains_, run["opts"], parts=parts, workers=workers, dask=dask, warm=warm_,
                                      progress=progress, label=label, fresh=fresh)
        computed, reused = computed + c, reused + r
        return out, bounds_

    outputs, bounds = execute(chains, kind, warm)
    tried = {i: [("forward" if warm else "cold", o)] for i, o in outputs.items()}
    if warm:
        back, _ = execute([_tagged(c[::-1], "backward", opts, warm) for c in chains], f"{kind} (backward)", True)
        for i, o in back.items():
            tried[i].append(("backward", o))
        doubt = [p for p in points if not _agree(tried[p.index][0][1], tried[p.index][1][1])]
        if doubt:
            cold, _ = execute([[p] for p in _tagged(doubt, "cold", opts, False)], f"{kind} (cold)", False)
            for i, o in cold.items():
                tried[i].append(("cold", o))
    best = {i: min(t, key=lambda kv: _score(kv[1])) for i, t in tried.items()}
    # An architecture that contains another can silence its extra links: it
    # is designed from the smaller one's design wherever it lost to it.
    lost = [(b, s) for b, s in nested if _score(best[s][1])[:2] < _score(best[b][1])[:2]]
    if lost:
        from hierarchy.loop.gains import gains_from_dict
        from hierarchy.design.subcircuit import embed

        starts = {b: embed(gains_from_dict(best[s][1]["gains"]), points[s].spec, points[b].spec).to_dict()
                  for b, s in lost if best[s][1]["gains"] is not None}
        redo = [p for p in points if p.index in starts]
        again, _ = execute([[p] for p in _tagged(redo, "nested", opts, True, starts)], f"{kind} (nested)", True)
        for i, o in again.items():
            tried[i].append(("from a sub-circuit", o))
            best[i] = min(tried[i], key=lambda kv: _score(kv[1]))
    rows, gains = [], []
    for p in points:
        name, out = best[p.index]
        row = {**p.coords, **out["row"], "search": name,
               "agreement": f"{sum(_agree(out, o) for _, o in tried[p.index])}/{len(tried[p.index])}"}
        rows.append(row)
        gains.append(out["gains"])
    return Study(kind, spec_infos, axes, _columns(coord_names, specs), rows, gains, asdict(opts), warm,
                 bounds, computed, reused, time.perf_counter() - t0)
