"""The link-power matrix: the view of a designed circuit that scales to
many areas (senders by receivers, ordered by level)."""

from __future__ import annotations

from hierarchy.report.canvas import _axes_inches, _check_axes, _figure
from hierarchy.report.labels import _title
from hierarchy.report.layout import _box_size, _order_rows, _rows
from hierarchy.report.resultdata import _as_dict, result_graph
from hierarchy.report.style import _FONT, PREDICTION_COLOUR, RESIDUAL_COLOUR
from hierarchy.spec.model import PREDICTION, RESIDUAL

__all__ = ["draw_matrix"]


def _node_order(g):
    """Nodes by level, and within a level in the drawing's order."""
    labels = {n: n for n in g.nodes}
    size = {n: _box_size(labels[n], _FONT) for n in g.nodes}
    rows, top = _rows(g)
    return _order_rows(g, rows, size, sweeps=4), top


def draw_matrix(result, spec=None, ax=None):
    """Draw a designed circuit as a link-power matrix: the view that scales.

    Rows are senders and columns receivers, both ordered by level (sensors
    first) and within a level as in the layered drawing; thin lines separate
    the levels, whose numbers are written on the right and at the top. A
    residual's cell is blue and a prediction's vermillion (the colours of the
    layered drawing and of every study figure), darker for more power on a
    logarithmic scale; a silent link's cell is grey with a cross. Empty cells
    have no link.

    Parameters
    ----------
    result : DesignResult or dict
        A design, or the dict of a result JSON file.
    spec : Spec, optional
        The spec the result was designed from (it only supplies the graph).
    ax : matplotlib.axes.Axes, optional
        Draw onto this Axes instead of a new figure (the two colour scales
        take room below it).

    Returns
    -------
    matplotlib.figure.Figure, or the given Axes
        With ``hierarchy_cells`` (link id -> (row, column)) and
        ``hierarchy_order`` (the node order of rows and columns).

    Examples
    --------
    >>> fig = draw_matrix(read_result("design.json"))   # doctest: +SKIP
    >>> fig.hierarchy_order[:2]                         # doctest: +SKIP
    ['probe-1', 'probe-2']
    """
    import numpy as np
    from matplotlib.colors import LinearSegmentedColormap, LogNorm, to_rgb
    from matplotlib.ticker import NullFormatter

    _check_axes(ax)
    data, spec = _as_dict(result, spec)
    g = result_graph(data, spec)
    rows, top = _node_order(g)
    order = [n for nodes in rows.values() for n in nodes]
    index = {n: i for i, n in enumerate(order)}
    n = len(order)
    given = ax is not None
    cell = min(0.32, max(0.11, 9.0 / n)) if not given else min(0.32, min(_axes_inches(ax)) / n)  # inches
    font = min(8.0, cell * 72 * 0.78)
    name_in = 0.6 * font / 72 * max(len(s) for s in order) + 0.15  # tick labels of node names
    level_in = 0.6 * font / 72 * (9 if top + 1 in rows else len(f"L{top}")) + 0.2  # "unreached" or "L12"
    side = n * cell
    title = _title(data)
    title_in = (title.count("\n") + 2) * 10 * 1.35 / 72 + 0.3
    bar_in = 0.9  # the two colour scales and their labels
    left = name_in + 0.45  # names, then the "sender" label
    bottom = bar_in + name_in + 0.45
    if given:
        fig = ax.figure
    else:
        fig_w = max(left + side + level_in + 0.2, 6.0)
        fig_h = bottom + side + level_in + title_in
        fig = _figure(fig_w, fig_h)
        ax = fig.add_axes([left / fig_w, bottom / fig_h, side / fig_w, side / fig_h])

    live = [float(r["power"]) for r in data["links"].values() if not r.get("silent") and float(r["power"]) > 0]
    hi = max(live, default=1.0)
    lo = min(min(live, default=hi), hi / 10)
    norm = LogNorm(vmin=lo, vmax=hi)
    maps = {kind: LinearSegmentedColormap.from_list(kind, [(1, 1, 1), to_rgb(colour)])
            for kind, colour in ((RESIDUAL, RESIDUAL_COLOUR), (PREDICTION, PREDICTION_COLOUR))}
    image = np.ones((n, n, 3))
    cells, silent_at = {}, []
    for lid, row in data["links"].items():
        u, v = lid.split("->")
        i, j = index[u], index[v]
        cells[lid] = (i, j)
        if row.get("silent"):
            image[i, j] = to_rgb("#D9D9D9")
            silent_at.append((j, i))
        else:
            frac = float(norm(max(float(row["power"]), lo)))
            image[i, j] = maps[row["kind"]](0.18 + 0.82 * frac)[:3]
    ax.imshow(image, interpolation="nearest", aspect="equal", extent=(-0.5, n - 0.5, n - 0.5, -0.5))
    if silent_at:
        xs, ys = zip(*silent_at)
        ax.plot(xs, ys, "x", color="#666666", ms=max(cell * 72 * 0.5, 2), mew=0.8, gid="silent-cells")
    bounds = np.cumsum([len(nodes) for nodes in rows.values()])[:-1] - 0.5
    for b in bounds:
        ax.axhline(b, color="#444444", lw=0.8)
        ax.axvline(b, color="#444444", lw=0.8)
    ax.set_xticks(range(n), order, rotation=90, fontsize=font)
    ax.set_yticks(range(n), order, fontsize=font)
    ax.tick_params(length=0)
    ax.set_xlim(-0.5, n - 0.5)
    ax.set_ylim(n - 0.5, -0.5)
    ax.set_xlabel("receiver", fontsize=9)
    ax.set_ylabel("sender", fontsize=9)
    # Level numbers: on the right (rows) and on top (columns), at each group's middle.
    starts = np.concatenate([[-0.5], bounds, [n - 0.5]])
    mids = (starts[:-1] + starts[1:]) / 2
    names = ["unreached" if k > top else f"L{k}" for k in rows]
    right = ax.secondary_yaxis("right")
    right.set_yticks(mids, names, fontsize=font)
    right.tick_params(length=0)
    topx = ax.secondary_xaxis("top")
    topx.set_xticks(mids, names, fontsize=font, rotation=90)
    topx.tick_params(length=0)

    # Two colour scales, one per kind, below the matrix.
    from matplotlib.cm import ScalarMappable

    for k, (kind, label) in enumerate(((RESIDUAL, "residual power (up)"), (PREDICTION, "prediction power (down)"))):
        mappable = ScalarMappable(norm=norm, cmap=maps[kind])
        if given:  # side by side below the names and the "receiver" label, outside the given Axes
            below = -(name_in + 0.6) / _axes_inches(ax)[1]
            cax = ax.inset_axes([0.55 * k, below, 0.45, 0.14 / _axes_inches(ax)[1]])
            bar = fig.colorbar(mappable, cax=cax, orientation="horizontal")
        else:
            width = (fig_w - 1.6) / 2
            cax = fig.add_axes([(0.5 + k * (width + 0.6)) / fig_w, 0.45 / fig_h, width / fig_w, 0.14 / fig_h])
            bar = fig.colorbar(mappable, cax=cax, orientation="horizontal")
        bar.set_label(label + ", model units", fontsize=8)
        bar.ax.tick_params(labelsize=7)
        bar.ax.xaxis.set_minor_formatter(NullFormatter())  # labelled minor ticks collide on a short scale
    heading = title + "\nlink powers: row sends to column; grey x = silent"
    if given:
        ax.set_title(heading, fontsize=9, linespacing=1.35, gid="title", pad=level_in * 72)
        target = ax
    else:
        fig.text(0.5, 1 - 0.12 / fig_h, heading, ha="center", va="top", fontsize=10, linespacing=1.35, gid="title")
        target = fig
    target.hierarchy_cells = cells
    target.hierarchy_order = order
    return target
