"""One self-contained HTML page about a design: ``hierarchy report``.

The page carries everything inline (the drawing as an embedded PNG, styles,
no scripts, no links to fetch), so it can be mailed or archived as one file
and opened offline. It shows the design's status and objective, the
information-theoretic floor and the gap to it when the result has one
(key ``floor``), the drawing, the area, link and budget tables with a legend
of their columns (the words of :data:`hierarchy.report.results.EXPLANATIONS`), why
each silent link is silent, the spec text that made the design (recorded in
the result by ``hierarchy design --json``) and the tool versions.

Examples
--------
>>> from hierarchy.report.page import report_html
>>> page = report_html(read_result("design.json"))     # doctest: +SKIP
>>> page.startswith("<!DOCTYPE html>")                  # doctest: +SKIP
True
"""

from __future__ import annotations

import base64
import html
import os

from hierarchy.errors import InputError
from hierarchy.spec.model import PREDICTION

__all__ = ["report_html", "save_report", "check_report_path"]

_STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 70em; color: #222; padding: 0 1em; }
h1 { font-size: 1.5em; } h2 { font-size: 1.2em; margin-top: 2em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.5em 0; }
th, td { padding: 0.2em 0.7em; border-bottom: 1px solid #e4e4e4; text-align: right; }
th:first-child, td:first-child { text-align: left; }
th { background: #f2f2f2; }
.residual { color: #0072B2; } .prediction { color: #D55E00; } .silent { color: #777; }
.status-bad { color: #b00; font-weight: bold; }
dl.legend dt { font-weight: bold; float: left; clear: left; width: 9em; }
dl.legend dd { margin-left: 10em; margin-bottom: 0.2em; }
pre { background: #f7f7f7; padding: 0.8em; overflow-x: auto; font-size: 0.85em; }
img { max-width: 100%; height: auto; border: 1px solid #ddd; }
.note { color: #555; font-size: 0.9em; }
"""


def check_report_path(path) -> str:
    """The report path, refused unless it ends in .html and its folder exists.

    Examples
    --------
    >>> check_report_path("report.html")
    'report.html'
    """
    path = os.fspath(path)
    if os.path.splitext(path)[1].lower() not in (".html", ".htm"):
        raise InputError("a report is an HTML page", place=path, fix="end the path with .html (e.g. report.html)")
    if not os.path.isdir(os.path.dirname(os.path.abspath(path))):
        raise InputError("the folder does not exist", place=path, fix="create the folder or choose another path")
    return path


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _num(x, digits=4) -> str:
    from hierarchy.report.results import fmt

    return fmt(x, digits)


def _table(header, rows, classes=None) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = []
    for k, r in enumerate(rows):
        cls = f' class="{classes[k]}"' if classes and classes[k] else ""
        body.append(f"<tr{cls}>" + "".join(f"<td>{_e(c)}</td>" for c in r) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _legend(table_name, columns) -> str:
    from hierarchy.report.results import EXPLANATIONS

    words = {(t, c): m for t, c, m in EXPLANATIONS}
    items = [f"<dt>{_e(c)}</dt><dd>{_e(words[(table_name, c)])}</dd>" for c in columns
             if (table_name, c) in words]
    return f'<dl class="legend">{"".join(items)}</dl>'


def _physical(data) -> str:
    """The links in the spec's physical units, when the result carries them."""
    units = data.get("units")
    if not isinstance(units, dict):
        return ""

    def number(v):  # a result file edited by hand may hold anything here
        return _num(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else "-"

    event = str(units.get("event") or "event")
    cols = ["link", "power", "bits/step", "bits/s", f"{event}/s", "energy (W)"]
    rows = []
    for lid, row in data["links"].items():
        phys = row.get("physical") if isinstance(row.get("physical"), dict) else {}
        rows.append([lid, number(row.get("power")), number(row.get("bits"))]
                    + [number(phys.get(k)) for k in ("bits_per_second", "events_per_second", "watts")])
    total = data.get("physical_total") if isinstance(data.get("physical_total"), dict) else {}
    rows.append(["all links", "", ""] + [number(total.get(k)) for k in ("bits_per_second", "events_per_second",
                                                                         "watts")])
    sources = "".join(f"<li>{_e(s)}</li>" for s in units.get("sources") or [] if isinstance(s, str))
    return ("<h2>Physical units</h2>"
            f"<p class=\"note\">{_e(units.get('assumes') or '')}. Prices and budgets stay in model units; "
            "these columns convert the design's numbers, they do not change it.</p>"
            + _table(cols, rows)
            + _legend("physical", ["bits/s", "EVENT/s", "energy (W)"])
            + (f"<p>Sources of the preset's numbers:</p><ul>{sources}</ul>" if sources else ""))


def _picture(data, spec) -> str:
    from hierarchy.report.plots import figure_bytes
    from hierarchy.report.drawing import draw

    png = figure_bytes(draw(data, spec=spec), "png", dpi=110)
    return ('<img alt="drawing of the designed circuit" src="data:image/png;base64,'
            + base64.b64encode(png).decode("ascii") + '">')


def _floor(data) -> str:
    floor = data.get("floor")
    if not isinstance(floor, dict):
        return ""
    rows = [["lower bound on the objective", _num(floor.get("objective"), 6)],
            ["design's objective", _num(data.get("objective"), 6)],
            ["gap (objective minus bound)", _num(floor.get("gap"), 4)],
            ["gap relative to the objective", _num(floor.get("relative_gap"), 4)],
            ["status of the bound", floor.get("status", "-")]]
    loose = floor.get("loose")
    if loose:
        rows.append(["why the bound may be loose",
                     loose if isinstance(loose, str) else "; ".join(str(x) for x in loose)])
    return ("<h2>How far from the best possible</h2>"
            "<p>An information-theoretic lower bound: no design of this circuit can have a smaller "
            "objective. The gap is at most what a better design could still gain.</p>"
            + _table(["", "value"], rows))


def report_html(data, spec=None) -> str:
    """The HTML page of a result (see the module docstring).

    Parameters
    ----------
    data : dict
        A result as written by ``hierarchy design --json`` (checked by
        :func:`hierarchy.report.drawing.read_result`), or a ``DesignResult``.
    spec : Spec, optional
        Only used to draw the graph; the result alone is enough.

    Returns
    -------
    str
        A complete HTML document with no outside references.
    """
    from hierarchy import __version__
    from hierarchy.report.drawing import _as_dict

    data, spec = _as_dict(data, spec)
    name = data.get("spec") or "circuit"
    status = data.get("status") or "exact scores (no design)"
    bad = status not in ("converged", "exact scores (no design)")
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{_e(name)}: design report"
             f"</title><style>{_STYLE}</style></head><body>",
             f"<h1>{_e(name)}</h1>"]
    summary = [["status", status + (f" ({data['form']} form)" if data.get("form") else "")],
               ["objective", _num(data.get("objective"), 6)],
               ["weighted error", _num(data.get("weighted_error"), 6)],
               ["energy", _num(data.get("energy_cost"), 6)],
               ["activity", _num(data.get("activity_cost"), 6)],
               ["spectral radius", _num(data.get("radius"), 6)]]
    if data.get("message"):
        summary.append(["solver's message", data["message"]])
    parts.append(_table(["", "value"], summary, ["status-bad" if bad else ""] + [""] * (len(summary) - 1)))
    if bad:
        parts.append('<p class="status-bad">This design did NOT converge: its numbers are those of the best '
                     "gains found, not of an optimum.</p>")
    parts.append(_floor(data))
    parts.append("<h2>The circuit</h2>" + _picture(data, spec))

    area_cols = ["area", "level", "error", "err/prior", "activity"]
    rows = [[a, row.get("level", "-") if row.get("level") is not None else "-",
             "relay" if row.get("relay") else _num(row.get("error")), _num(row.get("relative")),
             _num(row.get("activity"))] for a, row in data["areas"].items()]
    parts.append("<h2>Areas</h2>" + _table(area_cols, rows) + _legend("areas", area_cols)
                 + _legend("check", ["level"]))

    budgets = data.get("budgets") or {}
    in_budget = {lid: b for b, row in budgets.items() for lid in row.get("links", [])}
    delays = any((row.get("delay") or 1) > 1 for row in data["links"].values())
    link_cols = ["link", "kind"] + (["delay"] if delays else []) + [
        "power", "SNR", "bits/step", "price", "budget share", "through gain", "note"]
    rows, classes = [], []
    for lid, row in sorted(data["links"].items(), key=lambda kv: -float(kv[1]["power"])):
        shares = row.get("share_of_budget") or {}
        price = _num(row.get("price")) if row.get("price") or lid not in in_budget else f"budget {in_budget[lid]}"
        rows.append([lid, row["kind"]] + ([row.get("delay") or 1] if delays else []) + [
                     _num(row["power"]), _num(row.get("snr")), _num(row.get("bits")), price,
                     " ".join(f"{b}:{100 * s:.1f}%" for b, s in shares.items() if s is not None) or "-",
                     _num(row.get("through_gain"), 3), "silent" if row.get("silent") else ""])
        classes.append("silent" if row.get("silent") else ("prediction" if row["kind"] == PREDICTION
                                                            else "residual"))
    parts.append("<h2>Links</h2><p class=\"note\">Strongest first; blue residuals, vermillion predictions, "
                 "grey silent links, as in the drawing.</p>" + _table(link_cols, rows, classes)
                 + _legend("links", link_cols))
    parts.append(_physical(data))
    if budgets:
        from hierarchy.report.results import budget_terms

        cols = ["budget", "total", "used", "use", "shadow price", "met", "terms"]
        rows = [[b, _num(r.get("total")), _num(r.get("used")),
                 f"{100 * r['used'] / r['total']:.2f}%" if r.get("total") and r.get("used") is not None else "-",
                 _num(r.get("shadow_price")), "yes" if r.get("met") else "NO", budget_terms(r)]
                for b, r in budgets.items()]
        parts.append("<h2>Budgets</h2>" + _table(cols, rows) + _legend("budgets", cols))

    silent = {lid: row for lid, row in data["links"].items() if row.get("silent")}
    parts.append("<h2>Silent links</h2>")
    groups = (("switched off", "Switched off by a zero budget:"),
              ("not worth sending", "Checked at this design and not worth sending:"),
              ("untested", "Silent, but not checked at this design:"),
              (None, "Silent:"))
    for verdict, head in groups:
        rows = [(lid, row) for lid, row in silent.items()
                if row.get("silent_verdict") == verdict
                or verdict is None and row.get("silent_verdict") not in ("switched off", "not worth sending",
                                                                         "untested")]
        if rows:
            parts.append(f"<p>{_e(head)}</p><ul>" + "".join(
                f"<li><b>{_e(lid)}</b>: {_e(row.get('silent_reason') or 'no reason recorded')}</li>"
                for lid, row in rows) + "</ul>")
    if not silent:
        parts.append("<p>None: every link carries a signal at this design.</p>")

    parts.append("<h2>The spec that made it</h2>")
    source = data.get("source")
    if isinstance(source, dict) and isinstance(source.get("text"), str):
        parts.append(f"<p class=\"note\">{_e(source.get('path', ''))}, sha256 {_e(source.get('sha256', '-'))}</p>"
                     f"<pre>{_e(source['text'])}</pre>")
    else:
        parts.append("<p class=\"note\">This result does not record its spec's text (it was written by an "
                     "older version, or from a spec not read from a file).</p>")
    made_by = data.get("tool") or "an older hierarchy (not recorded)"
    parts.append(f"<h2>Versions</h2><p>result written by {_e(made_by)}; report written by hierarchy "
                 f"{_e(__version__)}. A research and engineering model, not medical advice.</p>")
    parts.append("</body></html>\n")
    return "".join(parts)


def save_report(data, path, spec=None) -> None:
    """Write :func:`report_html` to ``path`` atomically.

    Examples
    --------
    >>> save_report(read_result("design.json"), "report.html")   # doctest: +SKIP
    """
    from hierarchy.io import atomic_write_text

    check_report_path(path)
    atomic_write_text(path, report_html(data, spec))
