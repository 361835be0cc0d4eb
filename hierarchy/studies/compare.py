"""Comparisons of architectures over a range of budgets.
"""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

from hierarchy.spec import rules
from hierarchy.errors import InputError
from hierarchy.spec.model import Spec
from hierarchy.studies.paths import set_value
from hierarchy.studies.runner import _opts, _Point, _point_key
from hierarchy.studies.tables import Study, _spec_info, output_base
from hierarchy.studies.walk import _run_study

__all__ = ['TIE_RTOL', 'varied_budget', 'best_ranges', 'scale_prices', 'compare']


#: Objectives closer than this (relative) are a tie in a comparison.
TIE_RTOL = 1e-5


def varied_budget(spec: Spec, label: str) -> str:
    """The budget a comparison sets: the one named ``total``, else the only one."""
    names = [b.name for b in spec.budgets]
    if "total" in names:
        return "total"
    if len(names) == 1:
        return names[0]
    raise InputError(
        "a comparison sets one budget of each spec to each total, and this spec has "
        + ("no budget" if not names else f"{len(names)} budgets ({', '.join(names)}) and none is named `total`"),
        place=label, fix="add a budget over the links to compare (e.g. `{name: total, links: all, total: 1}`)"
        if not names else "name the budget to vary `total`")


def _labels(specs) -> list:
    labels = [Path(s.path).stem if s.path else s.name for s in specs]
    if len(set(labels)) < len(labels):
        labels = [f"{i + 1}:{lab}" for i, lab in enumerate(labels)]
    return labels


def _targets(spec: Spec) -> set:
    return {(a.name, a.tracks, a.weight, a.lag) for a in spec.areas if a.has_target and a.weight > 0}


def best_ranges(totals, labels, objectives, converged, tie_rtol=TIE_RTOL) -> list:
    """Which spec is best over which range of totals, and by how much.

    ``objectives[label][i]`` is the objective at ``totals[i]`` (``None`` if
    the design failed). Within ``tie_rtol`` (relative) the best ones tie.
    Each range is ``{"best", "from", "to", "points", "margin_min",
    "margin_max", "relative_min", "relative_max", "all_converged"}``, where a
    margin is the runner-up's objective minus the best one's, and relative
    is that margin over the runner-up's objective.
    """
    per_point = []
    for i, total in enumerate(totals):
        vals = sorted((objectives[lab][i], lab) for lab in labels
                      if objectives[lab][i] is not None and math.isfinite(objectives[lab][i]))
        if not vals:
            per_point.append(("none", None, None, False))
            continue
        best = vals[0][0]
        tol = tie_rtol * max(abs(best), 1e-300)
        tied = [lab for v, lab in vals if v - best <= tol]
        rest = [v for v, lab in vals if v - best > tol]
        winner = tied[0] if len(tied) == 1 else "tie: " + ", ".join(sorted(tied))
        margin = (rest[0] - best) if rest else None
        rel = margin / abs(rest[0]) if rest and rest[0] else None
        ok = all(converged[lab][i] for lab in labels)
        per_point.append((winner, margin, rel, ok))
    out = []
    for i, (winner, margin, rel, ok) in enumerate(per_point):
        if out and out[-1]["best"] == winner:
            r = out[-1]
            r["to"], r["points"] = totals[i], r["points"] + 1
            r["_m"].append(margin), r["_r"].append(rel)
            r["all_converged"] = r["all_converged"] and ok
        else:
            out.append({"best": winner, "from": totals[i], "to": totals[i], "points": 1, "_m": [margin],
                        "_r": [rel], "all_converged": ok})
    for r in out:
        m, rr = [v for v in r.pop("_m") if v is not None], [v for v in r.pop("_r") if v is not None]
        r.update({"margin_min": min(m) if m else None, "margin_max": max(m) if m else None,
                  "relative_min": min(rr) if rr else None, "relative_max": max(rr) if rr else None})
    return out


def scale_prices(spec: Spec, factor) -> Spec:
    """``spec`` with every link's price multiplied by ``factor``, checked for
    well-posedness (a factor of 0 leaves noisy links free, which is refused).

    Examples
    --------
    >>> dear = scale_prices(spec, 10)                                # doctest: +SKIP
    """
    f = float(factor)
    if not (math.isfinite(f) and f >= 0):
        raise InputError(f"a price scale must be a finite number of at least 0; got {f:g}", place="--prices",
                         fix="keep the range at or above 0")
    out = replace(spec, links=tuple(replace(l, price=l.price * f) for l in spec.links))
    rules.check_spec(out, place=f"every link price x {f:g}", error=InputError)
    return out


def _priced(spec: Spec, label: str) -> list:
    ids = [l.id for l in spec.links if l.price > 0]
    if not ids:
        raise InputError("a comparison over prices scales every link price, and no link of this spec has a price",
                         place=label, fix="give the links prices, or compare over --budgets")
    return ids


def compare(specs, totals=None, options=None, *, log=False, output=None, workers=None, dask=None, warm=True,
            progress=False, fresh=False, tie_rtol=TIE_RTOL, labels=None, prices=None) -> Study:
    """Design each spec at every total budget, or at every scale of its prices.

    Budget form (``totals``): each spec must have a budget named ``total``, or
    exactly one budget; that budget is set to each value of ``totals`` (its
    other budgets and prices stay as written). The energy of a design is that
    budget's power used.

    Price form (``prices``, instead of ``totals``): at each value ``f`` every
    link price of every spec is multiplied by ``f`` (budgets stay as
    written). The energy of a design is the power of its priced links.

    Either way the error is the weighted error, and the best spec at a point
    is the one with the lowest objective (weighted error plus the priced
    terms). A spec that contains another (the same circuit plus links it may
    silence) is designed from the other's design wherever it came out worse,
    so it never loses to it.

    Returns
    -------
    Study
        Rows carry ``spec`` (a label: the file's stem), ``budget`` (the
        total) or ``price_scale`` (the factor), and ``energy_used``.
        ``extra["best"]`` is the list of :func:`best_ranges`;
        ``extra["form"]`` is ``"budget"`` or ``"price"``; ``extra["budgets"]``
        the budget varied per spec (budget form); ``extra["warnings"]`` notes
        specs that weigh different errors.

    Examples
    --------
    >>> st = compare([flat, predictive], grid(0.1, 10, 8, log=True), log=True)   # doctest: +SKIP
    >>> st = compare([flat, predictive], prices=grid(0.1, 10, 8, log=True))      # doctest: +SKIP
    >>> st.extra["best"]                                                        # doctest: +SKIP
    """
    opts = _opts(options)
    specs = list(specs)
    if len(specs) < 1:
        raise InputError("nothing to compare", place="specs", fix="give two or more spec files")
    if (totals is None) == (prices is None):
        raise InputError("a comparison runs over budgets or over prices, one of the two", place="--budgets/--prices",
                         fix="give either --budgets LO:HI:N or --prices LO:HI:N")
    form = "budget" if prices is None else "price"
    coord, option = ("budget", "--budgets") if form == "budget" else ("price_scale", "--prices")
    labels = list(labels) if labels is not None else _labels(specs)
    values = [float(t) for t in (totals if form == "budget" else prices)]
    if not values:
        raise InputError(f"the {'budget' if form == 'budget' else 'price'} range is empty", place=option,
                         fix="give at least one value")
    if form == "budget":
        budgets = {lab: varied_budget(s, lab) for lab, s in zip(labels, specs)}
        energy = {lab: [f"budgets[{budgets[lab]}].used"] for lab in labels}
    else:
        budgets = {}
        energy = {lab: [f"links[{lid}].power" for lid in _priced(s, lab)] for lab, s in zip(labels, specs)}
    warnings = []
    if len({frozenset(_targets(s)) for s in specs}) > 1:
        warnings.append("the specs do not weigh the same errors (areas, targets, weights or lags differ), "
                        "so their errors measure different things")
    chains, n = [], len(values)
    for k, (lab, s) in enumerate(zip(labels, specs)):
        chain = []
        for i, t in enumerate(values):
            ms = set_value(s, f"budgets[{budgets[lab]}].total", t) if form == "budget" else scale_prices(s, t)
            coords = {"spec": lab, coord: t}
            chain.append(_Point(k * n + i, ms, coords, _point_key(ms, coords, opts, warm)))
        chains.append(chain)
    from hierarchy.design.subcircuit import contains

    nested = [(kb * n + i, ks * n + i) for kb, big in enumerate(specs) for ks, small in enumerate(specs)
              if kb != ks and contains(big, small) and not contains(small, big) for i in range(n)]
    study = _run_study("compare", chains, opts, [_spec_info(s, lab) for lab, s in zip(labels, specs)],
                       [{"path": coord, "values": values, "scale": "log" if log else "linear"}],
                       ["spec", coord, "energy_used"], specs, output=output, workers=workers, dask=dask,
                       warm=warm, progress=progress, fresh=fresh, nested=nested)
    for r in study.rows:
        parts = [r.get(c) for c in energy[r["spec"]]]
        r["energy_used"] = None if any(v is None for v in parts) else float(sum(parts))
    objectives = {lab: [study.rows[k * n + i].get("objective") for i in range(n)] for k, lab in enumerate(labels)}
    conv = {lab: [bool(study.rows[k * n + i].get("converged")) for i in range(n)] for k, lab in enumerate(labels)}
    study.extra.update({"labels": labels, "form": form, "budgets": budgets, "warnings": warnings,
                        "best": best_ranges(values, labels, objectives, conv, tie_rtol), "tie_rtol": tie_rtol})
    if output is not None:
        study.write(output_base(output))
    return study
