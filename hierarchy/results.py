"""The JSON form of scores and designs, and the plain-text tables the CLI
prints. Non-finite numbers never reach JSON: an infinite SNR or rate (a
noiseless channel) is written as ``null``."""

from __future__ import annotations

import json
import math

import numpy as np

from .io import atomic_write_text

RESULT_FORMAT = "hierarchy-result"
RESULT_VERSION = 1


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _clean(obj):
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, (float, np.floating)):
        return _num(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    return obj


def through_gain(spec, gains, link) -> float:
    """Size of what a link passes on, free of the link's own gauge: the
    Frobenius norm of receiver times sender (``K S`` or ``K G``); for a
    prediction into a sensor, of ``P G`` in the residual that subtracts it."""
    blocks = gains.links[link.id]
    if link.kind == "prediction":
        if "K" in blocks:
            return float(np.linalg.norm(blocks["K"] @ blocks["G"]))
        back = gains.links.get(f"{link.target}->{link.source}", {})
        if "P" in back:
            return float(np.linalg.norm(back["P"] @ blocks["G"]))
        return float(np.linalg.norm(blocks["G"]))
    return float(np.linalg.norm(blocks["K"] @ blocks["S"]))


def scores_to_dict(spec, scores, gains=None) -> dict:
    """JSON-ready dict of exact :class:`~hierarchy.evaluate.Scores`."""
    budgeted = {lid for b in spec.budgets for lid in b.links}
    d = scores.to_dict()
    d = {"format": RESULT_FORMAT, "version": RESULT_VERSION, "spec": spec.name, **d}
    for lid, row in d["links"].items():
        link = spec.link(lid)
        # model.md: a link's power is pinned down only when it is priced or budgeted.
        row["identifiable"] = bool(link.price > 0 or lid in budgeted)
        if gains is not None:
            row["through_gain"] = through_gain(spec, gains, link)
    for name, row in d["areas"].items():
        row["relay"] = not spec.area(name).has_target
    return _clean(d)


def result_to_dict(result) -> dict:
    """JSON-ready dict of a :class:`~hierarchy.design.DesignResult` (schema in
    docs/results.md)."""
    spec = result.spec
    d = scores_to_dict(spec, result.scores, result.gains)
    d.update({
        "form": result.form,
        "status": result.status,
        "message": result.message,
        "objective": result.objective,
        "solver": {
            "iterations": result.iterations,
            "restarts": result.restarts,
            "evaluations": result.evaluations,
            "seconds": result.seconds,
            "grad_norm": result.grad_norm,
            "searches": list(result.searches),
            "agreement": list(result.agreement),
        },
        "budgets": {
            name: {"total": b.total, "used": b.used, "shadow_price": b.shadow_price,
                   "links": list(b.links), "met": b.met}
            for name, b in result.budgets.items()
        },
    })
    for lid, row in d["links"].items():
        row["silent"] = lid in result.silent
        info = result.silent.get(lid, {})
        row["silent_reason"] = info.get("reason")
        row["silent_verdict"] = info.get("verdict")
        row["silent_stream"] = info.get("stream")
        row["share_of_budget"] = {
            name: (result.scores.links[lid].power / b.total if b.total > 0 else None)
            for name, b in result.budgets.items() if lid in b.links
        }
    if result.reference is not None:
        ref = result.reference
        d["reference"] = {
            "what": "the same circuit with every gain free",
            "objective": ref.objective,
            "status": ref.status,
            "gap": result.objective - ref.objective,
            "relative_gap": (result.objective - ref.objective) / abs(ref.objective) if ref.objective else None,
        }
    d["gains"] = result.gains.to_dict()
    return _clean(d)


def write_json(path, data: dict) -> None:
    """Write ``data`` as JSON atomically (no NaN or infinity in the file)."""
    atomic_write_text(path, json.dumps(_clean(data), indent=1, allow_nan=False) + "\n")


# -- text tables -----------------------------------------------------------


def fmt(x, digits=4) -> str:
    if x is None:
        return "-"
    x = float(x)
    if math.isinf(x):
        return "inf"
    if math.isnan(x):
        return "-"
    if x == 0:
        return "0"
    if 1e-3 <= abs(x) < 1e5:
        return f"{x:.{digits}g}"
    return f"{x:.{max(digits - 2, 1)}e}"


def table(header, rows) -> str:
    """A plain left/right aligned text table."""
    cells = [list(map(str, header))] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = []
    for j, r in enumerate(cells):
        lines.append("  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths))))
        if j == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


def scores_text(spec, scores, gains=None, result=None) -> str:
    """Human-readable tables of areas, links and totals."""
    out = []
    area_rows = []
    for a in spec.areas:
        s = scores.areas[a.name]
        area_rows.append([a.name, "relay" if not a.has_target else "+".join(a.tracks), a.lag,
                          fmt(s.error), fmt(s.relative), fmt(s.activity)])
    out.append(table(["area", "tracks", "lag", "error", "err/prior", "activity"], area_rows))
    link_rows = []
    for l in spec.links:
        s = scores.links[l.id]
        row = [l.id, l.kind, fmt(s.power), fmt(s.snr), fmt(s.bits), fmt(s.price)]
        if result is not None:
            shares = [f"{b.name}:{100 * s.power / b.total:.1f}%" for b in result.budgets.values()
                      if l.id in b.links and b.total > 0]
            row.append(" ".join(shares) or "-")
            row.append(fmt(through_gain(spec, gains, l), 3))
            row.append("silent" if l.id in result.silent else "")
        link_rows.append(row)
    header = ["link", "kind", "power", "SNR", "bits/step", "price"]
    if result is not None:
        header += ["budget share", "gain", "note"]
    out.append(table(header, link_rows))
    if spec.budgets and result is None:
        rows = []
        for b in spec.budgets:
            used = sum(scores.links[lid].power for lid in b.links)
            rows.append([b.name, fmt(b.total), fmt(used), "yes" if used <= b.total * (1 + 1e-6) else "NO (over)"])
        out.append(table(["budget", "total", "used by these gains", "within"], rows))
    out.append(
        f"objective {fmt(scores.objective, 6)} = weighted error {fmt(scores.weighted_error, 6)}"
        f" + energy {fmt(scores.energy_cost, 6)} + activity {fmt(scores.activity_cost, 6)}"
    )
    out.append(f"closed loop: spectral radius {fmt(scores.radius, 6)} (stability margin {fmt(scores.margin, 4)})")
    return "\n\n".join(out)


def result_text(result) -> str:
    """The full report of a design."""
    spec = result.spec
    parts = [f"design of '{spec.name}' ({result.form} form)"]
    parts.append(scores_text(spec, result.scores, result.gains, result))
    if result.budgets:
        rows = [[b.name, fmt(b.total), fmt(b.used), f"{100 * b.used / b.total:.2f}%" if b.total else "-",
                 fmt(b.shadow_price), "yes" if b.met else "NO"] for b in result.budgets.values()]
        parts.append(table(["budget", "total", "used", "use", "shadow price", "met"], rows))
    for verdict, head in (("not worth sending", "not worth sending (checked at this design):"),
                          ("untested", "silent, but not checked at this design:")):
        rows = [f"  {lid}: {info['reason']}" for lid, info in result.silent.items() if info.get("verdict") == verdict]
        if rows:
            parts.append(head + "\n" + "\n".join(rows))
    if result.reference is not None:
        ref = result.reference
        gap = result.objective - ref.objective
        parts.append(f"pinned gains vs all gains free: objective {fmt(result.objective, 6)} vs "
                     f"{fmt(ref.objective, 6)} (gap {fmt(gap, 4)}, "
                     f"{fmt(100 * gap / abs(ref.objective) if ref.objective else None, 3)}%; free design {ref.status})")
    verdict = {"converged": "converged to a stationary point (a local optimum)",
               "iteration limit": "NOT converged (iteration limit)",
               "failed": "FAILED"}.get(result.status, result.status)
    k, n = result.agreement
    agree = (f"; {k} of {n} searches reached it" if n > 1 else "") + (
        f" ({', '.join(s['search'] + ' ' + fmt(s['objective'], 6) for s in result.searches)})" if k < n else "")
    parts.append(f"solver: {verdict}{agree}: {result.message}; {result.iterations} iterations, "
                 f"{result.restarts} starts, {result.evaluations} evaluations, {result.seconds:.2f} s")
    return "\n\n".join(parts)
