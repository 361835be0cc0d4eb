"""The point runner: one design per point, in this process, a pool of workers
or a Dask cluster, each point kept on disk so a study resumes.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import hashlib
import json
import math
import os
import sys
import time
from dataclasses import asdict, dataclass, fields, is_dataclass, replace
from pathlib import Path
from typing import Mapping

import numpy as np

from hierarchy.blas import single_thread
from hierarchy.errors import HierarchyError, InputError
from hierarchy.io import atomic_write_text
from hierarchy.spec.model import Spec, World, frozen_map

__all__ = ['STUDY_VERSION', 'POINT_FORMAT', 'MAX_PART_FILE', 'spec_digest', 'run_point', 'WATCH_PARENT_SECONDS', 'default_workers']


STUDY_VERSION = 1
POINT_FORMAT = "hierarchy-point"
#: A finished point's file above this size (bytes) is not trusted.
MAX_PART_FILE = 50_000_000


def _with_maps(spec: Spec, mapping) -> Spec:
    """The spec with every name-keyed mapping passed through ``mapping``."""
    return replace(
        spec,
        world=World(tuple(replace(b, driven_by=mapping(b.driven_by)) for b in spec.world.states)),
        sensors=tuple(replace(s, observes=mapping(s.observes)) for s in spec.sensors),
        areas=tuple(replace(a, pin=mapping(a.pin)) for a in spec.areas),
        links=tuple(replace(l, pin=mapping(l.pin)) for l in spec.links))


def _portable(spec: Spec) -> Spec:
    """The spec with plain dicts in place of read-only mappings, so that it
    pickles (to worker processes and Dask)."""
    return _with_maps(spec, dict)


def _restore(spec: Spec) -> Spec:
    """The spec back with read-only mappings, as :func:`_portable` found it."""
    return _with_maps(spec, frozen_map)


def _plain(obj):
    if is_dataclass(obj):
        return {f.name: _plain(getattr(obj, f.name)) for f in fields(obj) if f.name not in ("path", "warnings")}
    if isinstance(obj, Mapping):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    return obj


def spec_digest(spec: Spec) -> str:
    """SHA-256 of the spec's content (not of where it was read from)."""
    return hashlib.sha256(json.dumps(_plain(spec), sort_keys=True).encode()).hexdigest()


def _point_key(spec: Spec, coords: dict, options, warm: bool) -> str:
    data = {"version": STUDY_VERSION, "spec": spec_digest(spec), "coords": {k: repr(float(v)) if isinstance(v, float) else v
                                                 for k, v in coords.items()},
            "options": asdict(options), "warm": bool(warm)}
    return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()[:24]


def _columns_of(spec: Spec) -> list:
    cols = [f"areas[{a.name}].error" for a in spec.areas if a.has_target]
    for l in spec.links:
        cols += [f"links[{l.id}].power", f"links[{l.id}].through_gain", f"links[{l.id}].silent"]
    from hierarchy.design.allocation import constraints

    for name in constraints(spec).names:  # budgets and their caps, as the results list them
        cols += [f"budgets[{name}].used", f"budgets[{name}].shadow_price"]
    return cols


_HEAD = ["status", "converged", "objective", "weighted_error", "energy_cost", "activity_cost"]
_TAIL = ["silent_links", "search", "agreement", "iterations", "evaluations", "seconds", "message"]


def _row(result) -> dict:
    from hierarchy.report.results import through_gain

    spec, s = result.spec, result.scores
    row = {"status": result.status, "converged": result.converged, "objective": float(result.objective),
           "weighted_error": s.weighted_error, "energy_cost": s.energy_cost, "activity_cost": s.activity_cost}
    for a in spec.areas:
        if a.has_target:
            row[f"areas[{a.name}].error"] = s.areas[a.name].error
    for l in spec.links:
        row[f"links[{l.id}].power"] = s.links[l.id].power
        row[f"links[{l.id}].through_gain"] = through_gain(spec, result.gains, l)
        row[f"links[{l.id}].silent"] = l.id in result.silent
    for b in result.budgets.values():
        row[f"budgets[{b.name}].used"] = b.used
        row[f"budgets[{b.name}].shadow_price"] = b.shadow_price
    row.update({"silent_links": [l.id for l in spec.links if l.id in result.silent],
                "iterations": int(result.iterations), "evaluations": int(result.evaluations),
                "seconds": float(result.seconds), "message": result.message})
    return {k: (float(v) if isinstance(v, (np.floating, np.integer)) and not isinstance(v, bool) else v)
            for k, v in row.items()}


def run_point(spec: Spec, options=None, start=None) -> dict:
    """Design one point of a study.

    A warm-started point skips the designer's probe phase (``probe_iter``
    0): with a single start there is nothing to choose, and a probe would
    only restart the quasi-Newton curvature once more (the designer's own
    wake-up tests bring back a link that was silent at the previous point
    where it pays here).

    Parameters
    ----------
    spec : Spec
    options : hierarchy.design.Options, optional
    start : Gains or dict, optional
        Warm start: gains, or their JSON form (``Gains.to_dict()``).

    Returns
    -------
    dict
        ``{"row": table row, "gains": the design in JSON form or None}``. A
        point whose design raised a user-level error (for example pinned
        gains that make the loop unstable) is a row with status ``failed``
        and the message; it is not an exception.

    Examples
    --------
    >>> out = run_point(spec)                                       # doctest: +SKIP
    >>> out["row"]["status"]                                        # doctest: +SKIP
    'converged'
    """
    from hierarchy.design import design
    from hierarchy.loop.gains import gains_from_dict

    t0 = time.perf_counter()
    opts = _opts(options)
    if isinstance(start, dict):
        start = gains_from_dict(start)
    try:
        # No floor per point: one convex program each, for a bound that a
        # study of one spec family can compute once (hierarchy.design.floor).
        result = design(spec, replace(opts, probe_iter=0) if start is not None else opts, start=start,
                        compare_unpinned=False, floor=False)
    except HierarchyError as err:
        return {"row": {"status": "failed", "converged": False, "silent_links": None,
                        "seconds": time.perf_counter() - t0, "message": str(err)}, "gains": None}
    row = _row(result)
    row["seconds"] = time.perf_counter() - t0
    return {"row": row, "gains": result.gains.to_dict()}


def _design_point(spec, options, start):
    """Entry point of a worker (a process, a Dask task or in-process).
    ``start`` is ``None`` or the previous point's output (gains and row)."""
    return run_point(_restore(spec), options, None if start is None else start["gains"])


#: How often (seconds) a worker checks that the process that started it lives.
WATCH_PARENT_SECONDS = 0.5


def _worker_init(parent: int | None = None):
    """Worker processes: leave Ctrl-C, SIGTERM and SIGHUP to the parent
    (which ends its workers with SIGKILL when it stops), end with the parent
    if it dies without a word, and run one BLAS thread each.

    A worker's parent process is the start method's server, not the study's
    process, so two guards watch: the kernel kills the worker when its parent
    ends (``PR_SET_PDEATHSIG`` on Linux), and a thread ends it when the
    study's process ``parent`` is gone (any system)."""
    import signal
    import threading

    for name in ("SIGINT", "SIGTERM", "SIGHUP"):
        if hasattr(signal, name):
            signal.signal(getattr(signal, name), signal.SIG_IGN)
    _die_with_parent()
    if parent is not None:
        threading.Thread(target=_watch_parent, args=(parent, os.getppid()), daemon=True,
                         name="hierarchy-watch-parent").start()
    global _BLAS
    _BLAS = single_thread(force=True)  # threadpoolctl applies the limit at once


def _die_with_parent() -> None:
    """Ask Linux to SIGKILL this process when its parent ends (best effort)."""
    if not sys.platform.startswith("linux"):
        return
    import ctypes
    import signal

    with contextlib.suppress(OSError, AttributeError):
        libc = ctypes.CDLL(None, use_errno=True)
        PR_SET_PDEATHSIG = 1
        libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)


def _watch_parent(parent: int, server: int) -> None:
    """End this worker as soon as the study's process or the start method's
    server is gone (the server is this worker's own parent)."""
    while True:
        time.sleep(WATCH_PARENT_SECONDS)
        if os.getppid() != server or not _alive(parent):
            os._exit(1)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, but not ours to signal
        return True
    try:  # Linux: a killed process stays a zombie until its own parent reaps it
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[1].split()[0] not in (b"Z", b"X")
    except (OSError, IndexError):
        return True


@dataclass
class _Point:
    index: int  # row in the study's table
    spec: Spec
    coords: dict
    key: str
    start: dict | None = None  # a start of its own (gains in JSON form), over the chain's


@dataclass
class _Chain:
    points: list
    pos: int = 0
    start: dict | None = None  # the previous point's output: its gains and row


class _Inline(cf.Executor):
    """Runs each task at submission, in this process (one worker)."""

    def submit(self, fn, /, *args, **kwargs):
        fut = cf.Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except Exception as err:  # noqa: BLE001 - handed to the caller through the future
            fut.set_exception(err)
        return fut


def default_workers() -> int:
    """Local worker processes by default: ``min(2, cpu count)``."""
    return max(1, min(2, os.cpu_count() or 1))


def _dask_client(address):
    try:
        from distributed import Client
    except ImportError:
        raise InputError("Dask is not installed", place="--dask",
                         fix="pip install 'hierarchy[dask]' (or dask[distributed])") from None
    if not isinstance(address, str):
        return address, False  # a Client already
    try:
        return Client(address, timeout="10s", set_as_default=False), True
    except (OSError, TimeoutError) as err:
        raise InputError(f"cannot reach a Dask scheduler at {address} ({err})", place="--dask",
                         fix="start the cluster first, or check the address (e.g. tcp://127.0.0.1:8786)") from None


class _Pool:
    """The executor a study runs on, and how to stop it."""

    def __init__(self, workers: int, dask):
        self.client, self.own_client = (None, False)
        if dask is not None:
            self.client, self.own_client = _dask_client(dask)
            self.executor = self.client.get_executor(pure=False)
        elif workers == 1:
            self.executor = _Inline()
        else:
            import multiprocessing as mp

            method = "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"
            self.executor = cf.ProcessPoolExecutor(workers, mp_context=mp.get_context(method),
                                                   initializer=_worker_init, initargs=(os.getpid(),))

    def close(self, abort=False):
        if abort and isinstance(self.executor, cf.ProcessPoolExecutor):
            # shutdown() alone would wait for the points being designed; a
            # user who pressed Ctrl-C wants to stop now. (Private attribute,
            # guarded: without it we fall back to waiting.)
            for proc in list((getattr(self.executor, "_processes", None) or {}).values()):
                proc.kill()  # workers ignore SIGTERM (it is the parent's to handle)
        if isinstance(self.executor, cf.ProcessPoolExecutor):
            self.executor.shutdown(wait=not abort, cancel_futures=True)
        else:
            self.executor.shutdown(wait=not abort)  # Dask's executor cancels its tasks when not waiting
        if self.own_client:
            self.client.close()


def _dask_threads(dask) -> int:
    client, own = _dask_client(dask)
    try:
        return max(1, sum(client.nthreads().values()))
    finally:
        if own:
            client.close()


def _split(points: list, pieces: int) -> list:
    """Contiguous chunks of nearly equal length."""
    pieces = max(1, min(pieces, len(points)))
    edges = np.linspace(0, len(points), pieces + 1).round().astype(int)
    return [points[a:b] for a, b in zip(edges[:-1], edges[1:]) if b > a]


def _load_part(folder: Path, key: str):
    from hierarchy.io import read_text

    try:  # a part that is not a readable regular file is designed again
        data = json.loads(read_text(folder / f"{key}.json", MAX_PART_FILE))
    except (OSError, ValueError, RecursionError):
        return None
    if not isinstance(data, dict) or not isinstance(data.get("row"), dict):
        return None
    if data.get("format") != POINT_FORMAT or data.get("key") != key:
        return None
    return {"row": data["row"], "gains": data.get("gains")}


def _progress(total, initial, label, enabled):
    from tqdm.auto import tqdm

    return tqdm(total=total, initial=initial, desc=label, unit="point", file=sys.stderr,
                disable=not enabled, dynamic_ncols=True, leave=True)


def _execute(chains: list, options, *, parts, workers, dask, warm, progress, label, fresh):
    """Design every point of ``chains`` (lists of :class:`_Point`), cut into
    ``workers`` contiguous chunks. Returns ``(outputs by index, computed,
    reused, chunk bounds)``."""
    total = sum(len(c) for c in chains)
    per_chain = max(1, math.ceil(workers / max(1, len(chains))))
    chunks = [_Chain(piece) for c in chains for piece in _split(c, per_chain)]
    outputs, reused, computed = {}, 0, 0
    if parts is not None:
        try:
            parts.mkdir(exist_ok=True)
        except OSError as err:
            raise InputError(f"cannot make the folder for finished points ({err.strerror or err})",
                             place=str(parts), fix="check the folder's permissions, or choose another --out") \
                from None
        if not fresh:
            for c in chunks:
                for p in c.points:
                    got = _load_part(parts, p.key)
                    if got is not None:
                        outputs[p.index], reused = got, reused + 1
    bar = _progress(total, reused, label, progress)
    pool = _Pool(workers, dask) if reused < total else None
    running = {}

    def advance(chain: _Chain):
        while chain.pos < len(chain.points):
            p = chain.points[chain.pos]
            if p.index in outputs:
                chain.start = outputs[p.index]
                chain.pos += 1
                continue
            start = {"gains": p.start} if p.start is not None else (chain.start if warm else None)
            fut = pool.executor.submit(_design_point, _portable(p.spec), options, start)
            running[fut] = (chain, p)
            return

    aborted = True
    stack = contextlib.ExitStack()
    stack.enter_context(single_thread())
    try:
        for chain in chunks:
            advance(chain)
        while running:
            done, _ = cf.wait(list(running), return_when=cf.FIRST_COMPLETED)
            for fut in done:
                chain, p = running.pop(fut)
                try:
                    out = fut.result()
                except cf.BrokenExecutor:
                    where = (f"the {reused + computed} finished points are kept in {parts}/" if parts is not None
                             else "no output folder was given")
                    raise HierarchyError(
                        f"a worker process ended without finishing its point (killed, or out of memory); "
                        f"{where}", place="--workers",
                        fix="run the same command again to resume, with fewer --workers if memory is short") \
                        from None
                outputs[p.index] = out
                computed += 1
                if parts is not None:
                    atomic_write_text(parts / f"{p.key}.json", json.dumps(
                        {"format": POINT_FORMAT, "version": STUDY_VERSION, "key": p.key,
                         "coords": p.coords, "row": out["row"], "gains": out["gains"]}))
                bar.update(1)
                chain.start, chain.pos = out, chain.pos + 1
                advance(chain)
        aborted = False
    except KeyboardInterrupt:
        bar.close()
        where = (f"kept in {parts}/; run the same command again to resume" if parts is not None
                 else "lost (no output folder was given)")
        print(f"interrupted: {reused + computed} of {total} points are finished and {where}", file=sys.stderr)
        raise
    finally:
        bar.close()
        if pool is not None:
            pool.close(abort=aborted)
        stack.close()
    bounds = [[c.points[0].index, c.points[-1].index] for c in chunks]
    return outputs, computed, reused, bounds


def _opts(options):
    from hierarchy.design import Options

    return options or Options()
