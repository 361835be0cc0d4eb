"""Drawings of a designed circuit: a layered diagram of sensors, areas and
links, and for large circuits a link-power matrix (:func:`draw_matrix`).

The picture is made from the result alone (the ``hierarchy design --json``
file, a :class:`~hierarchy.design.DesignResult`, or ``hierarchy evaluate
--json`` scores); a spec, when given, only supplies the graph.

Visual encoding
---------------
Layout
    Sensors sit at the bottom (level 0); every area sits at its level (the
    spec's ``level:``, else one above the lowest node that sends it a
    residual: :func:`hierarchy.circuit.levels`; a result file carries each
    area's level). Areas that nothing places are drawn on a row above the top
    and labelled "unreached". Level numbers are written on the left. Within a
    level, nodes are ordered to cut crossings (barycentre sweeps).
Nodes
    Sensors are grey square boxes; areas are white rounded boxes labelled with
    their name and their error E||e||^2 ("relay" for an area without a target).
Colour and line style (the Okabe-Ito colour-blind-safe palette)
    Residuals (bottom-up): solid lines in Okabe-Ito blue ``#0072B2``.
    Predictions (top-down): dash-dot lines in Okabe-Ito vermillion ``#D55E00``.
    Silent links (sending nothing; the legend says whether the designer
    checked them not worth sending): thin dashed grey lines, whatever their
    kind. Colour and line style each tell the kinds apart on their own, so the
    picture survives colour-blindness and grey-scale printing.
Width
    A link's line width grows linearly with its power E||s||^2 (or, with
    ``width_by="share"``, with its largest share of a budget): 1 pt for
    nothing, 8 pt for the largest value in the picture. The legend states the
    value of the widest line.
Pairs
    A prediction and the residual that answers it (``a->b`` and ``b->a``) are
    two curved arrows bowed to opposite sides, so neither hides the other.
Labels
    The strongest links (up to :data:`MAX_LINK_LABELS`) are labelled with
    their power ``P``, SNR and rate in bits per step, each at the first spot
    along its curve where the label touches no other text and no box. The
    other live links, and those whose label finds no such spot, are listed,
    strongest first, in a table beside the drawing. Silent links are not
    labelled (the legend counts them; the reasons are in the result and in
    ``hierarchy report``).
Title
    The spec's name, the design's status (converged, iteration limit, failed)
    and its objective; budgets with their use and shadow price below.

Colours are shared with every study figure (:mod:`hierarchy.report.plots`).

matplotlib is imported only inside the functions that draw (the Agg canvas,
never pyplot), so importing this module is cheap and leaves the user's
plotting backend alone.
"""

from __future__ import annotations

import io
import math
import os

from hierarchy.errors import InputError
from hierarchy.report.canvas import _axes_inches, _check_axes, _figure, _renderer
from hierarchy.report.labels import MAX_TITLE_BUDGETS, _delay_text, _link_label, _node_label, _num, _title
from hierarchy.report.layout import _PAIR_RAD, _layout, crossings
from hierarchy.report.matrix import draw_matrix
from hierarchy.report.resultdata import MAX_RESULT_FILE, _as_dict, read_result, result_graph
from hierarchy.report.style import (
    _FONT, _LINK_FONT, MAX_WIDTH, MIN_WIDTH, PREDICTION_COLOUR, PREDICTION_DASHES, RESIDUAL_COLOUR,
    RESIDUAL_STYLE, SENSOR_FILL, SILENT_COLOUR, SILENT_DASHES, SILENT_WIDTH,
)
from hierarchy.spec.model import PREDICTION

__all__ = [
    "FORMATS", "RESIDUAL_COLOUR", "PREDICTION_COLOUR", "SILENT_COLOUR", "RESIDUAL_STYLE",
    "PREDICTION_DASHES", "SILENT_DASHES", "SENSOR_FILL", "MIN_WIDTH", "MAX_WIDTH", "SILENT_WIDTH",
    "MAX_DRAWN_AREAS", "MAX_TITLE_BUDGETS", "MAX_LINK_LABELS", "VIEWS", "MAX_RESULT_FILE",
    "read_result", "result_graph", "crossings", "draw_circuit", "draw_matrix", "draw",
    "check_path", "save_circuit",
]

#: Output formats by file extension.
FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}

#: ``view="auto"`` draws the layered circuit up to this many areas, the matrix above.
MAX_DRAWN_AREAS = 24
#: At most this many links are labelled on the drawing (strongest first);
#: the others are listed in the table beside it.
MAX_LINK_LABELS = 12
VIEWS = ("auto", "circuit", "matrix")
# Where along a link (fraction of its curve) a label may sit, best first.
_LABEL_SPOTS = (0.5, 0.4, 0.6, 0.3, 0.7, 0.22, 0.78)


# -- drawing -----------------------------------------------------------------


def _style(dashes, lw):
    """A dash pattern whose dashes lengthen only slowly with the line's width.

    matplotlib multiplies dash lengths by the width (``lines.scale_dashes``);
    on an 8 pt line that turns dash-dot into blobs, so the pattern is set in
    points here, growing by half the extra width.
    """
    import matplotlib

    if dashes is None:
        return RESIDUAL_STYLE
    grow = 1.0 + 0.5 * max(lw - 1.0, 0.0)
    pattern = [d * grow for d in dashes]
    if matplotlib.rcParams["lines.scale_dashes"]:
        pattern = [d / lw for d in pattern]
    return (0, tuple(pattern))


def _crosses(pos, size, u, v) -> bool:
    """Whether the straight line u->v runs through another node's box."""
    (ux, uy), (vx, vy) = pos[u], pos[v]
    for n, (cx, cy) in pos.items():
        if n in (u, v):
            continue
        w, h = size[n]
        for t in (i / 40 for i in range(1, 40)):
            x, y = ux + t * (vx - ux), uy + t * (vy - uy)
            if abs(x - cx) <= w / 2 + 0.1 and abs(y - cy) <= h / 2 + 0.1:
                return True
    return False


def _widths(data, width_by):
    """Line width of every link: linear in power (or budget share)."""
    value = {}
    for lid, row in data["links"].items():
        if width_by == "power":
            value[lid] = max(float(row["power"]), 0.0)
        else:
            shares = [s for s in (row.get("share_of_budget") or {}).values() if s is not None]
            value[lid] = max(shares, default=0.0)
    live = [v for lid, v in value.items() if not data["links"][lid].get("silent")]
    top = max(live, default=0.0)
    width = {}
    for lid, v in value.items():
        if data["links"][lid].get("silent"):
            width[lid] = SILENT_WIDTH
        else:
            width[lid] = MIN_WIDTH + (MAX_WIDTH - MIN_WIDTH) * (v / top if top > 0 else 0.0)
    return width, top


def _arc_point(u, v, rad, t):
    """Point ``t`` of matplotlib's arc3 curve from u to v (a quadratic Bezier
    whose control point is the chord's midpoint moved rad x chord along the
    right-hand normal), and the unit normal there."""
    (ux, uy), (vx, vy) = u, v
    dx, dy = vx - ux, vy - uy
    cx, cy = (ux + vx) / 2 + rad * dy, (uy + vy) / 2 - rad * dx
    x = (1 - t) ** 2 * ux + 2 * t * (1 - t) * cx + t ** 2 * vx
    y = (1 - t) ** 2 * uy + 2 * t * (1 - t) * cy + t ** 2 * vy
    tx = 2 * (1 - t) * (cx - ux) + 2 * t * (vx - cx)
    ty = 2 * (1 - t) * (cy - uy) + 2 * t * (vy - cy)
    length = math.hypot(tx, ty) or 1.0
    return x, y, ty / length, -tx / length


def _overlaps(box, boxes, pad=1.0) -> bool:
    return any(box.x0 < b.x1 + pad and b.x0 < box.x1 + pad and box.y0 < b.y1 + pad and b.y0 < box.y1 + pad
               for b in boxes)


def _place_labels(ax, renderer, data, pos, arcs, width, width_by, font, taken):
    """Label links strongest first, each at the first spot along its curve
    where the label meets no other text and no box; return the labels and
    the links left unlabelled (drawn in the table beside instead)."""
    frame = ax.get_window_extent(renderer)
    live = [lid for lid, row in data["links"].items() if not row.get("silent")]
    live.sort(key=lambda lid: (-float(data["links"][lid]["power"]), lid))
    placed, left_out = {}, live[MAX_LINK_LABELS:]
    for lid in live[:MAX_LINK_LABELS]:
        row = data["links"][lid]
        colour = PREDICTION_COLOUR if row["kind"] == PREDICTION else RESIDUAL_COLOUR
        u, v = lid.split("->")
        text = ax.text(0, 0, _link_label(row, width_by, data.get("units")), fontsize=font, color=colour, zorder=5,
                       linespacing=1.15, ha="center", va="center",
                       bbox=dict(boxstyle="round,pad=0.15", facecolor="white", edgecolor="none", alpha=0.9))
        gap = (0.12 + width[lid] / 72 / 2) * font / _LINK_FONT
        spot = None
        for t in _LABEL_SPOTS:
            x, y, nx_, ny_ = _arc_point(pos[u], pos[v], arcs[lid], t)
            for side in (1, -1):
                ha = "left" if side * nx_ > 0.3 else ("right" if side * nx_ < -0.3 else "center")
                va = "bottom" if side * ny_ > 0.3 else ("top" if side * ny_ < -0.3 else "center")
                text.set_position((x + side * gap * nx_, y + side * gap * ny_))
                text.set_ha(ha)
                text.set_va(va)
                box = text.get_window_extent(renderer)
                inside = (box.x0 >= frame.x0 and box.x1 <= frame.x1 and box.y0 >= frame.y0
                          and box.y1 <= frame.y1)
                if inside and not _overlaps(box, taken):
                    spot = box
                    break
            if spot is not None:
                break
        if spot is None:
            text.remove()
            left_out.append(lid)
        else:
            text.set_gid(f"label:{lid}")
            taken.append(spot)
            placed[lid] = text
    left_out.sort(key=live.index)
    return placed, left_out


def _side_table(fig, rect, data, lids, font):
    """The links whose labels did not fit, strongest first, as a text table
    in the figure's right-hand strip; as many rows as fit, then a count."""
    ax = fig.add_axes(rect)
    ax.axis("off")
    height_in = rect[3] * fig.get_figheight()
    line = font * 1.3 / 72
    fits = max(int(height_in / line) - 3, 1)
    shown = lids if len(lids) <= fits else lids[:fits - 1]
    name = max((len(lid) for lid in shown), default=4)
    lines = [f"{'link':<{name}}  {'P':>8}  {'SNR':>8}  bit/step"]
    for lid in shown:
        row = data["links"][lid]
        lines.append(f"{lid:<{name}}  {_num(row['power']):>8}  {_num(row.get('snr')):>8}  {_num(row.get('bits'))}"
                     + _delay_text(row))
    if len(shown) < len(lids):
        lines.append(f"... and {len(lids) - len(shown)} more (see the result's tables)")
    ax.text(0, 1, "links not labelled on the drawing\n" + "\n".join(lines), transform=ax.transAxes, ha="left",
            va="top", fontsize=font, family="monospace", linespacing=1.3, gid="link-table")
    return ax


def _table_width(data, lids, font) -> float:
    """Inches the side table needs (monospace glyphs are 0.6 em wide)."""
    if not lids:
        return 0.0
    chars = max(len(lid) for lid in lids) + 32
    return 0.6 * font / 72 * max(chars, 40) + 0.3


def _silent_words(data) -> str:
    """The legend's words for silent links: how many, and what was checked
    (the designer tests a silent link at the final design, or says it did not)."""
    verdicts = [row.get("silent_verdict") for row in data["links"].values() if row.get("silent")]
    if not verdicts:
        return "silent (sends nothing)"
    if all(v == "not worth sending" for v in verdicts):
        return f"silent (not worth sending): {len(verdicts)} link(s)"
    untested = sum(v == "untested" for v in verdicts)
    return f"silent (sends nothing): {len(verdicts)} link(s)" + (f", {untested} not tested" if untested else "")


def _legend_handles(width_by, top_value, silent, width=MAX_WIDTH):
    from matplotlib.lines import Line2D

    what = "power" if width_by == "power" else "budget share"
    top_text = f"{_num(top_value)} model units\u00b2" if width_by == "power" else f"{100 * top_value:.0f}%"
    return [
        Line2D([], [], color=RESIDUAL_COLOUR, linestyle=RESIDUAL_STYLE, linewidth=2.5, label="residual (up)"),
        Line2D([], [], color=PREDICTION_COLOUR, linestyle=_style(PREDICTION_DASHES, 2.5), linewidth=2.5,
               label="prediction (down)"),
        Line2D([], [], color=SILENT_COLOUR, linestyle=_style(SILENT_DASHES, SILENT_WIDTH), linewidth=SILENT_WIDTH,
               label=silent),
        Line2D([], [], color="black", linewidth=width, label=f"width by {what}: widest = {top_text}"),
    ]


def draw_circuit(result, spec=None, width_by="power", ax=None):
    """Draw a designed circuit as a layered diagram (encoding in the module docstring).

    Parameters
    ----------
    result : DesignResult or dict
        A design, or the dict of a result JSON file (``hierarchy design --json``
        or ``hierarchy evaluate --json``).
    spec : Spec, optional
        The spec the result was designed from; without it the graph is rebuilt
        from the result's areas and link ids.
    width_by : {"power", "share"}
        What a link's width is proportional to: its power, or its largest share
        of a budget (links outside every budget are then drawn thinnest).
    ax : matplotlib.axes.Axes, optional
        Draw onto this Axes instead of a new figure (fonts follow its size;
        the legend goes below it and the table of unlabelled links to its
        right).

    Returns
    -------
    matplotlib.figure.Figure, or the given Axes
        With ``hierarchy_links`` (link id -> its FancyArrowPatch),
        ``hierarchy_nodes`` (node name -> its box patch),
        ``hierarchy_labels`` (link id -> its label on the drawing) and
        ``hierarchy_table`` (the links listed in the table beside
        instead, strongest first) for scripts and tests.

    Examples
    --------
    >>> import hierarchy
    >>> from hierarchy.report.drawing import draw_circuit
    >>> fig = draw_circuit(hierarchy.load("specs/two-level.yaml").design())   # doctest: +SKIP
    >>> fig.hierarchy_links["probe->station-view"].get_linewidth()             # doctest: +SKIP
    8.0
    """
    if width_by not in ("power", "share"):
        raise InputError(f"unknown width_by {width_by!r}", place="width_by", fix="use 'power' or 'share'")
    _check_axes(ax)
    data, spec = _as_dict(result, spec)
    if width_by == "share" and not data.get("budgets"):
        raise InputError("the design has no budgets, so no link has a share of one", place="width_by",
                         fix="draw widths by power (width_by='power', or --width-by power)")

    from matplotlib.patches import FancyArrowPatch, FancyBboxPatch

    g = result_graph(data, spec)
    areas = data["areas"]
    labels = {n: _node_label(n, d["role"], areas.get(n)) for n, d in g.nodes(data=True)}
    pos, size, rows, top = _layout(g, labels)

    arcs = {}
    for lid in data["links"]:
        u, v = lid.split("->")
        # Opposite links with the same rad bow to opposite sides; a lone link is
        # straight unless it would run through the boxes between its ends.
        if f"{v}->{u}" in data["links"]:
            arcs[lid] = _PAIR_RAD
        else:
            arcs[lid] = 0.2 if _crosses(pos, size, u, v) else 0.0
    xs = [pos[n][0] + s * size[n][0] / 2 for n in g.nodes for s in (-1, 1)]
    ys = [pos[n][1] for n in g.nodes]
    for lid, rad in arcs.items():  # a long bowed link must stay in the picture
        u, v = lid.split("->")
        x, y, _, _ = _arc_point(pos[u], pos[v], rad, 0.5)
        xs.append(x)
        ys.append(y)
    x0, x1 = min(xs) - 1.5, max(xs) + 1.0
    y0, y1 = min(ys) - 1.0, max(ys) + 0.9
    # The drawing keeps its proportions (one data unit = `scale` inches) and
    # is shrunk to fit 16 x 14 inches (or the given Axes); fonts shrink with
    # it, to 60% at least.
    room = (16.0, 14.0) if ax is None else _axes_inches(ax)
    scale = min(1.0, room[0] / (x1 - x0), room[1] / (y1 - y0))
    font = _FONT * max(scale, 0.6)
    link_font = _LINK_FONT * max(scale, 0.6)
    if scale < 1.0 and font > _FONT * scale:  # bigger letters need bigger boxes
        labels_scale = font / (_FONT * scale)
        size = {n: (w * labels_scale, h * labels_scale) for n, (w, h) in size.items()}
        pos = {n: (x * labels_scale, y * labels_scale) for n, (x, y) in pos.items()}
        x0, x1, y0, y1 = (v * labels_scale for v in (x0, x1, y0, y1))
        scale /= labels_scale
    title = _title(data)
    title_in = (title.count("\n") + 1) * font * 1.1 * 1.35 / 72 + 0.25
    legend_in = 0.75
    table_font = max(link_font, 6.0)
    draw_w, draw_h = (x1 - x0) * scale, (y1 - y0) * scale
    given = ax is not None
    if given:
        fig = ax.figure
    else:
        fig_w = max(draw_w + 0.3, 6.0)
        fig_h = max(draw_h + title_in + legend_in, 4.5)
        fig = _figure(fig_w, fig_h)
        left = (fig_w - draw_w) / 2
        ax = fig.add_axes([left / fig_w, legend_in / fig_h, draw_w / fig_w, draw_h / fig_h])
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal")  # arc bows and label offsets assume equal axes
    ax.axis("off")
    if given:
        ax.apply_aspect()  # so the labels below are measured where they will be drawn
    renderer = _renderer(fig)

    y_of = {level: pos[nodes[0]][1] for level, nodes in rows.items()}
    taken = []
    for level, nodes in rows.items():
        text = "unreached" if level > top else ("level 0\nsensors" if level == 0 else f"level {level}")
        t = ax.text(x0 + 0.1, y_of[level], text, ha="left", va="center", fontsize=font * 0.85,
                    color="#555555", style="italic")
        taken.append(t.get_window_extent(renderer))

    boxes = {}
    for n, d in g.nodes(data=True):
        (cx, cy), (w, h) = pos[n], size[n]
        sensor = d["role"] == "sensor"
        box = FancyBboxPatch((cx - w / 2, cy - h / 2), w, h,
                             boxstyle="square,pad=0" if sensor else "round,pad=0,rounding_size=0.15",
                             facecolor=SENSOR_FILL if sensor else "white", edgecolor="black",
                             linewidth=1.0, zorder=3)
        box.set_gid(f"node:{n}")
        ax.add_patch(box)
        boxes[n] = box
        ax.text(cx, cy, labels[n], ha="center", va="center", fontsize=font, zorder=4, linespacing=1.25)
        taken.append(box.get_window_extent(renderer))

    width, top_value = _widths(data, width_by)
    arrows = {}
    for lid, row in data["links"].items():
        u, v = lid.split("->")
        (ux, uy), (vx, vy) = pos[u], pos[v]
        rad = arcs[lid]
        silent = bool(row.get("silent"))
        kind = row["kind"]
        colour = SILENT_COLOUR if silent else (PREDICTION_COLOUR if kind == PREDICTION else RESIDUAL_COLOUR)
        lw = width[lid] * max(scale, 0.5)
        style = _style(SILENT_DASHES if silent else (PREDICTION_DASHES if kind == PREDICTION else None), lw)
        arrow = FancyArrowPatch((ux, uy), (vx, vy), patchA=boxes[u], patchB=boxes[v],
                                connectionstyle=f"arc3,rad={rad}", arrowstyle="-|>",
                                mutation_scale=8 + 1.5 * lw, linewidth=lw, linestyle=style,
                                color=colour, shrinkA=2, shrinkB=3, zorder=2 if silent else 2.5,
                                joinstyle="miter", capstyle="butt")
        arrow.set_gid(f"link:{lid}")
        ax.add_patch(arrow)
        arrows[lid] = arrow

    placed, left_out = _place_labels(ax, renderer, data, pos, arcs, width, width_by, link_font, taken)
    handles = _legend_handles(width_by, top_value, _silent_words(data), MAX_WIDTH * max(scale, 0.5))
    if given:
        # Someone else's figure keeps its size: the table sits right of the
        # drawing, the legend below it and the title above it.
        if left_out:
            box = ax.get_position()
            table_in = _table_width(data, left_out, table_font)
            _side_table(fig, [box.x1 + 0.01, box.y0, table_in / fig.get_figwidth(), box.height], data, left_out,
                        table_font)
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 0.0), ncol=2, frameon=False,
                  fontsize=font * 0.9, handlelength=3.2)
        ax.set_title(title, fontsize=font * 1.1, linespacing=1.35, gid="title")
        target = ax
    if left_out and not given:
        # Widen the figure for the table; the drawing keeps its size in
        # inches, so the labels placed above stay where they were put.
        table_in = _table_width(data, left_out, table_font)
        left = 0.15
        fig_w = max(fig_w, left + draw_w + 0.1 + table_in)
        fig.set_figwidth(fig_w)
        ax.set_position([left / fig_w, legend_in / fig_h, draw_w / fig_w, draw_h / fig_h])
        _side_table(fig, [(left + draw_w + 0.1) / fig_w, legend_in / fig_h, (table_in - 0.1) / fig_w,
                          draw_h / fig_h], data, left_out, table_font)

    if not given:
        fig.legend(handles=handles, loc="lower center", bbox_to_anchor=(0.5, 0.02), ncol=2, frameon=False,
                   fontsize=font * 0.9, handlelength=3.2)
        fig.text(0.5, 1 - 0.12 / fig_h, title, ha="center", va="top", fontsize=font * 1.1, linespacing=1.35,
                 gid="title")
        target = fig
    target.hierarchy_links = arrows
    target.hierarchy_nodes = boxes
    target.hierarchy_labels = placed
    target.hierarchy_table = left_out
    return target


def draw(result, spec=None, view="auto", width_by="power", ax=None):
    """The picture of a design in the chosen view.

    ``view`` is ``"circuit"`` (the layered drawing, :func:`draw_circuit`),
    ``"matrix"`` (:func:`draw_matrix`) or ``"auto"``: the drawing up to
    :data:`MAX_DRAWN_AREAS` areas, the matrix above. With ``ax`` the picture
    is drawn onto that matplotlib Axes, which is returned.

    Examples
    --------
    >>> fig = draw(read_result("design.json"), view="matrix")   # doctest: +SKIP
    """
    if view not in VIEWS:
        raise InputError(f"unknown view {view!r}", place="view", fix="use " + ", ".join(VIEWS))
    data, spec = _as_dict(result, spec)
    if view == "auto":
        view = "circuit" if len(data["areas"]) <= MAX_DRAWN_AREAS else "matrix"
    if view == "matrix":
        return draw_matrix(data, spec, ax=ax)
    return draw_circuit(data, spec, width_by=width_by, ax=ax)


# -- files -------------------------------------------------------------------


def check_path(path) -> str:
    """The output format for ``path`` (from its extension), or a clear error.

    Examples
    --------
    >>> check_path("circuit.svg")
    'svg'
    """
    path = os.fspath(path)
    ext = os.path.splitext(path)[1].lower()
    if ext not in FORMATS:
        raise InputError(f"cannot draw to a '{ext or 'file without extension'}' file", place=path,
                         fix="end the path with " + ", ".join(FORMATS) + " (e.g. circuit.png)")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise InputError("the folder does not exist", place=path, fix="create the folder or choose another path")
    return FORMATS[ext]


def save_circuit(result, path, spec=None, width_by="power", dpi=150, view="auto") -> None:
    """Draw a circuit in a view (see :func:`draw`) and write it to ``path``.

    The format follows the extension (.png, .svg or .pdf); the file is written
    to a temporary file and renamed, so an existing picture is never
    half-overwritten.

    Examples
    --------
    >>> save_circuit(result, "circuit.svg")    # doctest: +SKIP
    """
    fmt = check_path(path)
    fig = draw(result, spec=spec, view=view, width_by=width_by)
    buf = io.BytesIO()
    # Fixed metadata keep the files the same from run to run.
    metadata = {"png": {"Software": None}, "svg": {"Date": None}, "pdf": {"CreationDate": None}}[fmt]
    fig.savefig(buf, format=fmt, dpi=dpi, metadata=metadata)
    from hierarchy.io import atomic_write_bytes

    atomic_write_bytes(path, buf.getvalue())
