"""Sweeps: one value path over a grid.
"""

from __future__ import annotations

from hierarchy.errors import InputError
from hierarchy.spec.model import Spec
from hierarchy.studies.paths import parse_path, set_value
from hierarchy.studies.runner import _opts, _Point, _point_key
from hierarchy.studies.tables import Study, _spec_info, output_base
from hierarchy.studies.walk import _run_study

__all__ = ['sweep_silent_ranges', 'sweep']


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
