"""Figures of studies: sweeps, phase maps and Pareto fronts.

Figures are drawn on matplotlib's off-screen Agg canvas (``Figure`` with a
``FigureCanvasAgg``, never pyplot), so nothing here touches the global
backend of a notebook or needs a display. matplotlib is imported inside the
functions, so that ``import hierarchy`` stays quick.

Conventions shared by every figure:

* colours come from the Okabe-Ito palette (colour-blind safe);
* a point whose design did not converge is drawn hollow, a converged one
  filled;
* the shaded ranges of a sweep, where a link is silent, carry the artist id
  ``silent:<link id>``; the silent-set boundaries of a phase map carry
  ``boundary:<link id>``; the winner ranges of a comparison ``best:<label>``
  (so tests and scripts can find them).

Examples
--------
>>> from hierarchy import plots
>>> fig = plots.sweep_figure(study, ["links[a->s].power"])     # doctest: +SKIP
>>> plots.save_figure(fig, "sweep.png")                          # doctest: +SKIP
"""

from __future__ import annotations

import io
import math
import os

import numpy as np

from .errors import InputError

#: Okabe & Ito (2008), "Color Universal Design".
PALETTE = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#F0E442", "#000000")
FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}


def _colour(k: int) -> str:
    return PALETTE[k % len(PALETTE)]


def check_plot_path(path) -> str:
    """The format of a picture path (.png, .svg or .pdf), or a clear error.

    Examples
    --------
    >>> check_plot_path("sweep.svg")
    'svg'
    """
    path = os.fspath(path)
    ext = os.path.splitext(path)[1].lower()
    if ext not in FORMATS:
        raise InputError(f"cannot draw to a '{ext or 'file without extension'}' file", place=path,
                         fix="end the path with .png, .svg or .pdf")
    if not os.path.isdir(os.path.dirname(os.path.abspath(path))):
        raise InputError("the folder does not exist", place=path, fix="create the folder or choose another path")
    return FORMATS[ext]


def _figure(width, height):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def figure_bytes(fig, fmt="png", dpi=150) -> bytes:
    """A figure as the bytes of a .png, .svg or .pdf file; fixed metadata
    keep the bytes the same from run to run."""
    buf = io.BytesIO()
    metadata = {"png": {"Software": None}, "svg": {"Date": None}, "pdf": {"CreationDate": None}}[fmt]
    fig.savefig(buf, format=fmt, dpi=dpi, metadata=metadata)
    return buf.getvalue()


def save_figure(fig, path, dpi=150) -> None:
    """Write a figure atomically; the format follows the extension."""
    from .io import atomic_write_bytes

    atomic_write_bytes(path, figure_bytes(fig, check_plot_path(path), dpi))


def default_show(study) -> list:
    """Every link's power and every area's error."""
    return ([c for c in study.columns if c.startswith("links[") and c.endswith("].power")]
            + [c for c in study.columns if c.startswith("areas[") and c.endswith("].error")])


def _numbers(values) -> np.ndarray:
    return np.array([np.nan if v is None else float(v) for v in values], dtype=float)


def _field(column: str) -> str:
    return column.rsplit(".", 1)[1] if "]." in column else column


def _mid(a, b, log):
    return math.sqrt(a * b) if log and a > 0 and b > 0 else 0.5 * (a + b)


def _edges(values, log) -> np.ndarray:
    """Cell edges around grid values (for pcolormesh)."""
    v = np.asarray(values, dtype=float)
    if len(v) == 1:
        return np.array([v[0] / 2, v[0] * 2]) if log and v[0] > 0 else np.array([v[0] - 0.5, v[0] + 0.5])
    mids = [_mid(a, b, log) for a, b in zip(v[:-1], v[1:])]
    first = v[0] ** 2 / mids[0] if log else 2 * v[0] - mids[0]
    last = v[-1] ** 2 / mids[-1] if log else 2 * v[-1] - mids[-1]
    return np.array([first, *mids, last])


def _plot_series(ax, x, y, ok, colour, label):
    """A line through every point; filled markers where converged, hollow where not."""
    ax.plot(x, y, "-", color=colour, lw=1.4, label=label)
    ax.plot(x[ok], y[ok], "o", color=colour, ms=4)
    if np.any(~ok):
        ax.plot(x[~ok], y[~ok], "o", mfc="none", mec=colour, ms=6, mew=1.3)


def sweep_figure(study, show=None, log_y=False):
    """Chosen quantities against the swept value, silent ranges shaded.

    Parameters
    ----------
    study : hierarchy.studies.Study
        A sweep.
    show : list of str, optional
        Table columns to draw (default :func:`default_show`); columns with
        the same last part (``power``, ``error``, ...) share a panel.
    log_y : bool
        Logarithmic value axes.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.transforms import blended_transform_factory

    show = list(show) if show else default_show(study)
    for c in show:
        study.column(c)  # a clear error for an unknown column
    axis = study.axes[0]
    log = axis["scale"] == "log"
    x = np.asarray(axis["values"], dtype=float)
    ok = np.array([bool(r.get("converged")) for r in study.rows])
    panels = []
    for c in show:
        f = _field(c)
        if f not in panels:
            panels.append(f)
    fig = _figure(7.5, 1.2 + 2.3 * len(panels))
    axes = fig.subplots(len(panels), 1, sharex=True, squeeze=False)[:, 0]
    for ax, f in zip(axes, panels):
        for c in (c for c in show if _field(c) == f):
            _plot_series(ax, x, _numbers(study.column(c)), ok, _colour(show.index(c)), c)
        ax.set_ylabel(f)
        if log_y:
            ax.set_yscale("log")
        ax.grid(alpha=0.3)
    ranges = study.silent_ranges()
    for k, (lid, runs) in enumerate(ranges.items()):
        colour = _colour(len(show) + k)
        for n, r in enumerate(runs):
            lo = _mid(r["below"], r["from"], log) if r["below"] is not None else r["from"]
            hi = _mid(r["to"], r["above"], log) if r["above"] is not None else r["to"]
            lo, hi = min(lo, hi), max(lo, hi)
            for j, ax in enumerate(axes):
                span = ax.axvspan(lo, hi, color=colour, alpha=0.14, lw=0,
                                  label=f"{lid} silent" if j == 0 and n == 0 else None)
                span.set_gid(f"silent:{lid}")
            top = axes[0]
            top.text(_mid(lo, hi, log), 0.98 - 0.09 * k, f"{lid} silent", color=colour, fontsize=8,
                     ha="center", va="top", transform=blended_transform_factory(top.transData, top.transAxes),
                     gid=f"silent-label:{lid}")
    for ax in axes:
        ax.legend(fontsize=7, loc="best")
    if log:
        axes[-1].set_xscale("log")
    axes[-1].set_xlabel(axis["path"])
    name = study.specs[0]["name"]
    title = f"{name}: sweep of {axis['path']}"
    if np.any(~ok):
        title += f"\n({int(np.sum(~ok))} point(s) NOT converged: hollow markers)"
    fig.suptitle(title, fontsize=10)
    return fig


def _silent_matrix(study, lid, nx, ny):
    m = np.full((ny, nx), np.nan)
    for idx, r in enumerate(study.rows):
        j, i = divmod(idx, nx)
        if r.get("silent_links") is not None:
            m[j, i] = float(lid in r["silent_links"])
    return m


def phase_figure(study, show=None):
    """Which links are silent over a grid of two values, and one quantity.

    Left: the set of silent links at each grid point, one colour per set,
    with each link's silence boundary drawn as a contour (artist id
    ``boundary:<link>``). Right: the chosen quantity (default the objective)
    with the same boundaries. Points that did not converge are ringed.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    show = show or "objective"
    if isinstance(show, (list, tuple)):
        show = show[0]
    values = _numbers(study.column(show))
    ax_x, ax_y = study.axes
    xs, ys = np.asarray(ax_x["values"], float), np.asarray(ax_y["values"], float)
    nx, ny = len(xs), len(ys)
    xlog, ylog = ax_x["scale"] == "log", ax_y["scale"] == "log"
    sets = []
    for r in study.rows:
        key = None if r.get("silent_links") is None else tuple(r["silent_links"])
        if key not in sets:
            sets.append(key)
    sets.sort(key=lambda s: (s is None, len(s or ()), s or ()))
    code = np.array([sets.index(None if r.get("silent_links") is None else tuple(r["silent_links"]))
                     for r in study.rows], dtype=float).reshape(ny, nx)
    colours = ["#bbbbbb" if s is None else _colour(k) for k, s in enumerate(sets)]
    fig = _figure(12, 5)
    left, right = fig.subplots(1, 2)
    X, Y = _edges(xs, xlog), _edges(ys, ylog)
    left.pcolormesh(X, Y, code, cmap=ListedColormap(colours), alpha=0.55,
                    norm=BoundaryNorm(np.arange(len(sets) + 1) - 0.5, len(sets)))
    mesh = right.pcolormesh(X, Y, values.reshape(ny, nx), cmap="viridis", shading="flat")
    fig.colorbar(mesh, ax=right, label=show)
    links = sorted({lid for r in study.rows for lid in (r.get("silent_links") or [])})
    handles = [Patch(color=c, alpha=0.55, label="(failed)" if s is None else ("none silent" if not s else
                     " + ".join(s) + " silent")) for s, c in zip(sets, colours)]
    if nx >= 2 and ny >= 2:
        for k, lid in enumerate(links):
            m = _silent_matrix(study, lid, nx, ny)
            if np.nanmin(m) == np.nanmax(m):
                continue  # silent everywhere (or nowhere): no boundary on this grid
            for ax, colour in ((left, "black"), (right, "white")):
                cs = ax.contour(xs, ys, m, levels=[0.5], colors=[colour],
                                linestyles=["-", "--", ":", "-."][k % 4], linewidths=1.6)
                cs.set_gid(f"boundary:{lid}")
            handles.append(Line2D(
                [], [], color="black", ls=["-", "--", ":", "-."][k % 4], label=f"edge of {lid} silence"))
    ok = np.array([bool(r.get("converged")) for r in study.rows])
    if np.any(~ok):
        gx, gy = np.meshgrid(xs, ys)
        for ax in (left, right):
            ax.plot(gx.ravel()[~ok], gy.ravel()[~ok], "o", mfc="none", mec="red", ms=7, mew=1.3)
        handles.append(Line2D(
            [], [], ls="", marker="o", mfc="none", mec="red", label="not converged"))
    for ax in (left, right):
        if xlog:
            ax.set_xscale("log")
        if ylog:
            ax.set_yscale("log")
        ax.set_xlabel(ax_x["path"])
        ax.set_ylabel(ax_y["path"])
    left.set_title("silent links", fontsize=10)
    right.set_title(show, fontsize=10)
    left.legend(handles=handles, fontsize=7, loc="upper left", bbox_to_anchor=(0, -0.14), ncol=2)
    fig.suptitle(f"{study.specs[0]['name']}: phase map", fontsize=10)
    return fig


def compare_figure(study):
    """Pareto fronts (weighted error against energy used) of every spec on one
    plot, and below, each spec's excess objective over the best at each
    budget, with the ranges where each spec wins shaded (``best:<label>``).

    Returns
    -------
    matplotlib.figure.Figure
    """
    labels = study.extra["labels"]
    log = study.axes[0]["scale"] == "log"
    totals = np.asarray(study.axes[0]["values"], float)
    n = len(totals)
    fig = _figure(7.5, 7)
    top, bottom = fig.subplots(2, 1, height_ratios=[3, 2])
    objective = {}
    for k, lab in enumerate(labels):
        rows = study.rows[k * n:(k + 1) * n]
        ok = np.array([bool(r.get("converged")) for r in rows])
        e = _numbers([r.get("energy_used") for r in rows])
        err = _numbers([r.get("weighted_error") for r in rows])
        _plot_series(top, e, err, ok, _colour(k), lab)
        objective[lab] = (_numbers([r.get("objective") for r in rows]), ok)
    best = np.nanmin(np.vstack([v for v, _ in objective.values()]), axis=0)
    for k, lab in enumerate(labels):
        v, ok = objective[lab]
        _plot_series(bottom, totals, 100 * (v - best) / np.abs(best), ok, _colour(k), lab)
    for r in study.extra["best"]:
        if r["best"] in labels:
            i0, i1 = list(totals).index(r["from"]), list(totals).index(r["to"])
            lo = _mid(totals[i0 - 1], totals[i0], log) if i0 > 0 else totals[i0]
            hi = _mid(totals[i1], totals[i1 + 1], log) if i1 + 1 < n else totals[i1]
            span = bottom.axvspan(lo, hi, color=_colour(labels.index(r["best"])), alpha=0.12, lw=0)
            span.set_gid(f"best:{r['best']}")
    top.set_xlabel("energy used (power of the varied budget)")
    top.set_ylabel("weighted error")
    bottom.set_xlabel("total budget")
    bottom.set_ylabel("objective above the best (%)")
    if log:
        top.set_xscale("log")
        bottom.set_xscale("log")
    for ax in (top, bottom):
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
    title = "Pareto fronts: " + " vs ".join(labels)
    if any(not r.get("converged") for r in study.rows):
        title += "\n(hollow markers: NOT converged)"
    fig.suptitle(title, fontsize=10)
    return fig


def study_figure(study, show=None, log_y=False):
    """The figure of any study (sweep, phase map or comparison)."""
    if study.kind == "sweep":
        return sweep_figure(study, show, log_y)
    if study.kind == "phase":
        return phase_figure(study, show)
    return compare_figure(study)


def save_study_plot(study, path, show=None, log_y=False) -> None:
    """Draw a study (see :func:`study_figure`) and write it atomically to
    ``path`` (.png, .svg or .pdf).

    Examples
    --------
    >>> save_study_plot(study, "sweep.png", show=["objective"])    # doctest: +SKIP
    """
    check_plot_path(path)
    save_figure(study_figure(study, show, log_y), path)
