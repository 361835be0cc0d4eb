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
>>> from hierarchy.report import plots
>>> fig = plots.sweep_figure(study, ["links[a->s].power"])     # doctest: +SKIP
>>> plots.save_figure(fig, "sweep.png")                          # doctest: +SKIP
"""

from __future__ import annotations

import io
import math
import os

import numpy as np

from hierarchy.errors import InputError

from hierarchy.report.drawing import PREDICTION_COLOUR, RESIDUAL_COLOUR, SILENT_COLOUR

__all__ = [
    "KIND_COLOURS", "PALETTE", "FORMATS", "MAX_SHARED_LINKS", "MULTIPLE_COLUMNS", "MODEL_UNITS",
    "check_plot_path", "figure_bytes", "save_figure", "default_show", "unit_label", "unit_of",
    "check_log_y", "sweep_figure", "phase_figure", "compare_figure", "study_figure",
    "save_study_plot",
]

#: Link kinds keep the colours of the circuit drawings in every figure.
KIND_COLOURS = {"residual": RESIDUAL_COLOUR, "prediction": PREDICTION_COLOUR}
#: The rest of Okabe & Ito (2008), "Color Universal Design", for everything
#: that is not a link (areas, specs, silent sets), so no colour means two things.
PALETTE = ("#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442")
FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}
#: Links that share one panel of a sweep; more get small multiples.
MAX_SHARED_LINKS = 3
MULTIPLE_COLUMNS = 3
#: Units of quantities in the model's own terms (a spec with a units
#: section can name them; see :func:`unit_label`).
MODEL_UNITS = {"power": "model units\u00b2", "error": "model units\u00b2", "used": "model units\u00b2",
               "total": "model units\u00b2", "noise": "model units\u00b2", "activity": "model units\u00b2",
               "objective": "objective units", "weighted_error": "objective units",
               "energy_cost": "objective units", "activity_cost": "objective units",
               "price": "objective units per unit of power", "activity_price": "objective units per unit",
               "shadow_price": "objective units per unit of power", "through_gain": "ratio",
               "weight": "objective units per unit of error", "dynamics": "per step", "snr": "ratio",
               "bits": "bit/step"}
_LINE_STYLES = ("-", "--", ":", "-.")
_MARKERS = ("o", "s", "^", "D")
_HATCHES = ("//", "\\\\", "..")


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


def _given_axes(ax, most, fix):
    """The Axes a caller passed as ``ax=`` as a list (``None`` when none
    were given): one Axes, or a sequence of at most ``most``."""
    if ax is None:
        return None
    axes = [ax] if hasattr(ax, "plot") else list(ax)
    if not axes or len(axes) > most or not all(hasattr(a, "plot") for a in axes):
        raise InputError(f"ax= takes one matplotlib Axes or a sequence of up to {most}; got {ax!r}",
                         place="ax", fix=fix)
    return axes


def _returned(ax, axes):
    """What a figure function returns when it drew on given axes: the one
    Axes, or the list, as it was passed."""
    return axes[0] if hasattr(ax, "plot") else axes


def figure_bytes(fig, fmt="png", dpi=150) -> bytes:
    """A figure as the bytes of a .png, .svg or .pdf file; fixed metadata
    keep the bytes the same from run to run."""
    buf = io.BytesIO()
    metadata = {"png": {"Software": None}, "svg": {"Date": None}, "pdf": {"CreationDate": None}}[fmt]
    fig.savefig(buf, format=fmt, dpi=dpi, metadata=metadata)
    return buf.getvalue()


def save_figure(fig, path, dpi=150) -> None:
    """Write a figure atomically; the format follows the extension."""
    from hierarchy.io import atomic_write_bytes

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


def _plot_series(ax, x, y, ok, colour, label, ls="-", marker="o"):
    """A line through every point; filled markers where converged, hollow where not."""
    ax.plot(x, y, ls=ls, color=colour, lw=1.4, label=label)
    ax.plot(x[ok], y[ok], marker, ls="", color=colour, ms=4)
    if np.any(~ok):
        ax.plot(x[~ok], y[~ok], marker, ls="", color=colour, mfc="none", mec=colour, ms=6, mew=1.3)


def _kind_style(column, kinds, k):
    """Colour, line style and marker of a series: links in their kind's
    colour (the circuit drawings' blue residuals and vermillion predictions),
    the k-th link of a kind in the k-th line style; other quantities in the
    colours left over."""
    lid = column[len("links["):column.index("]")] if column.startswith("links[") else None
    kind = (kinds or {}).get(lid)
    if kind is not None:
        colour = KIND_COLOURS[kind]
    else:
        colour = _colour(k)
    return colour, _LINE_STYLES[k % len(_LINE_STYLES)], _MARKERS[k % len(_MARKERS)]


def unit_label(quantity, units=None) -> str:
    """The axis label of a quantity (the last part of a column or value
    path) with its unit.

    ``units`` maps a quantity (``power``, ``error``, ``price``, ...) to the
    unit text to print; quantities it leaves out are in the model's own
    units. It is the hook for a spec's units section.

    Examples
    --------
    >>> unit_label("power")
    'power (model units\u00b2)'
    >>> unit_label("power", {"power": "mW"})
    'power (mW)'
    """
    return f"{quantity} ({unit_of(quantity, units)})"


def unit_of(quantity, units=None) -> str:
    """The unit text of a quantity: from ``units`` if it names it, else the model's."""
    return (units or {}).get(quantity) or MODEL_UNITS.get(quantity, "model units")


def check_log_y(log_y) -> None:
    """Refuse, before any design, a ``--log-y`` word that is no quantity
    (most often a value path that `--log-y` took as its argument).

    Examples
    --------
    >>> check_log_y("power,error")
    """
    if not isinstance(log_y, str):
        return
    known = sorted(set(MODEL_UNITS) | {"all"})
    for word in (w.strip() for w in log_y.split(",")):
        if word and word not in known:
            raise InputError(f"`{word}` is not a quantity a sweep plots", place="--log-y",
                             fix="give quantities such as power or error (" + ", ".join(known) + "), or put "
                                 "--log-y after the spec and the value path")


def _wants_log(field, log_y) -> bool:
    if isinstance(log_y, str):
        log_y = [w.strip() for w in log_y.split(",") if w.strip()]
    if log_y is True or log_y == ["all"]:
        return True
    return bool(log_y) and field in log_y


def _silent_bounds(r, log):
    lo = _mid(r["below"], r["from"], log) if r["below"] is not None else r["from"]
    hi = _mid(r["to"], r["above"], log) if r["above"] is not None else r["to"]
    return min(lo, hi), max(lo, hi)


def sweep_figure(study, show=None, log_y=False, kinds=None, units=None, ax=None):
    """Chosen quantities against the swept value, silent ranges shaded.

    Up to :data:`MAX_SHARED_LINKS` links share a panel per quantity; beyond
    that every link gets its own small panel (small multiples, one shared
    x axis, one y scale per quantity row), shaded only where that link is
    silent, so bands never stack. Links are coloured by kind as in the
    circuit drawings; legends sit outside the data.

    Parameters
    ----------
    study : hierarchy.studies.Study
        A sweep.
    show : list of str, optional
        Table columns to draw (default :func:`default_show`); columns with
        the same last part (``power``, ``error``, ...) share a panel.
    log_y : bool, str or list of str
        Logarithmic value axes: ``True`` for every panel, or the quantities
        to draw on a log scale (``["power"]``, or ``"power,error"``).
    kinds : dict, optional
        Link id -> ``"residual"`` or ``"prediction"``, for the colours.
    units : dict, optional
        Quantity -> unit text (see :func:`unit_label`).
    ax : matplotlib.axes.Axes or sequence of Axes, optional
        Draw onto these instead of a new figure: one Axes per panel, in the
        order above (one quantity of up to :data:`MAX_SHARED_LINKS` links
        is one panel). The title goes on the first panel.

    Returns
    -------
    matplotlib.figure.Figure, or the given Axes
        Shaded ranges carry the artist id ``silent:<link id>``.

    Examples
    --------
    >>> import matplotlib.pyplot as plt
    >>> fig, ax = plt.subplots()
    >>> sweep_figure(study, ["objective"], ax=ax) is ax   # doctest: +SKIP
    True
    """
    from matplotlib.transforms import blended_transform_factory

    show = list(show) if show else default_show(study)
    for c in show:
        study.column(c)  # a clear error for an unknown column
    axis = study.axes[0]
    log = axis["scale"] == "log"
    x = np.asarray(axis["values"], dtype=float)
    ok = np.array([bool(r.get("converged")) for r in study.rows])
    fields = []
    for c in show:
        if _field(c) not in fields:
            fields.append(_field(c))
    link_cols = [c for c in show if c.startswith("links[")]
    multiples = len(link_cols) > MAX_SHARED_LINKS
    ranges = study.silent_ranges()
    # One row of panels per quantity; a quantity of many links is a grid.
    layout = []  # (field, [columns in each panel])
    for f in fields:
        cols = [c for c in show if _field(c) == f]
        if multiples and any(c.startswith("links[") for c in cols):
            layout.append((f, [[c] for c in cols]))
        else:
            layout.append((f, [cols]))
    ncols = min(MULTIPLE_COLUMNS, max(len(p) for _, p in layout))
    grid_rows = sum(-(-len(p) // ncols) for _, p in layout)
    npanels = sum(len(p) for _, p in layout)
    passed = ax  # (the loops below reuse the name)
    given = _given_axes(ax, npanels, f"pass {npanels} Axes (one per panel) or show one quantity")
    if given is not None and len(given) != npanels:
        raise InputError(f"this sweep figure has {npanels} panel(s) ({', '.join(fields)}) but ax= gave "
                         f"{len(given)}", place="ax", fix=f"pass {npanels} Axes, or choose fewer quantities (show=)")
    if given is None:
        width = 7.5 if ncols == 1 else 3.3 * ncols + 0.8
        height = 0.9 + (2.3 if ncols == 1 else 2.0) * grid_rows
        fig = _figure(width, height)
        spec = fig.add_gridspec(grid_rows, ncols)
    used, r0, first = [], 0, None
    for f, panels in layout:
        nrows = -(-len(panels) // ncols)
        if given is not None:
            cells = given[len(used):len(used) + len(panels)]
        else:
            # A panel of several series spans the row; small multiples fill the grid.
            slots = ([spec[r0, :]] if len(panels) == 1
                     else [spec[r0 + i // ncols, i % ncols] for i in range(len(panels))])
            cells = []
            for slot in slots:
                cells.append(fig.add_subplot(slot, sharex=first))
                first = first or cells[-1]
        for ax, cols in zip(cells, panels):
            for c in cols:
                same = [d for d in cols if _kind_of(d, kinds) == _kind_of(c, kinds)]
                colour, ls, marker = _kind_style(c, kinds, same.index(c) if kinds else show.index(c))
                _plot_series(ax, x, _numbers(study.column(c)), ok, colour, c, ls=ls, marker=marker)
            if _wants_log(f, log_y):
                ax.set_yscale("log")
            ax.grid(alpha=0.3)
            ax.set_ylabel(unit_label(f, units), fontsize=8)
            if len(cols) == 1 and multiples:
                ax.set_title(cols[0], fontsize=8, color=_kind_style(cols[0], kinds, 0)[0])
            # Shading: in a panel of one link, only that link's silence; in a
            # shared panel, each shown link's (a few at most).
            own = [c[len("links["):c.index("]")] for c in cols if c.startswith("links[")]
            shade = own if (multiples or own) else [lid for lid in ranges if f"links[{lid}].power" in show]
            shaded = [lid for lid in ranges if lid in shade and ranges[lid]]
            for k, lid in enumerate(shaded):
                for n, r in enumerate(ranges[lid]):
                    lo, hi = _silent_bounds(r, log)
                    span = ax.axvspan(lo, hi, color=SILENT_COLOUR, alpha=0.18, lw=0,
                                      hatch=_HATCHES[k % len(_HATCHES)] if len(shaded) > 1 else None)
                    span.set_gid(f"silent:{lid}")
                    if not own:  # the band's name is written once, over its link's own panel
                        continue
                    ax.text(_mid(lo, hi, log), 0.97 - 0.1 * k, f"{lid} silent", color="#555555", fontsize=7,
                            ha="center", va="top", gid=f"silent-label:{lid}",
                            transform=blended_transform_factory(ax.transData, ax.transAxes))
            if not (multiples and len(cols) == 1):  # (a small multiple is named by its title)
                ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0)
            used.append(ax)
        r0 += nrows
    if log:
        for ax in used:
            ax.set_xscale("log")
    xlabel = f"{axis['path']} ({unit_of(axis['path'].rsplit('.', 1)[-1], units)})"
    name = study.specs[0]["name"]
    title = f"{name}: sweep of {axis['path']}"
    if np.any(~ok):
        title += f"\n({int(np.sum(~ok))} point(s) NOT converged: hollow markers)"
    if given is not None:
        # Someone else's axes: label each one, title the first unless a
        # small multiple's own title is there.
        for a in given:
            a.set_xlabel(xlabel, fontsize=8)
        if not given[0].get_title():
            given[0].set_title(title, fontsize=9)
        return _returned(passed, given)
    bottom = {}
    for ax in used:  # the lowest panel of each grid column carries the x label
        col = ax.get_subplotspec().colspan.start
        if col not in bottom or ax.get_subplotspec().rowspan.start > bottom[col].get_subplotspec().rowspan.start:
            bottom[col] = ax
    for ax in used:
        if ax not in bottom.values():
            ax.tick_params(labelbottom=False)
    for ax in bottom.values():
        ax.set_xlabel(xlabel, fontsize=8)
    fig.suptitle(title, fontsize=10)
    return fig


def _kind_of(column, kinds):
    if not column.startswith("links["):
        return None
    return (kinds or {}).get(column[len("links["):column.index("]")])


def _silent_matrix(study, lid, nx, ny):
    m = np.full((ny, nx), np.nan)
    for idx, r in enumerate(study.rows):
        j, i = divmod(idx, nx)
        if r.get("silent_links") is not None:
            m[j, i] = float(lid in r["silent_links"])
    return m


def phase_figure(study, show=None, units=None, ax=None):
    """Which links are silent over a grid of two values, and one quantity.

    Left: the set of silent links at each grid point, one colour per set,
    with each link's silence boundary drawn as a contour (artist id
    ``boundary:<link>``). Right: the chosen quantity (default the objective)
    with the same boundaries. Points that did not converge are ringed.

    Parameters
    ----------
    study : hierarchy.studies.Study
        A phase map.
    show : str, optional
        The quantity of the right-hand panel (default ``"objective"``).
    units : dict, optional
        Quantity -> unit text (see :func:`unit_label`).
    ax : matplotlib.axes.Axes or pair of Axes, optional
        Draw onto these instead of a new figure: one Axes gets the silent
        links (the left panel) alone, a pair gets both panels.

    Returns
    -------
    matplotlib.figure.Figure, or the given Axes
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
    passed = ax  # (the loops below reuse the name)
    given = _given_axes(ax, 2, "pass one Axes (silent links) or two (silent links and the quantity)")
    if given is None:
        fig = _figure(12, 5)
        left, right = fig.subplots(1, 2)
    else:
        fig = given[0].figure
        left, right = given[0], (given[1] if len(given) == 2 else None)
    panels = [left] if right is None else [left, right]
    X, Y = _edges(xs, xlog), _edges(ys, ylog)
    left.pcolormesh(X, Y, code, cmap=ListedColormap(colours), alpha=0.55,
                    norm=BoundaryNorm(np.arange(len(sets) + 1) - 0.5, len(sets)))
    if right is not None:
        mesh = right.pcolormesh(X, Y, values.reshape(ny, nx), cmap="viridis", shading="flat")
        fig.colorbar(mesh, ax=right, label=f"{show} ({unit_of(_field(show), units)})")
    links = sorted({lid for r in study.rows for lid in (r.get("silent_links") or [])})
    handles = [Patch(color=c, alpha=0.55, label="(failed)" if s is None else ("none silent" if not s else
                     " + ".join(s) + " silent")) for s, c in zip(sets, colours)]
    if nx >= 2 and ny >= 2:
        for k, lid in enumerate(links):
            m = _silent_matrix(study, lid, nx, ny)
            if np.nanmin(m) == np.nanmax(m):
                continue  # silent everywhere (or nowhere): no boundary on this grid
            for ax, colour in zip(panels, ("black", "white")):
                cs = ax.contour(xs, ys, m, levels=[0.5], colors=[colour],
                                linestyles=["-", "--", ":", "-."][k % 4], linewidths=1.6)
                cs.set_gid(f"boundary:{lid}")
            handles.append(Line2D(
                [], [], color="black", ls=["-", "--", ":", "-."][k % 4], label=f"edge of {lid} silence"))
    ok = np.array([bool(r.get("converged")) for r in study.rows])
    if np.any(~ok):
        gx, gy = np.meshgrid(xs, ys)
        for ax in panels:
            ax.plot(gx.ravel()[~ok], gy.ravel()[~ok], "o", mfc="none", mec="red", ms=7, mew=1.3)
        handles.append(Line2D(
            [], [], ls="", marker="o", mfc="none", mec="red", label="not converged"))
    for ax in panels:
        if xlog:
            ax.set_xscale("log")
        if ylog:
            ax.set_yscale("log")
        ax.set_xlabel(f"{ax_x['path']} ({unit_of(ax_x['path'].rsplit('.', 1)[-1], units)})")
        ax.set_ylabel(f"{ax_y['path']} ({unit_of(ax_y['path'].rsplit('.', 1)[-1], units)})")
    left.set_title("silent links" if given is None else f"{study.specs[0]['name']}: silent links", fontsize=10)
    if right is not None:
        right.set_title(show, fontsize=10)
    left.legend(handles=handles, fontsize=7, loc="upper left", bbox_to_anchor=(0, -0.14), ncol=2)
    if given is not None:
        return _returned(passed, given)
    fig.suptitle(f"{study.specs[0]['name']}: phase map", fontsize=10)
    return fig


def compare_figure(study, units=None, ax=None):
    """Pareto fronts (weighted error against energy used) of every spec on one
    plot, and below, each spec's excess objective over the best at each
    budget, with the ranges where each spec wins shaded (``best:<label>``).

    The excess is given as a share of the spec's own objective, ``(J - J_best)
    / J``: for the runner-up this is the "relative" margin of the comparison
    table (margin over the runner-up's objective), so picture and table
    agree.

    Parameters
    ----------
    study : hierarchy.studies.Study
        A comparison.
    units : dict, optional
        Quantity -> unit text (see :func:`unit_label`).
    ax : matplotlib.axes.Axes or pair of Axes, optional
        Draw onto these instead of a new figure: one Axes gets the Pareto
        fronts alone, a pair gets the fronts and the excess objectives.

    Returns
    -------
    matplotlib.figure.Figure, or the given Axes
    """
    labels = study.extra["labels"]
    log = study.axes[0]["scale"] == "log"
    totals = np.asarray(study.axes[0]["values"], float)
    n = len(totals)
    passed = ax  # (the loops below reuse the name)
    given = _given_axes(ax, 2, "pass one Axes (Pareto fronts) or two (fronts and excess objective)")
    if given is None:
        fig = _figure(7.5, 7)
        top, bottom = fig.subplots(2, 1, height_ratios=[3, 2])
    else:
        top, bottom = given[0], (given[1] if len(given) == 2 else None)
    panels = [top] if bottom is None else [top, bottom]
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
        if bottom is not None:
            _plot_series(bottom, totals, 100 * (v - best) / np.abs(v), ok, _colour(k), lab)
    for r in study.extra["best"]:
        if r["best"] in labels and bottom is not None:
            i0, i1 = list(totals).index(r["from"]), list(totals).index(r["to"])
            lo = _mid(totals[i0 - 1], totals[i0], log) if i0 > 0 else totals[i0]
            hi = _mid(totals[i1], totals[i1 + 1], log) if i1 + 1 < n else totals[i1]
            span = bottom.axvspan(lo, hi, color=_colour(labels.index(r["best"])), alpha=0.12, lw=0)
            span.set_gid(f"best:{r['best']}")
    by_price = study.extra.get("form") == "price"
    top.set_xlabel(f"energy used: power of the {'priced links' if by_price else 'varied budget'} "
                   f"({unit_of('used', units)})")
    top.set_ylabel(f"weighted error ({unit_of('weighted_error', units)})")
    if bottom is not None:
        bottom.set_xlabel("price scale (every link price times this)" if by_price
                          else f"total budget ({unit_of('total', units)})")
        bottom.set_ylabel("objective above the best\n(% of the spec's own objective)")
    for ax in panels:
        if log:
            ax.set_xscale("log")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
    title = "Pareto fronts: " + " vs ".join(labels)
    if any(not r.get("converged") for r in study.rows):
        title += "\n(hollow markers: NOT converged)"
    if given is not None:
        top.set_title(title, fontsize=9)
        return _returned(passed, given)
    fig.suptitle(title, fontsize=10)
    return fig


def study_figure(study, show=None, log_y=False, kinds=None, units=None, ax=None):
    """The figure of any study (sweep, phase map or comparison); ``ax`` as
    in :func:`sweep_figure`, :func:`phase_figure` or :func:`compare_figure`."""
    if study.kind == "sweep":
        return sweep_figure(study, show, log_y, kinds=kinds, units=units, ax=ax)
    if study.kind == "phase":
        return phase_figure(study, show, units=units, ax=ax)
    return compare_figure(study, units=units, ax=ax)


def save_study_plot(study, path, show=None, log_y=False, kinds=None, units=None) -> None:
    """Draw a study (see :func:`study_figure`) and write it atomically to
    ``path`` (.png, .svg or .pdf).

    Examples
    --------
    >>> save_study_plot(study, "sweep.png", show=["objective"])    # doctest: +SKIP
    """
    check_plot_path(path)
    save_figure(study_figure(study, show, log_y, kinds=kinds, units=units), path)
