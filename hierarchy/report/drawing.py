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
import json
import math
import os

from hierarchy.errors import InputError
from hierarchy.spec.model import PREDICTION, RESIDUAL

__all__ = [
    "FORMATS", "RESIDUAL_COLOUR", "PREDICTION_COLOUR", "SILENT_COLOUR", "RESIDUAL_STYLE",
    "PREDICTION_DASHES", "SILENT_DASHES", "SENSOR_FILL", "MIN_WIDTH", "MAX_WIDTH", "SILENT_WIDTH",
    "MAX_DRAWN_AREAS", "MAX_TITLE_BUDGETS", "MAX_LINK_LABELS", "VIEWS", "MAX_RESULT_FILE",
    "read_result", "result_graph", "crossings", "draw_circuit", "draw_matrix", "draw",
    "check_path", "save_circuit",
]

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
#: ``view="auto"`` draws the layered circuit up to this many areas, the matrix above.
MAX_DRAWN_AREAS = 24
MAX_TITLE_BUDGETS = 4
#: At most this many links are labelled on the drawing (strongest first);
#: the others are listed in the table beside it.
MAX_LINK_LABELS = 12
VIEWS = ("auto", "circuit", "matrix")
# Where along a link (fraction of its curve) a label may sit, best first.
_LABEL_SPOTS = (0.5, 0.4, 0.6, 0.3, 0.7, 0.22, 0.78)
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
    from hierarchy.io import ReadRefused, read_text

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
        delay = row.get("delay", 1)
        if not isinstance(delay, int) or isinstance(delay, bool) or delay < 1:
            raise InputError(f"link '{lid}' has a delay that is not a whole number of steps (1 or more)",
                             place=f"{place}: links.{lid}.delay", fix=fix)
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
    end of a link is a sensor; levels are the ones the result records for
    its areas, and otherwise computed by :func:`hierarchy.circuit.levels`, as
    ``hierarchy check`` does.

    Examples
    --------
    >>> g = result_graph(read_result("design.json"))   # doctest: +SKIP
    >>> g.nodes["probe"]["level"]                      # doctest: +SKIP
    0
    """
    import networkx as nx

    from hierarchy.graph import build_graph, levels

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
    for name, row in data["areas"].items():
        # A result written by this version carries each area's level; older
        # ones fall back to the default rule, as `hierarchy check` applies it.
        level = row.get("level") if isinstance(row, dict) else None
        ok = isinstance(level, int) and not isinstance(level, bool) and level >= 1
        g.add_node(name, role="area", given_level=level if ok else None)
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


def _si(value, unit) -> str:
    """``8.2 nW``: a physical number with an SI prefix."""
    if value is None:
        return f"\u221e {unit}"
    value = float(value)
    if value == 0:
        return f"0 {unit}"
    for factor, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "\u00b5"),
                           (1e-9, "n"), (1e-12, "p"), (1e-15, "f")):
        if abs(value) >= factor:
            return f"{value / factor:.3g} {prefix}{unit}"
    return f"{value:.2e} {unit}"


def _physical_text(row, units) -> str:
    """``120 spike/s, 8.2 nW`` for a result with physical units."""
    phys = row.get("physical") if isinstance(row.get("physical"), dict) else None
    if not isinstance(units, dict) or phys is None:
        return ""
    rate, watts = phys.get("events_per_second"), phys.get("watts")
    if not all(v is None or isinstance(v, (int, float)) and not isinstance(v, bool) for v in (rate, watts)):
        return ""
    return f"{_num(rate)} {units.get('event') or 'event'}/s, {_si(watts, 'W')}"


def _link_label(row, width_by, units=None) -> str:
    lines = [f"P {_num(row['power'])}  SNR {_num(row.get('snr'))}",
             f"{_num(row.get('bits'))} bit/step" + _delay_text(row)]
    physical = _physical_text(row, units)
    if physical:
        lines.append(physical)
    if width_by == "share":
        shares = row.get("share_of_budget") or {}
        lines += [", ".join(f"{100 * s:.0f}% of {b}" for b, s in shares.items() if s is not None)
                  or "in no budget"]
    return "\n".join(lines)


def _delay_text(row) -> str:
    """``, delay 3`` for a link that takes 3 steps; nothing for one step."""
    delay = row.get("delay") or 1
    return f", delay {delay}" if delay > 1 else ""


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
    bits = []
    if data.get("status"):
        bits.append(f"{data['status']}" + (f" ({data['form']} form)" if data.get("form") else ""))
    else:
        bits.append("exact scores")
    if data.get("objective") is not None:
        bits.append(f"objective {_num(data['objective'], 5)}")
    lines = [name, ", ".join(bits)]
    budgets = list((data.get("budgets") or {}).items())
    # One line per budget, so that no line runs off a narrow picture.
    for b, row in budgets[:MAX_TITLE_BUDGETS]:
        lines.append(f"budget {b}: {_num(row.get('used'))} of {_num(row.get('total'))} used, "
                     f"shadow price {_num(row.get('shadow_price'))}")
    if len(budgets) > MAX_TITLE_BUDGETS:
        lines.append(f"and {len(budgets) - MAX_TITLE_BUDGETS} more budgets (see the result's tables)")
    units, total = data.get("units"), data.get("physical_total")
    if isinstance(units, dict) and isinstance(total, dict):
        watts = total.get("watts")
        if watts is None or isinstance(watts, (int, float)) and not isinstance(watts, bool):
            step = units.get("step_seconds")
            lines.append(f"all links: {_si(watts, 'W')}" + (f", 1 step = {_si(step, 's')}"
                                                            if isinstance(step, (int, float)) else ""))
    return "\n".join(lines)


# -- layout ------------------------------------------------------------------


def _box_size(label, fontsize):
    # Average glyph ~0.58 em wide; 72 points per inch and one data unit per inch.
    chars = max(len(line) for line in label.split("\n"))
    return max(1.25, 0.58 * fontsize / 72 * chars + 0.35), _BOX_HEIGHT


def _rows(g):
    """Nodes by row: their level, or one row above the top for unplaced areas."""
    known = [d.get("level") for _, d in g.nodes(data=True) if d.get("level") is not None]
    top = max(known, default=0)
    rows = {}
    for n, d in g.nodes(data=True):
        level = d.get("level")
        rows.setdefault(top + 1 if level is None else level, []).append(n)
    return {k: rows[k] for k in sorted(rows)}, top


def _centres(rows, size):
    """x of every node when each row is centred, boxes _NODE_GAP apart."""
    x = {}
    for nodes in rows.values():
        left = -(sum(size[n][0] for n in nodes) + _NODE_GAP * (len(nodes) - 1)) / 2
        for n in nodes:
            x[n] = left + size[n][0] / 2
            left += size[n][0] + _NODE_GAP
    return x


def crossings(g, rows) -> int:
    """Crossings between the links that join neighbouring rows (straight-line
    count; links that skip rows are left out of the count).

    Examples
    --------
    >>> import networkx as nx
    >>> g = nx.DiGraph([("a", "d"), ("b", "c")])
    >>> crossings(g, {0: ["a", "b"], 1: ["c", "d"]}), crossings(g, {0: ["a", "b"], 1: ["d", "c"]})
    (1, 0)
    """
    import numpy as np

    index = {n: (k, i) for k, nodes in rows.items() for i, n in enumerate(nodes)}
    keys = list(rows)
    total = 0
    for lo, hi in zip(keys, keys[1:]):
        pairs = {tuple(sorted((u, v), key=lambda n: index[n][0])) for u, v in g.edges
                 if {index[u][0], index[v][0]} == {lo, hi}}
        if len(pairs) < 2:
            continue
        a = np.array([index[p][1] for p, _ in pairs])
        b = np.array([index[q][1] for _, q in pairs])
        total += int(np.sum((a[:, None] < a[None, :]) & (b[:, None] > b[None, :])))
    return total


def _order_rows(g, rows, size, sweeps=8):
    """Reorder each row to cut crossings: barycentre sweeps up and down
    (Sugiyama, Tagawa & Toda 1981), keeping the best order seen."""
    rows = {k: sorted(v, key=list(g.nodes).index) for k, v in rows.items()}
    best, best_count = {k: list(v) for k, v in rows.items()}, crossings(g, rows)
    keys = list(rows)
    for sweep in range(sweeps):
        order = keys[1:] if sweep % 2 == 0 else keys[-2::-1]
        for k in order:
            x = _centres(rows, size)
            done = [j for j in keys if (j < k if sweep % 2 == 0 else j > k)]

            def key(n, done=done, x=x, k=k):
                near = [x[m] for m in set(g.predecessors(n)) | set(g.successors(n))
                        if any(m in rows[j] for j in done)]
                return sum(near) / len(near) if near else x[n]
            rows[k] = sorted(rows[k], key=key)
        count = crossings(g, rows)
        if count < best_count:
            best, best_count = {k: list(v) for k, v in rows.items()}, count
    return best


def _layout(g, labels):
    """Rows by level (sensors bottom), ordered to cut crossings; centres and sizes."""
    rows, top = _rows(g)
    size = {n: _box_size(labels[n], _FONT) for n in g.nodes}
    rows = _order_rows(g, rows, size)
    x = _centres(rows, size)
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


def _figure(width, height):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    return fig


def _renderer(fig):
    """The renderer that measures text on ``fig`` (Agg canvases have one;
    other backends build one on request)."""
    get = getattr(fig.canvas, "get_renderer", None)
    return get() if get is not None else fig._get_renderer()


def _axes_inches(ax):
    """Width and height of an Axes, in inches."""
    box = ax.get_position()
    return box.width * ax.figure.get_figwidth(), box.height * ax.figure.get_figheight()


def _check_axes(ax):
    if ax is not None and not hasattr(ax, "add_patch"):
        raise InputError(f"ax= takes one matplotlib Axes; got {ax!r}", place="ax",
                         fix="pass an Axes, e.g. from fig, ax = matplotlib.pyplot.subplots()")


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
