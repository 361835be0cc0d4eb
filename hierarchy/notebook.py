"""Results as notebook objects: pandas tables, xarray datasets, short reprs.

The methods :meth:`DesignResult.to_pandas
<hierarchy.design.DesignResult.to_pandas>`, :meth:`Study.to_pandas
<hierarchy.studies.Study.to_pandas>`, :meth:`Study.to_xarray
<hierarchy.studies.Study.to_xarray>` and the ``__repr__`` /
``_repr_html_`` of both classes are thin calls into this module. pandas and
xarray are imported inside the functions, so ``import hierarchy`` (and
``hierarchy check``) do not pay for them.

Every number in a table is the result's own number, unrounded: a table is a
view of the result, not a second computation.
"""

from __future__ import annotations

import html
import math
from dataclasses import asdict
from typing import NamedTuple

__all__ = ["DesignTables", "design_tables", "design_repr", "design_html", "study_frame", "study_dataset",
           "study_repr", "study_html"]


class DesignTables(NamedTuple):
    """The two tables of a design (see :func:`design_tables`).

    Attributes
    ----------
    areas : pandas.DataFrame
        One row per area, indexed by area name.
    links : pandas.DataFrame
        One row per link, indexed by link id.
    """

    areas: object
    links: object


def design_tables(result) -> DesignTables:
    """The areas and links of a design as two pandas DataFrames.

    Parameters
    ----------
    result : hierarchy.design.DesignResult

    Returns
    -------
    DesignTables
        ``areas`` (index ``area``): ``error``, ``prior``, ``relative``,
        ``activity``, ``weight``, ``lag`` (the exact scores), ``relay`` and
        ``level``. ``links`` (index ``link``): ``kind``, ``power``,
        ``noise_power``, ``snr``, ``bits``, ``price``, ``identifiable``,
        ``through_gain``, ``silent``, ``silent_verdict``, ``silent_reason``
        and one ``share[B]`` column per budget ``B`` (the link's share of
        that budget; missing where the link is outside it). Errors of relay
        areas are missing (NaN); an infinite SNR stays infinite.
    """
    import pandas as pd

    from hierarchy.report.results import result_to_dict

    d = result_to_dict(result)
    s = result.scores
    areas = []
    for name, a in s.areas.items():
        row = {"area": name, **asdict(a)}
        row["relay"] = d["areas"][name]["relay"]
        row["level"] = d["areas"][name]["level"]
        areas.append(row)
    links = []
    for lid, link in s.links.items():
        info = d["links"][lid]
        row = {"link": lid, **asdict(link), "identifiable": info["identifiable"],
               "through_gain": info.get("through_gain"), "silent": info["silent"],
               "silent_verdict": info["silent_verdict"], "silent_reason": info["silent_reason"]}
        for name, b in result.budgets.items():
            row[f"share[{name}]"] = (link.power / b.total if lid in b.links and b.total > 0 else None)
        links.append(row)
    area_frame = pd.DataFrame(areas).set_index("area") if areas else pd.DataFrame(index=pd.Index([], name="area"))
    link_frame = pd.DataFrame(links).set_index("link") if links else pd.DataFrame(index=pd.Index([], name="link"))
    for frame, col in ((area_frame, "error"), (area_frame, "prior"), (area_frame, "relative")):
        if col in frame:
            frame[col] = frame[col].astype(float)  # None (a relay) becomes NaN
    return DesignTables(area_frame, link_frame)


def _num(x) -> str:
    return "n/a" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.6g}"


def _html_table(title: str, rows) -> str:
    # Plain tags only: a notebook styles them, and the repr stays a few
    # hundred characters.
    cells = "".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(str(v))}</td></tr>" for k, v in rows)
    return f"<table><caption>{html.escape(title)}</caption>{cells}</table>"


def _design_facts(result) -> list:
    k, n = result.agreement
    return [("spec", result.spec.name), ("form", result.form), ("status", result.status),
            ("objective", _num(result.objective)), ("weighted error", _num(result.scores.weighted_error)),
            ("energy cost", _num(result.scores.energy_cost)), ("margin", _num(result.scores.margin)),
            ("areas / links", f"{len(result.scores.areas)} / {len(result.scores.links)}"),
            ("silent links", len(result.silent)), ("searches agreeing", f"{k}/{n}")]


def design_repr(result) -> str:
    """One line: the spec, form, status, objective and sizes of a design."""
    return (f"DesignResult(spec={result.spec.name!r}, form={result.form!r}, status={result.status!r}, "
            f"objective={_num(result.objective)}, areas={len(result.scores.areas)}, "
            f"links={len(result.scores.links)}, silent={len(result.silent)})")


def design_html(result) -> str:
    """A short HTML table of a design's headline numbers (for notebooks)."""
    return _html_table("DesignResult", _design_facts(result))


def _cell(v):
    # Lists (silent_links) become one string so every column is a flat value.
    return "; ".join(map(str, v)) if isinstance(v, (list, tuple)) else v


def study_frame(study):
    """A study's table as a pandas DataFrame: one row per point (in the
    study's order, so row ``i`` matches ``study.rows[i]`` and
    ``study.gains[i]``), one column per entry of ``study.columns``.

    Missing entries are ``None`` (NaN in numeric columns); ``silent_links``
    is kept as a list per row.
    """
    import pandas as pd

    frame = pd.DataFrame([{c: r.get(c) for c in study.columns} for r in study.rows], columns=study.columns)
    frame.index.name = "point"
    return frame


def _dims(study) -> list:
    """(name, coordinate values) of every dimension of a study, in the
    order its rows vary (slowest first)."""
    if study.kind == "compare":
        return [("spec", list(study.extra["labels"])), ("budget", list(study.axes[0]["values"]))]
    if study.kind == "phase":
        # Rows run over x fastest (row index = j * nx + i).
        x, y = study.axes
        return [(y["path"], list(y["values"])), (x["path"], list(x["values"]))]
    return [(a["path"], list(a["values"])) for a in study.axes]


def _array(values, shape):
    import numpy as np

    present = [v for v in values if v is not None]
    if present and all(isinstance(v, bool) for v in present) and len(present) == len(values):
        return np.array(values, dtype=bool).reshape(shape)
    if present and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in present):
        return np.array([np.nan if v is None else float(v) for v in values]).reshape(shape)
    return np.array([_cell(v) for v in values], dtype=object).reshape(shape)


def study_dataset(study):
    """A study as an xarray Dataset with one dimension per swept value.

    Dimensions: a sweep has one (its value path), a phase map two (the y path
    and the x path), a comparison two (``spec`` and ``budget``). Each
    dimension's coordinate holds the study's own values in the order they
    were given. Every other column of the table is a data variable over all
    dimensions: numbers as floats (NaN where missing), flags as booleans
    (objects where some point lacks them), text as objects and
    ``silent_links`` as one ``"; "``-joined string per point.
    """
    import xarray as xr

    dims = _dims(study)
    names = [n for n, _ in dims]
    shape = tuple(len(v) for _, v in dims)
    expected = math.prod(shape)
    if len(study.rows) != expected:
        raise ValueError(f"the study has {len(study.rows)} rows but its axes make {expected} points")
    coords = {n: v for n, v in dims}
    data = {c: (names, _array([r.get(c) for r in study.rows], shape)) for c in study.columns if c not in coords}
    return xr.Dataset(data, coords=coords, attrs={"kind": study.kind, "spec": study.specs[0]["name"]})


def _study_facts(study) -> list:
    facts = [("kind", study.kind), ("spec", ", ".join(s["label"] for s in study.specs))]
    for name, values in _dims(study):
        lo, hi = (values[0], values[-1]) if values else ("", "")
        facts.append((name, f"{len(values)} values, {lo} .. {hi}"))
    bad = sum(1 for r in study.rows if not r.get("converged"))
    facts += [("points", len(study.rows)), ("not converged", bad),
              ("computed / reused", f"{study.computed} / {study.reused}")]
    return facts


def study_repr(study) -> str:
    """One line: the kind, specs, dimensions and point count of a study."""
    dims = ", ".join(f"{n}: {len(v)}" for n, v in _dims(study))
    bad = sum(1 for r in study.rows if not r.get("converged"))
    return (f"Study(kind={study.kind!r}, spec={study.specs[0]['name']!r}, dims={{{dims}}}, "
            f"points={len(study.rows)}, not_converged={bad})")


def study_html(study) -> str:
    """A short HTML table of what a study covered (for notebooks)."""
    return _html_table("Study", _study_facts(study))
