"""Studies: how the best circuit changes as the spec changes.

Three studies share one point runner and one scheduler:

* a **sweep** varies one spec value over a grid and designs every point;
* a **phase map** varies two values over a grid (which links are silent where);
* a **comparison** designs several specs over a range of total budgets, or
  of scales of their link prices (which architecture wins where, and by how
  much).

Values are addressed by a *path* on the typed spec (never by editing YAML):

=============================  ==================================================
path                           meaning of the number given
=============================  ==================================================
``links[FROM->TO].price``      the link's price per unit of power (>= 0)
``links[FROM->TO].noise``      channel noise: the number times the identity
``budgets[NAME].total``        the budget's total (>= 0)
``areas[NAME].weight``         weight of the area's error (>= 0)
``areas[NAME].activity_price`` price of the area's activity (>= 0)
``sensors[NAME].noise``        sensor noise: the number times the identity
``world.states[NAME].noise``   process noise of the block: number times identity
``world.states[NAME].dynamics`` the block's own dynamics: number times identity
=============================  ==================================================

A path may select several places at once (a *grouped path*): in place of a
name write ``*`` (every link, area, sensor, budget or state block of the
section) or, for links, ``kind:prediction``, ``kind:residual``,
``from:NODE`` or ``to:NODE``. Every selected place is set to the same number:
``links[kind:prediction].price`` sweeps every prediction price together
(``areas[*].weight`` leaves relays out: they have no error to weigh). A
name of the spec is always read as that name first. A group that selects
nothing is refused, and the modified spec passes the same checks as a single
path's.

A noise set by a number replaces the whole covariance by that multiple of the
identity (a vector link's off-diagonal terms are dropped). Every modified
spec is checked by :func:`hierarchy.rules.check_spec`, the rules the spec
reader applies (a priced or budgeted link needs positive definite noise, a
noisy link needs a price or a budget, the world must stay stable within the
margin, a relay has no weight) before any point
is designed, and a bad path or value is an :class:`~hierarchy.errors.InputError`
that names it.

Continuation: the points of a study are laid along chains (the grid in order;
a phase map row by row, back and forth). Each point is designed from the
gains of the point before it on its chain (a warm start). To run in parallel
a chain is cut into contiguous chunks, one per worker; the first point of
each chunk starts cold. So the table can depend, within solver tolerance and
up to local optima, on the number of chunks: rerun with the same ``workers``
to reproduce a table exactly. A warm-started point skips the designer's
probe phase (one start: nothing to choose), and every point is checked for a
silent prediction into a sensor that would pay if woken, a saddle the
designer does not test (see :func:`run_point`).

Long runs: with an ``output`` base path, every finished point is written at
once to ``<output>.parts/<key>.json`` (atomically). The key hashes the
modified spec's content, the paths and values, the designer options and the
warm-start setting, so a changed spec never reuses a stale point. A rerun of
the same study loads the finished points and designs only the others; the
tables (``<output>.csv``, ``<output>.json``) are written atomically at the end.

Examples
--------
>>> from hierarchy.spec import load_spec
>>> spec = load_spec("specs/single-loop.yaml")                       # doctest: +SKIP
>>> st = sweep(spec, "links[estimate->thermometer].price",
...            grid(1e-4, 1, 9, log=True), log=True, workers=1)      # doctest: +SKIP
>>> st.silent_ranges()["estimate->thermometer"]                      # doctest: +SKIP
[{'from': 0.0316..., 'to': 1.0, 'points': 4, 'below': 0.01, 'above': None}]
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import difflib
import hashlib
import json
import math
import os
import re
import sys
import time
from dataclasses import asdict, dataclass, field, fields, is_dataclass, replace
from pathlib import Path
from typing import Mapping

import numpy as np

from . import rules
from .blas import single_thread
from .errors import HierarchyError, InputError
from .io import atomic_write_text
from .model import Spec, World, frozen_array, frozen_map

STUDY_FORMAT = "hierarchy-study"
STUDY_VERSION = 1
POINT_FORMAT = "hierarchy-point"

#: Columns that differ from run to run of the same design (timings).
TIMING_COLUMNS = ("seconds",)
#: Objectives closer than this (relative) are a tie in a comparison.
TIE_RTOL = 1e-5
#: Largest number of points in one study.
MAX_POINTS = 100_000
#: A finished point's file above this size (bytes) is not trusted.
MAX_PART_FILE = 50_000_000

_SECTIONS = {
    "links": ("price", "noise"),
    "budgets": ("total",),
    "areas": ("weight", "activity_price"),
    "sensors": ("noise",),
    "world.states": ("dynamics", "noise"),
}
_PATH = re.compile(r"^(?P<section>[A-Za-z_.]+)\[(?P<name>[^\[\]]+)\]\.(?P<field>[A-Za-z_]+)$")


# ---------------------------------------------------------------------------
# value paths


@dataclass(frozen=True)
class ValuePath:
    """A settable number of a spec, e.g. ``links[low->high].price``, or a
    group of them (``links[kind:prediction].price``): ``members`` are the
    names the path sets (one for a plain path)."""

    section: str
    name: str
    field: str
    members: tuple = ()

    def __str__(self) -> str:
        return f"{self.section}[{self.name}].{self.field}"

    @property
    def grouped(self) -> bool:
        """Whether the path names a group rather than one place."""
        return self.members != (self.name,)


#: Group selectors a path may hold in place of a name (besides ``*``).
_SELECTORS = {"links": ("kind", "from", "to")}


def _group(spec: Spec, section: str, name: str, text: str):
    """The names a group selector picks, or ``None`` when ``name`` is not a
    selector. Raises :class:`InputError` for a selector that picks nothing."""
    if name == "*":
        found = _names(spec, section)
    else:
        key, colon, value = name.partition(":")
        if not colon or key not in _SELECTORS.get(section, ()):
            return None
        if key == "kind":
            from .model import LINK_KINDS

            if value not in LINK_KINDS:
                raise InputError(f"there is no link kind `{value}`{_close(value, LINK_KINDS)}", place=text,
                                 fix="write kind:prediction or kind:residual")
        attr = {"kind": "kind", "from": "source", "to": "target"}[key]
        found = [l.id for l in spec.links if getattr(l, attr) == value]
    if not found:
        raise InputError(f"the group `{name}` selects nothing in this spec", place=text,
                         fix="choose a group that holds at least one " + {
                             "links": "link", "budgets": "budget", "areas": "area", "sensors": "sensor",
                             "world.states": "state block"}[section])
    return tuple(found)


def _names(spec: Spec, section: str) -> list:
    return {
        "links": lambda: [l.id for l in spec.links],
        "budgets": lambda: [b.name for b in spec.budgets],
        "areas": lambda: [a.name for a in spec.areas],
        "sensors": lambda: [s.name for s in spec.sensors],
        "world.states": lambda: list(spec.world.names),
    }[section]()


def settable_paths(spec: Spec) -> list:
    """Every path :func:`set_value` accepts for ``spec``.

    Examples
    --------
    >>> settable_paths(spec)[:2]                                    # doctest: +SKIP
    ['links[thermometer->estimate].price', 'links[thermometer->estimate].noise']
    """
    return [f"{section}[{name}].{f}" for section, fs in _SECTIONS.items()
            for name in _names(spec, section) for f in fs]


def _choices(items, limit=12) -> str:
    items = list(items)
    text = ", ".join(items[:limit])
    return text + (f", ... ({len(items)} in all)" if len(items) > limit else "")


def _close(word, known) -> str:
    near = difflib.get_close_matches(word, list(known), n=1)
    return f" (did you mean `{near[0]}`?)" if near else ""


def _undotted(spec: Spec, text: str) -> str:
    """The shell-safe form, ``links.low:high.price`` or ``areas.top.weight``,
    in brackets (names never hold a dot); other text is returned as it is."""
    for section in sorted(_SECTIONS, key=len, reverse=True):
        name, dot, fld = text[len(section) + 1:].rpartition(".")
        if text.startswith(section + ".") and dot and name and "[" not in text:
            ids = [l.id for l in spec.links if f"{l.source}:{l.target}" == name] if section == "links" else []
            return f"{section}[{ids[0] if len(ids) == 1 else name}].{fld}"
    return text


def parse_path(spec: Spec, text) -> ValuePath:
    """Read a value path and check that it names something in ``spec``.

    Raises
    ------
    InputError
        Naming the path, with the valid choices in the fix.

    Examples
    --------
    >>> parse_path(spec, "links[low->high].price")                 # doctest: +SKIP
    ValuePath(section='links', name='low->high', field='price')
    >>> parse_path(spec, "links.low:high.price")    # the same, safe in a shell unquoted   # doctest: +SKIP
    ValuePath(section='links', name='low->high', field='price')
    """
    if isinstance(text, ValuePath):
        text = str(text)
    m = _PATH.match(_undotted(spec, str(text).strip()))
    if m is None:
        if str(text).strip().endswith("-") and "]" not in str(text):
            raise InputError("this path looks cut at `-`: the shell may have read the `>` of `->` as a "
                             "redirection (and written a file named after the rest)", place=str(text),
                             fix="quote the path, e.g. 'links[low->high].price', or write it with no shell "
                                 "characters: links.low:high.price")
        raise InputError("cannot read this value path", place=str(text),
                         fix="write SECTION[NAME].FIELD, e.g. " + _choices(settable_paths(spec), 4))
    section, name, fld = m.group("section"), m.group("name"), m.group("field")
    if section not in _SECTIONS:
        raise InputError(f"there is no section `{section}` to vary{_close(section, _SECTIONS)}",
                         place=str(text), fix="sections: " + ", ".join(_SECTIONS))
    names = _names(spec, section)
    members = (name,) if name in names else _group(spec, section, name, str(text))
    if members is None:
        what = {"links": "link", "budgets": "budget", "areas": "area", "sensors": "sensor",
                "world.states": "state block"}[section]
        raise InputError(f"this spec has no {what} `{name}`{_close(name, names)}", place=str(text),
                         fix=(f"choose one of: {_choices(names)}; or a group: "
                              + ", ".join(("*",) + tuple(f"{k}:..." for k in _SELECTORS.get(section, ()))))
                         if names else f"the spec has no {what}s")
    if fld not in _SECTIONS[section]:
        raise InputError(f"`{section}[{name}]` has no settable value `{fld}`{_close(fld, _SECTIONS[section])}",
                         place=str(text), fix="settable here: " + ", ".join(_SECTIONS[section]))
    return ValuePath(section, name, fld, members)


def _world_with(world: World, name: str, **changes) -> World:
    return World(tuple(replace(b, **changes) if b.name == name else b for b in world.states))


def set_value(spec: Spec, path, value) -> Spec:
    """A copy of ``spec`` with the value at ``path`` set to ``value``, checked
    for well-posedness.

    A noise or a dynamics block is set to ``value`` times the identity.

    Raises
    ------
    InputError
        For a bad path, a value out of range, or a circuit that the value
        makes ill-posed (the message names the path and the value).

    Examples
    --------
    >>> cheap = set_value(spec, "links[low->high].price", 0.01)     # doctest: +SKIP
    """
    p = parse_path(spec, path)
    out = spec
    v = _number(value, p)
    members = p.members
    if p.grouped and p.section == "areas" and p.field == "weight":
        members = [a for a in members if spec.area(a).has_target]  # a relay has no error to weigh
    for member in members:
        out = _set_one(out, ValuePath(p.section, member, p.field, (member,)), v)
    rules.check_spec(out, place=f"{p} = {v:.12g}", error=InputError)
    return out


def _number(value, p) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"the value {value!r} is not a number", place=str(p), fix="give a plain number") from None
    if not math.isfinite(v):
        raise InputError(f"the value {v} is not finite", place=str(p), fix="give a finite number")
    if v < 0 and p.field != "dynamics":
        raise InputError(f"{p.field} must be at least 0; got {v:g}", place=str(p),
                         fix="keep the range at or above 0")
    return v


def _set_one(spec: Spec, p: ValuePath, v: float) -> Spec:
    """``spec`` with the one place ``p`` set to ``v`` (not yet checked)."""
    if p.section == "links":
        link = spec.link(p.name)
        new = frozen_array(v * np.eye(link.dim)) if p.field == "noise" else v
        links = tuple(replace(l, **{p.field: new}) if l.id == p.name else l for l in spec.links)
        out = replace(spec, links=links)
    elif p.section == "budgets":
        out = replace(spec, budgets=tuple(replace(b, total=v) if b.name == p.name else b for b in spec.budgets))
    elif p.section == "areas":  # a relay's weight is refused by rules.check_area
        out = replace(spec, areas=tuple(replace(a, **{p.field: v}) if a.name == p.name else a
                                        for a in spec.areas))
    elif p.section == "sensors":
        dim = spec.sensor(p.name).dim
        out = replace(spec, sensors=tuple(replace(s, noise=frozen_array(v * np.eye(dim))) if s.name == p.name
                                          else s for s in spec.sensors))
    else:
        block = next(b for b in spec.world.states if b.name == p.name)
        out = replace(spec, world=_world_with(spec.world, p.name,
                                              **{p.field: frozen_array(v * np.eye(block.dim))}))
    return out


# ---------------------------------------------------------------------------
# grids


def grid(lo, hi, n, log=False) -> np.ndarray:
    """``n`` values from ``lo`` to ``hi``, evenly spaced or (``log``) evenly
    spaced in logarithm.

    Examples
    --------
    >>> grid(0.01, 1, 3, log=True).tolist()
    [0.01, 0.1, 1.0]
    """
    lo, hi, n = float(lo), float(hi), int(n)
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise InputError("the range ends must be finite numbers", place="range", fix="give finite numbers")
    if n < 1 or n > MAX_POINTS:
        raise InputError(f"the number of points must be between 1 and {MAX_POINTS}; got {n}",
                         place="points", fix="give a number of points such as 20")
    if n == 1:
        return np.array([lo])
    if log:
        if lo <= 0 or hi <= 0:
            raise InputError(f"a log grid needs both ends above 0; got {lo:g} and {hi:g}", place="range",
                             fix="start the range above 0, or leave out --log")
        out = np.geomspace(lo, hi, n)
    else:
        out = np.linspace(lo, hi, n)
    out[0], out[-1] = lo, hi  # exact ends: the values a user typed
    return out


def parse_range(text, place="range"):
    """Read ``LO:HI:N`` (``N`` points from ``LO`` to ``HI``).

    Examples
    --------
    >>> parse_range("0.1:10:5")
    (0.1, 10.0, 5)
    """
    parts = str(text).split(":")
    try:
        if len(parts) != 3:
            raise ValueError
        return float(parts[0]), float(parts[1]), int(parts[2])
    except ValueError:
        raise InputError(f"cannot read the range `{text}`", place=place,
                         fix="write LO:HI:N, e.g. 0.1:10:8 for 8 points from 0.1 to 10") from None


# ---------------------------------------------------------------------------
# transport and keys


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


# ---------------------------------------------------------------------------
# the point runner


def _columns_of(spec: Spec) -> list:
    cols = [f"areas[{a.name}].error" for a in spec.areas if a.has_target]
    for l in spec.links:
        cols += [f"links[{l.id}].power", f"links[{l.id}].through_gain", f"links[{l.id}].silent"]
    from .allocation import constraints

    for name in constraints(spec).names:  # budgets and their caps, as the results list them
        cols += [f"budgets[{name}].used", f"budgets[{name}].shadow_price"]
    return cols


_HEAD = ["status", "converged", "objective", "weighted_error", "energy_cost", "activity_cost"]
_TAIL = ["silent_links", "search", "agreement", "iterations", "evaluations", "seconds", "message"]


def _row(result) -> dict:
    from .results import through_gain

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
    from .design import design
    from .gains import gains_from_dict

    t0 = time.perf_counter()
    opts = _opts(options)
    if isinstance(start, dict):
        start = gains_from_dict(start)
    try:
        # No floor per point: one convex program each, for a bound that a
        # study of one spec family can compute once (hierarchy.floor).
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


# ---------------------------------------------------------------------------
# the scheduler


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
    from .io import read_text

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


# ---------------------------------------------------------------------------
# results


@dataclass
class Study:
    """The table of a study and what it found.

    Attributes
    ----------
    kind : str
        ``"sweep"``, ``"phase"`` or ``"compare"``.
    axes : list of dict
        ``{"path", "values", "scale"}`` per varied value (compare: the budget).
    columns : list of str
        Table columns; a row lacks the columns that do not apply to it.
    rows : list of dict
        One row per point: its coordinates, ``status``, ``converged``,
        ``objective``, the parts of the objective, ``areas[A].error``,
        ``links[L].power``, ``links[L].through_gain``, ``links[L].silent``,
        ``budgets[B].used``, ``budgets[B].shadow_price``, ``silent_links``,
        ``iterations``, ``evaluations``, ``seconds``, ``message``.
    gains : list of dict
        The design of every row (gains-file layout, or ``None``).
    computed, reused : int
        Points designed in this run, and loaded from finished parts.
    """

    kind: str
    specs: list
    axes: list
    columns: list
    rows: list
    gains: list
    options: dict
    warm: bool
    chunks: list
    computed: int = 0
    reused: int = 0
    seconds: float = 0.0
    extra: dict = field(default_factory=dict)

    def column(self, name) -> list:
        """The values of one column (``None`` where a row lacks it)."""
        if name not in self.columns:
            raise InputError(f"the table has no column `{name}`{_close(name, self.columns)}", place="--show",
                             fix="choose among: " + _choices(quantity_columns(self), 20))
        return [r.get(name) for r in self.rows]

    @property
    def values(self) -> list:
        return self.axes[0]["values"]

    def silent_ranges(self) -> dict:
        """Sweep: for each link, the runs of grid points where it is silent,
        ``{"from", "to", "points", "below", "above"}``: the first and last
        silent value, and the nearest values on either side where it is not
        (``None`` at the end of the grid). The true edge lies between
        ``below`` and ``from`` (and between ``to`` and ``above``). A failed
        point counts as not silent."""
        return self.extra.get("silent_ranges", {})

    def to_dict(self) -> dict:
        from .results import _clean

        d = {"format": STUDY_FORMAT, "version": STUDY_VERSION, "kind": self.kind, "specs": self.specs,
             "axes": self.axes, "options": self.options, "warm_starts": self.warm,
             "chunks": self.chunks, "points": len(self.rows), "computed": self.computed,
             "reused": self.reused, "seconds": self.seconds,
             "not_converged": [i for i, r in enumerate(self.rows) if not r.get("converged")],
             **self.extra, "columns": self.columns, "rows": self.rows}
        return _clean(d)

    def csv_text(self) -> str:
        """The table as CSV text (written with pandas; cells as
        :func:`_csv_cell` spells them, so floats keep every digit)."""
        import pandas as pd

        frame = pd.DataFrame([[_csv_cell(r.get(c)) for c in self.columns] for r in self.rows],
                             columns=self.columns, dtype=object)
        return frame.to_csv(index=False, lineterminator="\n")

    def write(self, base) -> list:
        """Write ``<base>.csv`` and ``<base>.json`` atomically; returns the paths."""
        from .results import write_json

        base = Path(base)
        csv_path, json_path = Path(f"{base}.csv"), Path(f"{base}.json")
        atomic_write_text(csv_path, self.csv_text())
        write_json(json_path, self.to_dict())
        return [csv_path, json_path]

    def to_pandas(self):
        """The table as a pandas DataFrame, one row per point in the study's
        order (row ``i`` is ``rows[i]``), one column per entry of
        :attr:`columns` (see :func:`hierarchy.notebook.study_frame`).

        Examples
        --------
        >>> import hierarchy
        >>> from hierarchy.studies import sweep
        >>> spec = hierarchy.load_spec("specs/single-loop.yaml")
        >>> st = sweep(spec, "links[thermometer->estimate].price", [0.1, 1.0], workers=1)
        >>> st.to_pandas()["links[thermometer->estimate].price"].tolist()
        [0.1, 1.0]
        """
        from .notebook import study_frame

        return study_frame(self)

    def to_xarray(self):
        """The study as an xarray Dataset with one dimension per swept value
        (a sweep: its path; a phase map: the y path and the x path; a
        comparison: ``spec`` and ``budget``), coordinates labelled with the
        study's values (see :func:`hierarchy.notebook.study_dataset`).

        Examples
        --------
        >>> import hierarchy
        >>> from hierarchy.studies import sweep
        >>> spec = hierarchy.load_spec("specs/single-loop.yaml")
        >>> st = sweep(spec, "links[thermometer->estimate].price", [0.1, 1.0], workers=1)
        >>> ds = st.to_xarray()
        >>> ds["objective"].dims
        ('links[thermometer->estimate].price',)
        """
        from .notebook import study_dataset

        return study_dataset(self)

    def __repr__(self) -> str:
        from .notebook import study_repr

        return study_repr(self)

    def _repr_html_(self) -> str:
        from .notebook import study_html

        return study_html(self)


def _csv_cell(v):
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    if isinstance(v, (list, tuple)):
        return "; ".join(map(str, v))
    return v


def quantity_columns(study: Study) -> list:
    """Numeric columns one may plot (``--show``)."""
    skip = {"status", "converged", "silent_links", "message"}
    return [c for c in study.columns if c not in skip and not c.endswith(".silent")
            and c not in {a["path"] for a in study.axes} and c not in ("spec", "budget")]


def parse_show(text) -> list:
    """Split ``--show`` at commas outside brackets:
    ``"links[a->s].power,objective"`` -> two columns."""
    out, depth, cur = [], 0, ""
    for ch in str(text or ""):
        depth += (ch == "[") - (ch == "]")
        if ch == "," and depth == 0:
            out.append(cur.strip())
            cur = ""
        else:
            cur += ch
    out.append(cur.strip())
    return [c for c in out if c]


def check_columns(specs, names, coords=()) -> None:
    """Refuse, before any design, a ``--show`` column the table will not have."""
    known = [c for c in _columns(list(coords), list(specs)) if c not in _HEAD[:2] and c not in _TAIL[:1]
             and c != "message" and not c.endswith(".silent") and c not in coords]
    for name in names:
        if name not in known:
            raise InputError(f"the table will have no column `{name}`{_close(name, known)}", place="--show",
                             fix="choose among: " + _choices(known, 20))


def output_base(path) -> Path:
    """``results/run`` from ``results/run``, ``results/run.csv`` or ``.json``;
    the folder must exist."""
    p = Path(path)
    if p.suffix.lower() in (".csv", ".json"):
        p = p.with_suffix("")
    folder = p.parent if str(p.parent) else Path(".")
    if not folder.is_dir():
        raise InputError("the output folder does not exist", place=str(path),
                         fix="create the folder or choose another --out")
    return p


def _spec_info(spec: Spec, label=None) -> dict:
    return {"name": spec.name, "label": label or spec.name, "file": spec.path, "digest": spec_digest(spec)}


def _opts(options):
    from .design import Options

    return options or Options()


def _columns(coords: list, specs: list) -> list:
    cols = list(coords) + list(_HEAD)
    for spec in specs:
        cols += [c for c in _columns_of(spec) if c not in cols]
    return cols + list(_TAIL)


# ---------------------------------------------------------------------------
# sweep


def _runs(flags: list) -> list:
    """Maximal runs of True as (first, last) index pairs."""
    out, start = [], None
    for i, f in enumerate(flags + [False]):
        if f and start is None:
            start = i
        elif not f and start is not None:
            out.append((start, i - 1))
            start = None
    return out


def sweep_silent_ranges(values, rows, link_ids) -> dict:
    """See :meth:`Study.silent_ranges`."""
    out = {}
    for lid in link_ids:
        flags = [bool(r.get(f"links[{lid}].silent")) for r in rows]
        runs = _runs(flags)
        if runs:
            out[lid] = [{"from": values[a], "to": values[b], "points": b - a + 1,
                         "below": values[a - 1] if a > 0 else None,
                         "above": values[b + 1] if b + 1 < len(values) else None} for a, b in runs]
    return out


def sweep(spec: Spec, path, values, options=None, *, log=False, output=None, workers=None, dask=None,
          warm=True, progress=False, fresh=False) -> Study:
    """Design ``spec`` at every value of ``path`` (continuation along the grid).

    Parameters
    ----------
    spec : Spec
    path : str
        A value path (see the module docstring).
    values : sequence of float
        The grid, in the order to walk it (see :func:`grid`).
    options : hierarchy.design.Options, optional
    log : bool
        Whether the grid is logarithmic (for plots and the table).
    output : path, optional
        Base path: ``<output>.csv``, ``<output>.json`` and the finished
        points in ``<output>.parts/`` (resume). Without it nothing is written.
    workers : int, optional
        Chunks run in parallel (local processes; default ``min(2, cpus)``;
        1 runs in this process). With ``dask``: the number of chunks
        (default: the cluster's threads).
    dask : str or distributed.Client, optional
        Address of a running Dask scheduler (or a client) to run on.
    warm : bool
        Warm starts from the previous point (default); ``False`` designs
        every point from cold starts.
    progress : bool
        Show a progress bar on stderr.
    fresh : bool
        Ignore finished points from an earlier run.

    Returns
    -------
    Study

    Examples
    --------
    >>> st = sweep(spec, "links[a->s].price", grid(1e-3, 1, 20, log=True), log=True)   # doctest: +SKIP
    >>> st.silent_ranges()                                                         # doctest: +SKIP
    """
    opts = _opts(options)
    p = parse_path(spec, path)
    values = [float(v) for v in values]
    if not values:
        raise InputError("the grid is empty", place="points", fix="give at least one point")
    specs = [set_value(spec, p, v) for v in values]
    name = str(p)
    points = [_Point(i, s, {name: v}, _point_key(s, {name: v}, opts, warm)) for i, (s, v) in
              enumerate(zip(specs, values))]
    study = _run_study("sweep", [points], opts, [_spec_info(spec)],
                       [{"path": name, "values": values, "scale": "log" if log else "linear"}],
                       [name], [spec], output=output, workers=workers, dask=dask, warm=warm,
                       progress=progress, fresh=fresh)
    study.extra["silent_ranges"] = sweep_silent_ranges(values, study.rows, [l.id for l in spec.links])
    if output is not None:
        study.write(output_base(output))
    return study


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
        from .gains import gains_from_dict
        from .subcircuit import embed

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


# ---------------------------------------------------------------------------
# phase map


def phase_map(spec: Spec, x_path, x_values, y_path, y_values, options=None, *, x_log=False, y_log=False,
              output=None, workers=None, dask=None, warm=True, progress=False, fresh=False) -> Study:
    """Design ``spec`` on a grid of two values: which links are silent where.

    Rows are in ``y``-major order (row ``j * len(x_values) + i`` is
    ``(x_i, y_j)``); continuation walks the grid row by row, back and forth,
    so that each point starts from a neighbour. Other parameters as in
    :func:`sweep`.

    Returns
    -------
    Study
        ``extra["silent_sets"]`` counts the points of each set of silent
        links (``""`` for none).

    Examples
    --------
    >>> st = phase_map(spec, "links[a->s].noise", grid(0.01, 1, 8, True),
    ...                "links[a->s].price", grid(1e-3, 1, 8, True))    # doctest: +SKIP
    """
    opts = _opts(options)
    px, py = parse_path(spec, x_path), parse_path(spec, y_path)
    if str(px) == str(py):
        raise InputError("the two axes vary the same value", place=str(px), fix="choose two different paths")
    both = [m for m in px.members if px.section == py.section and px.field == py.field and m in py.members]
    if both:
        raise InputError(f"the two axes both set {px.section}[{both[0]}].{px.field}", place=f"{px} and {py}",
                         fix="choose groups that do not overlap")
    xs, ys = [float(v) for v in x_values], [float(v) for v in y_values]
    if not xs or not ys:
        raise InputError("a phase map needs points on both axes", place="range", fix="give at least 1 point")
    if len(xs) * len(ys) > MAX_POINTS:
        raise InputError(f"too many points ({len(xs) * len(ys)})", place="range", fix="use a coarser grid")
    nx = len(xs)
    order = []
    for j in range(len(ys)):
        row = range(nx) if j % 2 == 0 else range(nx - 1, -1, -1)
        order += [j * nx + i for i in row]
    points = {}
    for idx in order:
        j, i = divmod(idx, nx)
        s = set_value(set_value(spec, px, xs[i]), py, ys[j])
        coords = {str(px): xs[i], str(py): ys[j]}
        points[idx] = _Point(idx, s, coords, _point_key(s, coords, opts, warm))
    chain = [points[idx] for idx in order]
    study = _run_study("phase", [chain], opts, [_spec_info(spec)],
                       [{"path": str(px), "values": xs, "scale": "log" if x_log else "linear"},
                        {"path": str(py), "values": ys, "scale": "log" if y_log else "linear"}],
                       [str(px), str(py)], [spec], output=output, workers=workers, dask=dask, warm=warm,
                       progress=progress, fresh=fresh)
    counts = {}
    for r in study.rows:
        key = "; ".join(r["silent_links"]) if r.get("silent_links") is not None else "(failed)"
        counts[key] = counts.get(key, 0) + 1
    study.extra["silent_sets"] = counts
    if output is not None:
        study.write(output_base(output))
    return study


# ---------------------------------------------------------------------------
# architecture comparison


def varied_budget(spec: Spec, label: str) -> str:
    """The budget a comparison sets: the one named ``total``, else the only one."""
    names = [b.name for b in spec.budgets]
    if "total" in names:
        return "total"
    if len(names) == 1:
        return names[0]
    raise InputError(
        "a comparison sets one budget of each spec to each total, and this spec has "
        + ("no budget" if not names else f"{len(names)} budgets ({', '.join(names)}) and none is named `total`"),
        place=label, fix="add a budget over the links to compare (e.g. `{name: total, links: all, total: 1}`)"
        if not names else "name the budget to vary `total`")


def _labels(specs) -> list:
    labels = [Path(s.path).stem if s.path else s.name for s in specs]
    if len(set(labels)) < len(labels):
        labels = [f"{i + 1}:{lab}" for i, lab in enumerate(labels)]
    return labels


def _targets(spec: Spec) -> set:
    return {(a.name, a.tracks, a.weight, a.lag) for a in spec.areas if a.has_target and a.weight > 0}


def best_ranges(totals, labels, objectives, converged, tie_rtol=TIE_RTOL) -> list:
    """Which spec is best over which range of totals, and by how much.

    ``objectives[label][i]`` is the objective at ``totals[i]`` (``None`` if
    the design failed). Within ``tie_rtol`` (relative) the best ones tie.
    Each range is ``{"best", "from", "to", "points", "margin_min",
    "margin_max", "relative_min", "relative_max", "all_converged"}``, where a
    margin is the runner-up's objective minus the best one's, and relative
    is that margin over the runner-up's objective.
    """
    per_point = []
    for i, total in enumerate(totals):
        vals = sorted((objectives[lab][i], lab) for lab in labels
                      if objectives[lab][i] is not None and math.isfinite(objectives[lab][i]))
        if not vals:
            per_point.append(("none", None, None, False))
            continue
        best = vals[0][0]
        tol = tie_rtol * max(abs(best), 1e-300)
        tied = [lab for v, lab in vals if v - best <= tol]
        rest = [v for v, lab in vals if v - best > tol]
        winner = tied[0] if len(tied) == 1 else "tie: " + ", ".join(sorted(tied))
        margin = (rest[0] - best) if rest else None
        rel = margin / abs(rest[0]) if rest and rest[0] else None
        ok = all(converged[lab][i] for lab in labels)
        per_point.append((winner, margin, rel, ok))
    out = []
    for i, (winner, margin, rel, ok) in enumerate(per_point):
        if out and out[-1]["best"] == winner:
            r = out[-1]
            r["to"], r["points"] = totals[i], r["points"] + 1
            r["_m"].append(margin), r["_r"].append(rel)
            r["all_converged"] = r["all_converged"] and ok
        else:
            out.append({"best": winner, "from": totals[i], "to": totals[i], "points": 1, "_m": [margin],
                        "_r": [rel], "all_converged": ok})
    for r in out:
        m, rr = [v for v in r.pop("_m") if v is not None], [v for v in r.pop("_r") if v is not None]
        r.update({"margin_min": min(m) if m else None, "margin_max": max(m) if m else None,
                  "relative_min": min(rr) if rr else None, "relative_max": max(rr) if rr else None})
    return out


def scale_prices(spec: Spec, factor) -> Spec:
    """``spec`` with every link's price multiplied by ``factor``, checked for
    well-posedness (a factor of 0 leaves noisy links free, which is refused).

    Examples
    --------
    >>> dear = scale_prices(spec, 10)                                # doctest: +SKIP
    """
    f = float(factor)
    if not (math.isfinite(f) and f >= 0):
        raise InputError(f"a price scale must be a finite number of at least 0; got {f:g}", place="--prices",
                         fix="keep the range at or above 0")
    out = replace(spec, links=tuple(replace(l, price=l.price * f) for l in spec.links))
    rules.check_spec(out, place=f"every link price x {f:g}", error=InputError)
    return out


def _priced(spec: Spec, label: str) -> list:
    ids = [l.id for l in spec.links if l.price > 0]
    if not ids:
        raise InputError("a comparison over prices scales every link price, and no link of this spec has a price",
                         place=label, fix="give the links prices, or compare over --budgets")
    return ids


def compare(specs, totals=None, options=None, *, log=False, output=None, workers=None, dask=None, warm=True,
            progress=False, fresh=False, tie_rtol=TIE_RTOL, labels=None, prices=None) -> Study:
    """Design each spec at every total budget, or at every scale of its prices.

    Budget form (``totals``): each spec must have a budget named ``total``, or
    exactly one budget; that budget is set to each value of ``totals`` (its
    other budgets and prices stay as written). The energy of a design is that
    budget's power used.

    Price form (``prices``, instead of ``totals``): at each value ``f`` every
    link price of every spec is multiplied by ``f`` (budgets stay as
    written). The energy of a design is the power of its priced links.

    Either way the error is the weighted error, and the best spec at a point
    is the one with the lowest objective (weighted error plus the priced
    terms). A spec that contains another (the same circuit plus links it may
    silence) is designed from the other's design wherever it came out worse,
    so it never loses to it.

    Returns
    -------
    Study
        Rows carry ``spec`` (a label: the file's stem), ``budget`` (the
        total) or ``price_scale`` (the factor), and ``energy_used``.
        ``extra["best"]`` is the list of :func:`best_ranges`;
        ``extra["form"]`` is ``"budget"`` or ``"price"``; ``extra["budgets"]``
        the budget varied per spec (budget form); ``extra["warnings"]`` notes
        specs that weigh different errors.

    Examples
    --------
    >>> st = compare([flat, predictive], grid(0.1, 10, 8, log=True), log=True)   # doctest: +SKIP
    >>> st = compare([flat, predictive], prices=grid(0.1, 10, 8, log=True))      # doctest: +SKIP
    >>> st.extra["best"]                                                        # doctest: +SKIP
    """
    opts = _opts(options)
    specs = list(specs)
    if len(specs) < 1:
        raise InputError("nothing to compare", place="specs", fix="give two or more spec files")
    if (totals is None) == (prices is None):
        raise InputError("a comparison runs over budgets or over prices, one of the two", place="--budgets/--prices",
                         fix="give either --budgets LO:HI:N or --prices LO:HI:N")
    form = "budget" if prices is None else "price"
    coord, option = ("budget", "--budgets") if form == "budget" else ("price_scale", "--prices")
    labels = list(labels) if labels is not None else _labels(specs)
    values = [float(t) for t in (totals if form == "budget" else prices)]
    if not values:
        raise InputError(f"the {'budget' if form == 'budget' else 'price'} range is empty", place=option,
                         fix="give at least one value")
    if form == "budget":
        budgets = {lab: varied_budget(s, lab) for lab, s in zip(labels, specs)}
        energy = {lab: [f"budgets[{budgets[lab]}].used"] for lab in labels}
    else:
        budgets = {}
        energy = {lab: [f"links[{lid}].power" for lid in _priced(s, lab)] for lab, s in zip(labels, specs)}
    warnings = []
    if len({frozenset(_targets(s)) for s in specs}) > 1:
        warnings.append("the specs do not weigh the same errors (areas, targets, weights or lags differ), "
                        "so their errors measure different things")
    chains, n = [], len(values)
    for k, (lab, s) in enumerate(zip(labels, specs)):
        chain = []
        for i, t in enumerate(values):
            ms = set_value(s, f"budgets[{budgets[lab]}].total", t) if form == "budget" else scale_prices(s, t)
            coords = {"spec": lab, coord: t}
            chain.append(_Point(k * n + i, ms, coords, _point_key(ms, coords, opts, warm)))
        chains.append(chain)
    from .subcircuit import contains

    nested = [(kb * n + i, ks * n + i) for kb, big in enumerate(specs) for ks, small in enumerate(specs)
              if kb != ks and contains(big, small) and not contains(small, big) for i in range(n)]
    study = _run_study("compare", chains, opts, [_spec_info(s, lab) for lab, s in zip(labels, specs)],
                       [{"path": coord, "values": values, "scale": "log" if log else "linear"}],
                       ["spec", coord, "energy_used"], specs, output=output, workers=workers, dask=dask,
                       warm=warm, progress=progress, fresh=fresh, nested=nested)
    for r in study.rows:
        parts = [r.get(c) for c in energy[r["spec"]]]
        r["energy_used"] = None if any(v is None for v in parts) else float(sum(parts))
    objectives = {lab: [study.rows[k * n + i].get("objective") for i in range(n)] for k, lab in enumerate(labels)}
    conv = {lab: [bool(study.rows[k * n + i].get("converged")) for i in range(n)] for k, lab in enumerate(labels)}
    study.extra.update({"labels": labels, "form": form, "budgets": budgets, "warnings": warnings,
                        "best": best_ranges(values, labels, objectives, conv, tie_rtol), "tie_rtol": tie_rtol})
    if output is not None:
        study.write(output_base(output))
    return study


# ---------------------------------------------------------------------------
# text


def study_text(study: Study, show=None) -> str:
    """A plain-text summary of a study for the terminal."""
    from .results import fmt, table

    parts = []
    axes = [a["path"] for a in study.axes]
    if study.kind == "compare":
        by_price = study.extra.get("form") == "price"
        coord = "price_scale" if by_price else "budget"
        for lab in study.extra["labels"]:
            rows = [r for r in study.rows if r["spec"] == lab]
            what = "every link price x scale" if by_price else f"budget `{study.extra['budgets'][lab]}`"
            parts.append(f"{lab} ({what}):\n" + table(
                [coord.replace("_", " "), "status", "energy used", "weighted error", "objective", "silent"],
                [[fmt(r[coord]), r["status"], fmt(r.get("energy_used")), fmt(r.get("weighted_error"), 6),
                  fmt(r.get("objective"), 6), ", ".join(r.get("silent_links") or [])] for r in rows]))
        parts.append(f"best architecture by {'price scale' if by_price else 'budget'} range "
                     "(margin: runner-up minus best):\n" + table(
            ["best", "price scales" if by_price else "budgets", "points", "margin", "relative", "all converged"],
            [[b["best"], f"{fmt(b['from'])} .. {fmt(b['to'])}", b["points"],
              _span(b["margin_min"], b["margin_max"], fmt),
              _span(b["relative_min"], b["relative_max"], lambda v: f"{100 * v:.3g}%"),
              "yes" if b["all_converged"] else "NO"] for b in study.extra["best"]]))
        for w in study.extra["warnings"]:
            parts.append(f"warning: {w}")
    else:
        show = [c for c in (show or []) if c in study.columns]
        header = axes + ["status", "objective"] + show + ["silent"]
        rows = [[fmt(r[a]) for a in axes] + [r["status"], fmt(r.get("objective"), 6)]
                + [fmt(r.get(c)) for c in show] + [", ".join(r.get("silent_links") or [])] for r in study.rows]
        parts.append(table(header, rows))
        if study.kind == "sweep":
            ranges = study.silent_ranges()
            lines = [f"  {lid}: {_range_text(r, fmt)}" for lid, rs in ranges.items() for r in rs]
            parts.append("silent ranges of " + axes[0] + ":\n" + ("\n".join(lines) or "  none"))
        else:
            parts.append("sets of silent links (points):\n" + "\n".join(
                f"  {k or 'none'}: {v}" for k, v in study.extra.get("silent_sets", {}).items()))
    bad = sum(1 for r in study.rows if not r.get("converged"))
    its = sum(int(r.get("iterations") or 0) for r in study.rows)
    parts.append(f"{len(study.rows)} points ({study.computed} designed, {study.reused} reused from an earlier "
                 f"run), {len(study.chunks)} chunk(s), warm starts {'on' if study.warm else 'off'}, "
                 f"{its} solver iterations in all, {study.seconds:.1f} s"
                 + (f"; {bad} point(s) NOT converged (hollow in plots)" if bad else "; every point converged"))
    return "\n\n".join(parts)


def _range_text(r, fmt) -> str:
    """``silent from A to B (n points); edges between ...`` for a silent run."""
    if r["below"] is None and r["above"] is None:
        return f"silent over the whole grid ({r['points']} point(s))"
    text = f"silent from {fmt(r['from'])} to {fmt(r['to'])} ({r['points']} point(s))"
    edges = [f"between {fmt(a)} and {fmt(b)}" for a, b in ((r["below"], r["from"]), (r["to"], r["above"]))
             if a is not None and b is not None]
    return text + "; edge " + " and ".join(edges)


def _span(lo, hi, f) -> str:
    if lo is None:
        return "-"
    return f(lo) if hi == lo else f"{f(lo)} .. {f(hi)}"
