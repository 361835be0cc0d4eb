"""Phase maps: two value paths over a grid.
"""

from __future__ import annotations

from hierarchy.errors import InputError
from hierarchy.spec.model import Spec
from hierarchy.studies.paths import MAX_POINTS, parse_path, set_value
from hierarchy.studies.runner import _opts, _Point, _point_key
from hierarchy.studies.tables import Study, _spec_info, output_base
from hierarchy.studies.walk import _run_study

__all__ = ['phase_map']


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
