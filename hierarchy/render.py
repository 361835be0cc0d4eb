"""Drawings of a designed circuit: a layered diagram of sensors, areas and links.

The picture is made from the result alone (the ``hierarchy design --json``
file, a :class:`~hierarchy.design.DesignResult`, or ``hierarchy evaluate
--json`` scores); a spec, when given, only supplies the graph.

Visual encoding
---------------
Layout
    Sensors sit at the bottom (level 0); every area sits at its derived level
    (:func:`hierarchy.circuit.levels`: one above the lowest node that sends it
    a residual). Areas that no sensor reaches are drawn on a row above the top
    and labelled "unreached". Level numbers are written on the left.
Nodes
    Sensors are grey square boxes; areas are white rounded boxes labelled with
    their name and their error E||e||^2 ("relay" for an area without a target).
Colour and line style (the Okabe-Ito colour-blind-safe palette)
    Residuals (bottom-up): solid lines in Okabe-Ito blue ``#0072B2``.
    Predictions (top-down): dash-dot lines in Okabe-Ito vermillion ``#D55E00``.
    Silent links (not worth sending): thin dashed grey lines, whatever their
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
    Each link is labelled beside its middle with its power ``P``, its SNR and
    its rate in bits per step; "silent" for silent links. With more than ten
    areas the link labels are left out to keep the picture readable.
Title
    The spec's name, the design's status (converged, iteration limit, failed)
    and its objective; budgets with their use and shadow price below.

matplotlib is imported only inside the functions that draw (the Agg canvas,
never pyplot), so importing this module is cheap and leaves the user's
plotting backend alone.
"""

from __future__ import annotations

import io
import json
import math
import os

from .errors import InputError
from .model import PREDICTION, RESIDUAL

#: Output formats by file extension.
FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}

# Okabe & Ito (2008), "Color Universal Design": blue and vermillion are told
# apart by every common kind of colour-blindness.
RESIDUAL_COLOUR = "#0072B2"
PREDICTION_COLOUR = "#D55E00"
SILENT_COLOUR = "#999999"
RESIDUAL_STYLE = "solid"
PREDICTION_DASHES = (7.0, 3.0, 1.5, 3.0)  # dash-dot, in points at 1 pt width
SILENT_DASHES = (3.0, 3.0)  # dashed
SENSOR_FILL = "#E6E6E6"

MIN_WIDTH = 1.0  # points, for a link that sends nothing
MAX_WIDTH = 8.0  # points, for the largest power (or share) in the picture
SILENT_WIDTH = 0.9
MAX_LABELLED_AREAS = 10
#: A result file is refused above this size (bytes): a 5000-dim design
#: writes a few megabytes.
MAX_RESULT_FILE = 50_000_000

_LEVEL_GAP = 2.6  # data units (inches at full size) between levels
_NODE_GAP = 1.6  # between boxes on one level
_BOX_HEIGHT = 0.62
_FONT = 9.0
_LINK_FONT = 7.0
_PAIR_RAD = 0.28  # bow of each arrow of a prediction/residual pair


# -- the result --------------------------------------------------------------


def read_result(path) -> dict:
    """Load a result JSON file (``hierarchy design --json``) and check its shape.

    Raises
    ------
    InputError
        The file is missing, is not JSON, or is not a hierarchy result.

    Examples
    --------
    >>> data = read_result("design.json")    # doctest: +SKIP
    >>> sorted(data["links"])                # doctest: +SKIP
    ['probe->station-view', ...]
    """
    from .io import ReadRefused, read_text

    path = os.fspath(path)
    try:
        text = read_text(path, MAX_RESULT_FILE)
    except ReadRefused as err:
        if err.reason == "missing":
            raise InputError("no such file", place=path, fix="give the path of a result written by "
                             "`hierarchy design SPEC --json PATH`") from None
        raise InputError(f"cannot read the file ({err})", place=path,
                         fix="give a readable result JSON file") from None
    except UnicodeDecodeError as err:
        raise InputError(f"cannot read the file ({err})", place=path,
                         fix="give a readable result JSON file") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as err:
        raise InputError(f"not valid JSON (line {err.lineno}, column {err.colno}: {err.msg})", place=path,
                         fix="give a result written by `hierarchy design SPEC --json PATH`") from None
    except RecursionError:
        raise InputError("the JSON is nested too deeply", place=path,
                         fix="give a result written by `hierarchy design SPEC --json PATH`") from None
    except ValueError as err:  # an integer of thousands of digits
        raise InputError(f"a value cannot be read ({err})", place=path,
                         fix="give a result written by `hierarchy design SPEC --json PATH`") from None
    _check_result(data, path)
    return data


def _check_result(data, place) -> None:
    fix = "give a result written by `hierarchy design SPEC --json PATH` (or `hierarchy evaluate --json`)"
    if not isinstance(data, dict) or data.get("format") != "hierarchy-result":
        if not isinstance(data, dict):
            what = f"a JSON {type(data).__name__}, not an object"
        elif "format" not in data:
            what = "no 'format' key"
        else:
            what = f"format {data['format']!r}"
        raise InputError(f"not a hierarchy result file ({what}; expected format 'hierarchy-result')",
                         place=place, fix=fix)
    for key in ("areas", "links"):
        if not isinstance(data.get(key), dict):
            raise InputError(f"the result has no '{key}' object", place=place, fix=fix)
    for lid, row in data["links"].items():
        ends = lid.split("->")
        if len(ends) != 2 or not all(ends):
            raise InputError(f"the link id '{lid}' is not of the form FROM->TO", place=f"{place}: links", fix=fix)
        if not isinstance(row, dict) or row.get("kind") not in (PREDICTION, RESIDUAL):
            raise InputError(f"link '{lid}' has no kind 'prediction' or 'residual'",
                             place=f"{place}: links.{lid}", fix=fix)
        power = row.get("power")
        if not isinstance(power, (int, float)) or isinstance(power, bool) or not math.isfinite(power):
            raise InputError(f"link '{lid}' has no finite power", place=f"{place}: links.{lid}.power", fix=fix)
        for key in ("snr", "bits"):
            _optional_number(row.get(key), f"{place}: links.{lid}.{key}", fix)
        if not isinstance(row.get("share_of_budget") or {}, dict):
            raise InputError("the shares of budget are not an object", place=f"{place}: links.{lid}", fix=fix)
        for b, share in (row.get("share_of_budget") or {}).items():
            _optional_number(share, f"{place}: links.{lid}.share_of_budget.{b}", fix)
    # What the title and the boxes print: numbers, text or nothing.
    for name, area in data["areas"].items():
        if not isinstance(area, dict):
            raise InputError(f"area '{name}' is not an object", place=f"{place}: areas.{name}", fix=fix)
        _optional_number(area.get("error"), f"{place}: areas.{name}.error", fix)
    _optional_number(data.get("objective"), f"{place}: objective", fix)
    for key in ("spec", "status", "form"):
        if data.get(key) is not None and not isinstance(data[key], str):
            raise InputError(f"the result's '{key}' is not text", place=f"{place}: {key}", fix=fix)
    budgets = data.get("budgets") or {}
    if not isinstance(budgets, dict) or not all(isinstance(r, dict) for r in budgets.values()):
        raise InputError("the result's budgets are not an object of objects", place=f"{place}: budgets", fix=fix)
    for b, row in budgets.items():
        for key in ("used", "total", "shadow_price"):
            _optional_number(row.get(key), f"{place}: budgets.{b}.{key}", fix)


def _optional_number(value, place, fix) -> None:
    """``None`` (shown as infinite) or a real number; anything else is refused."""
    if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))
                              or math.isnan(value)):
        raise InputError(f"expected a number, got {type(value).__name__} {str(value)[:40]!r}", place=place,
                         fix=fix)


def _as_dict(result, spec):
    """The result as its JSON dict, and the spec when one is known."""
    if isinstance(result, dict):
        _check_result(result, "result")
        return result, spec
    if hasattr(result, "to_dict") and hasattr(result, "spec"):  # DesignResult
        return result.to_dict(), spec if spec is not None else result.spec
    raise InputError(f"cannot draw a {type(result).__name__}", place="result",
                     fix="pass a DesignResult or the dict of a result JSON file")


def result_graph(data: dict, spec=None):
    """The circuit's graph with levels, from a spec or from the result alone.

    Without a spec, the areas are the keys of ``data["areas"]`` and every other
    end of a link is a sensor; levels are then computed by
    :func:`hierarchy.circuit.levels`, as ``hierarchy check`` does.

    Examples
    --------
    >>> g = result_graph(read_result("design.json"))   # doctest: +SKIP
    >>> g.nodes["probe"]["level"]                      # doctest: +SKIP
    0
    """
    import networkx as nx

    from .circuit import build_graph, levels

    if spec is not None:
        g = build_graph(spec)
        missing = [f"link {lid}" for lid in data["links"] if not g.has_edge(*lid.split("->"))]
        missing += [f"area {a}" for a in data["areas"] if a not in g or g.nodes[a]["role"] != "area"]
        if missing:
            raise InputError(f"the result does not fit the spec '{spec.name}', which has no "
                             + ", ".join(missing),
                             place="spec", fix="draw the result with the spec it was designed from, or with none")
        return g
    g = nx.DiGraph(name=data.get("spec", ""))
    for name in data["areas"]:
        g.add_node(name, role="area")
    for lid, row in data["links"].items():
        u, v = lid.split("->")
        for n in (u, v):
            if n not in g:
                g.add_node(n, role="sensor")
        g.add_edge(u, v, id=lid, kind=row["kind"])
    for node, level in levels(g).items():
        g.nodes[node]["level"] = level
    return g


# -- text --------------------------------------------------------------------


def _num(x, digits=3) -> str:
    if x is None:
        return "\u221e"  # written as null only when infinite (noiseless channel)
    x = float(x)
    if x == 0:
        return "0"
    if 1e-2 <= abs(x) < 1e4:
        return f"{x:.{digits}g}"
    return f"{x:.{max(digits - 1, 1)}e}".replace("e-0", "e-").replace("e+0", "e")


def _link_label(row, width_by) -> str:
    if row.get("silent"):
        return f"silent\n{row['kind']}"
    lines = [f"P {_num(row['power'])}", f"SNR {_num(row.get('snr'))}", f"{_num(row.get('bits'))} bit/step"]
    if width_by == "share":
        shares = row.get("share_of_budget") or {}
        lines += [f"{100 * s:.0f}% of {b}" for b, s in shares.items() if s is not None] or ["in no budget"]
    return "\n".join(lines)


def _node_label(name, role, area) -> str:
    if role == "sensor":
        return f"{name}\nsensor"
    if area is None:
        return name
    if area.get("relay") or area.get("error") is None:
        return f"{name}\nrelay"
    return f"{name}\nerror {_num(area['error'])}"


def _title(data) -> str:
    name = data.get("spec") or "circuit"
    head = f"{name}"
    bits = []
    if data.get("status"):
        bits.append(f"{data['status']}" + (f" ({data['form']} form)" if data.get("form") else ""))
    else:
        bits.append("exact scores")
    if data.get("objective") is not None:
        bits.append(f"objective {_num(data['objective'], 5)}")
    lines = [head, ", ".join(bits)]
    budgets = data.get("budgets") or {}
    if budgets:
        lines.append("; ".join(
            f"budget {b}: {_num(row.get('used'))} of {_num(row.get('total'))} used, "
            f"shadow price {_num(row.get('shadow_price'))}" for b, row in budgets.items()))
    return "\n".join(lines)


# -- layout ------------------------------------------------------------------


def _box_size(label, fontsize):
    # Average glyph ~0.55 em wide; 72 points per inch and one data unit per inch.
    chars = max(len(line) for line in label.split("\n"))
    return max(1.25, 0.58 * fontsize / 72 * chars + 0.35), _BOX_HEIGHT


def _layout(g, labels):
    """Rows by level (sensors bottom), ordered to cut crossings; centres and sizes."""
    known = [d.get("level") for _, d in g.nodes(data=True) if d.get("level") is not None]
    top = max(known, default=0)
    rows = {}
    for n, d in g.nodes(data=True):
        level = d.get("level")
        rows.setdefault(top + 1 if level is None else level, []).append(n)
    order = {n: i for i, n in enumerate(g.nodes)}
    x = {}
    size = {n: _box_size(labels[n], _FONT) for n in g.nodes}
    for level in sorted(rows):
        nodes = rows[level]
        if x:  # barycentre of the neighbours already placed (lower rows)
            def key(n):
                near = [x[m] for m in set(g.predecessors(n)) | set(g.successors(n)) if m in x]
                return (sum(near) / len(near) if near else math.inf, order[n])
            nodes.sort(key=key)
        else:
            nodes.sort(key=order.get)
        total = sum(size[n][0] for n in nodes) + _NODE_GAP * (len(nodes) - 1)
        left = -total / 2
        for n in nodes:
            x[n] = left + size[n][0] / 2
            left += size[n][0] + _NODE_GAP
    pos = {n: (x[n], level * _LEVEL_GAP) for level, nodes in rows.items() for n in nodes}
    return pos, size, rows, top


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


def draw_circuit(result, spec=None, ax=None, width_by="power"):
    """Draw a designed circuit as a layered diagram (encoding in the module docstring).

    Parameters
    ----------
    result : DesignResult or dict
        A design, or the dict of a result JSON file (``hierarchy design --json``
        or ``hierarchy evaluate --json``).
    spec : Spec, optional
        The spec the result was designed from; without it the graph is rebuilt
        from the result's areas and link ids.
    ax : matplotlib Axes, optional
        Draw into these axes; by default a new figure sized to the circuit.
    width_by : {"power", "share"}
        What a link's width is proportional to: its power, or its largest share
        of a budget (links outside every budget are then drawn thinnest).

    Returns
    -------
    matplotlib.figure.Figure
        With ``fig.hierarchy_links`` (link id -> its FancyArrowPatch),
        ``fig.hierarchy_nodes`` (node name -> its box patch) and
        ``fig.hierarchy_labels`` (link id -> its label; empty above ten
        areas) for scripts and tests.

    Examples
    --------
    >>> import hierarchy
    >>> from hierarchy.render import draw_circuit
    >>> fig = draw_circuit(hierarchy.load("specs/two-level.yaml").design())   # doctest: +SKIP
    >>> fig.hierarchy_links["probe->station-view"].get_linewidth()             # doctest: +SKIP
    8.0
    """
    if width_by not in ("power", "share"):
        raise InputError(f"unknown width_by {width_by!r}", place="width_by", fix="use 'power' or 'share'")
    data, spec = _as_dict(result, spec)
    if width_by == "share" and not data.get("budgets"):
        raise InputError("the design has no budgets, so no link has a share of one", place="width_by",
                         fix="draw widths by power (width_by='power', or --width-by power)")

    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import FancyArrowPatch, FancyBboxPatch

    g = result_graph(data, spec)
    areas = data["areas"]
    labels = {n: _node_label(n, d["role"], areas.get(n)) for n, d in g.nodes(data=True)}
    pos, size, rows, top = _layout(g, labels)
    show_labels = len(areas) <= MAX_LABELLED_AREAS

    xs = [pos[n][0] + s * size[n][0] / 2 for n in g.nodes for s in (-1, 1)]
    ys = [pos[n][1] for n in g.nodes]
    x0, x1 = min(xs) - (2.3 if show_labels else 0.9), max(xs) + (1.6 if show_labels else 0.6)
    y0, y1 = min(ys) - 0.9, max(ys) + 0.8
    scale = 1.0
    if ax is None:
        w, h = x1 - x0, y1 - y0 + 1.0  # one inch for the title
        scale = min(1.0, 16.0 / w, 14.0 / h)
        fig = Figure(figsize=(max(w * scale, 5.5), max(h * scale, 4.5) + 0.6), layout="constrained")
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        FigureCanvasAgg(fig)
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    font, link_font = _FONT * scale, _LINK_FONT * scale
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal")  # arc bows and label offsets below assume equal axes
    ax.axis("off")

    # Level numbers on the left.
    for level, nodes in rows.items():
        text = "unreached" if level > top else ("level 0\nsensors" if level == 0 else f"level {level}")
        ax.text(x0 + 0.1, level * _LEVEL_GAP, text, ha="left", va="center", fontsize=font * 0.85,
                color="#555555", style="italic")

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
        ax.text(cx, cy, labels[n], ha="center", va="center", fontsize=font, zorder=4,
                linespacing=1.25)

    width, top_value = _widths(data, width_by)
    arrows, link_labels = {}, {}
    for lid, row in data["links"].items():
        u, v = lid.split("->")
        (ux, uy), (vx, vy) = pos[u], pos[v]
        # Opposite links with the same rad bow to opposite sides; a lone link is
        # straight unless it would run through the boxes between its ends.
        if f"{v}->{u}" in data["links"]:
            rad = _PAIR_RAD
        else:
            rad = 0.2 if _crosses(pos, size, u, v) else 0.0
        silent = bool(row.get("silent"))
        kind = row["kind"]
        colour = SILENT_COLOUR if silent else (PREDICTION_COLOUR if kind == PREDICTION else RESIDUAL_COLOUR)
        lw = width[lid]
        style = _style(SILENT_DASHES if silent else (PREDICTION_DASHES if kind == PREDICTION else None), lw)
        arrow = FancyArrowPatch((ux, uy), (vx, vy), patchA=boxes[u], patchB=boxes[v],
                                connectionstyle=f"arc3,rad={rad}", arrowstyle="-|>",
                                mutation_scale=8 + 1.5 * lw, linewidth=lw, linestyle=style,
                                color=colour, shrinkA=2, shrinkB=3, zorder=2 if silent else 2.5,
                                joinstyle="miter", capstyle="butt")
        arrow.set_gid(f"link:{lid}")
        ax.add_patch(arrow)
        arrows[lid] = arrow
        if show_labels:
            # Middle of the quadratic arc3 curve: the chord's midpoint moved
            # rad/2 of the chord along its right-hand normal (dy, -dx).
            dx, dy = vx - ux, vy - uy
            length = math.hypot(dx, dy) or 1.0
            nx_, ny_ = dy / length, -dx / length
            mx = (ux + vx) / 2 + 0.5 * rad * dy
            my = (uy + vy) / 2 - 0.5 * rad * dx
            gap = 0.1 + lw / 72 / 2
            lx, ly = mx + gap * nx_, my + gap * ny_
            ha = "left" if nx_ > 0.3 else ("right" if nx_ < -0.3 else "center")
            va = "bottom" if ny_ > 0.3 else ("top" if ny_ < -0.3 else "center")
            link_labels[lid] = ax.text(
                lx, ly, _link_label(row, width_by), ha=ha, va=va, fontsize=link_font,
                color="#666666" if silent else colour, zorder=5, linespacing=1.15,
                bbox=dict(boxstyle="round,pad=0.15", facecolor="white", edgecolor="none", alpha=0.85))

    what = "power" if width_by == "power" else "budget share"
    top_text = _num(top_value) if width_by == "power" else f"{100 * top_value:.0f}%"
    handles = [
        Line2D([], [], color=RESIDUAL_COLOUR, linestyle=RESIDUAL_STYLE, linewidth=2.5, label="residual (up)"),
        Line2D([], [], color=PREDICTION_COLOUR, linestyle=_style(PREDICTION_DASHES, 2.5), linewidth=2.5,
               label="prediction (down)"),
        Line2D([], [], color=SILENT_COLOUR, linestyle=_style(SILENT_DASHES, SILENT_WIDTH), linewidth=SILENT_WIDTH,
               label="silent (not worth sending)"),
        Line2D([], [], color="black", linewidth=MAX_WIDTH, label=f"width by {what}: widest = {top_text}"),
    ]
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 0.0), ncol=2, frameon=False,
              fontsize=font * 0.9, handlelength=3.2)
    ax.set_title(_title(data), fontsize=font * 1.1, loc="center")
    fig.hierarchy_links = arrows
    fig.hierarchy_nodes = boxes
    fig.hierarchy_labels = link_labels
    return fig


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


def save_circuit(result, path, spec=None, width_by="power", dpi=150) -> None:
    """Draw a circuit (see :func:`draw_circuit`) and write it to ``path``.

    The format follows the extension (.png, .svg or .pdf); the file is written
    to a temporary file and renamed, so an existing picture is never
    half-overwritten.

    Examples
    --------
    >>> save_circuit(result, "circuit.svg")    # doctest: +SKIP
    """
    fmt = check_path(path)
    fig = draw_circuit(result, spec=spec, width_by=width_by)
    buf = io.BytesIO()
    # Fixed metadata keep the files the same from run to run.
    metadata = {"png": {"Software": None}, "svg": {"Date": None}, "pdf": {"CreationDate": None}}[fmt]
    fig.savefig(buf, format=fmt, dpi=dpi, metadata=metadata)
    from .io import atomic_write_bytes

    atomic_write_bytes(path, buf.getvalue())
