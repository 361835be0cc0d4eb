"""The JSON form of scores and designs, and the plain-text tables the CLI
prints. Non-finite numbers never reach JSON: an infinite SNR or rate (a
noiseless channel) is written as ``null``."""

from __future__ import annotations

import json
import math

import numpy as np

from hierarchy.io import atomic_write_text

__all__ = [
    "RESULT_FORMAT", "RESULT_VERSION", "through_gain", "scores_to_dict", "physical_text",
    "result_to_dict", "write_json", "fmt", "table", "scores_text", "budget_terms", "result_text",
    "floor_text", "EXPLAIN_HINT", "EXPLANATIONS", "explain_text",
]

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


def _source(spec) -> dict | None:
    """The spec file's text, so that a result (and its report) says exactly
    what made it; ``None`` for a spec not read from a file that still exists."""
    import hashlib

    if not spec.path:
        return None
    try:
        with open(spec.path, encoding="utf-8") as fh:
            text = fh.read()
    except (OSError, UnicodeDecodeError):
        return None
    return {"path": str(spec.path), "sha256": hashlib.sha256(text.encode("utf-8")).hexdigest(), "text": text}


def scores_to_dict(spec, scores, gains=None) -> dict:
    """JSON-ready dict of exact :class:`~hierarchy.loop.evaluate.Scores`."""
    from hierarchy import __version__
    from hierarchy.graph import build_graph

    budgeted = {lid for b in spec.budgets for lid in b.links}
    d = scores.to_dict()
    d = {"format": RESULT_FORMAT, "version": RESULT_VERSION, "spec": spec.name,
         "tool": f"hierarchy {__version__}", **d}
    source = _source(spec)
    if source is not None:
        d["source"] = source
    level = {n: lv for n, lv in build_graph(spec).nodes(data="level")}
    for lid, row in d["links"].items():
        link = spec.link(lid)
        # docs/model.md: a link's power is pinned down only when it is priced or budgeted.
        row["identifiable"] = bool(link.price > 0 or lid in budgeted)
        row["delay"] = link.delay
        if gains is not None:
            row["through_gain"] = through_gain(spec, gains, link)
    if spec.units is not None:
        _add_physical(d, spec.units)
    for name, row in d["areas"].items():
        row["relay"] = not spec.area(name).has_target
        # Where drawings place the area (spec `level:` or the default rule).
        row["level"] = level.get(name)
    return _clean(d)


def _add_physical(d: dict, units) -> None:
    """Physical rates beside the model's numbers: per link under
    ``physical`` and their sums under ``physical_total`` (docs/spec.md, units)."""
    from hierarchy.spec.units import describe, physical

    d["units"] = {**units.to_dict(), "assumes": describe(units)}
    total = {"bits_per_second": 0.0, "events_per_second": 0.0, "watts": 0.0}
    for row in d["links"].values():
        row["physical"] = physical(units, row["power"], row["bits"])
        for key in total:
            total[key] += row["physical"][key]
    d["physical_total"] = total


def physical_text(spec, scores) -> str:
    """The physical-units table of a spec with a ``units:`` section."""
    from hierarchy.spec.units import describe, physical

    u = spec.units
    rows = []
    total = [0.0, 0.0, 0.0]
    for l in spec.links:
        s = scores.links[l.id]
        r = physical(u, s.power, s.bits)
        vals = [r["bits_per_second"], r["events_per_second"], r["watts"]]
        total = [t + v for t, v in zip(total, vals)]
        rows.append([l.id, fmt(s.power), fmt(s.bits)] + [fmt(v) for v in vals])
    rows.append(["all links", "", ""] + [fmt(v) for v in total])
    return (table(["link", "power", "bits/step", "bits/s", f"{u.event}/s", "energy (W)"], rows)
            + f"\nphysical units: {describe(u)}")


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
                   "links": list(b.links), "met": b.met,
                   "costs": {lid: w for lid, w in b.costs.items() if w != 1},
                   "activity": dict(b.activity), "cap_of": b.cap_of}
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
            name: (b.costs.get(lid, 1.0) * result.scores.links[lid].power / b.total if b.total > 0 else None)
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
    if result.floor is not None:
        f = result.floor.to_dict()
        ok = result.floor.ok
        f["gap"] = result.objective - result.floor.objective if ok else None
        f["relative_gap"] = result.gap if ok else None
        d["floor"] = f
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
    delays = any(l.delay > 1 for l in spec.links)  # the column only where some link has one
    for l in spec.links:
        s = scores.links[l.id]
        in_budgets = [b.name for b in spec.budgets if l.id in b.links]
        # A budgeted link pays through its budget, not a price: say which.
        price = fmt(s.price) if s.price or not in_budgets else "budget " + ",".join(in_budgets)
        row = [l.id, l.kind] + ([l.delay] if delays else []) + [fmt(s.power), fmt(s.snr), fmt(s.bits), price]
        if result is not None:
            shares = [f"{b.name}:{100 * s.power / b.total:.1f}%" for b in result.budgets.values()
                      if l.id in b.links and b.total > 0]
            row.append(" ".join(shares) or "-")
            row.append(fmt(through_gain(spec, gains, l), 3))
            row.append("silent" if l.id in result.silent else "")
        link_rows.append(row)
    header = ["link", "kind"] + (["delay"] if delays else []) + ["power", "SNR", "bits/step", "price"]
    if result is not None:
        header += ["budget share", "through gain", "note"]
    out.append(table(header, link_rows))
    if spec.units is not None:
        out.append(physical_text(spec, scores))
    if spec.budgets and result is None:
        from hierarchy.design.allocation import constraints

        rows = []
        cons = constraints(spec)
        spent = cons.used([scores.links[l.id].power for l in spec.links],
                          [scores.areas[a.name].activity for a in spec.areas])
        for name, total, used in zip(cons.names, cons.totals, spent):
            rows.append([name, fmt(total), fmt(used), "yes" if used <= total * (1 + 1e-6) else "NO (over)"])
        out.append(table(["budget", "total", "used by these gains", "within"], rows))
    out.append(
        f"objective {fmt(scores.objective, 6)} = weighted error {fmt(scores.weighted_error, 6)}"
        f" + energy {fmt(scores.energy_cost, 6)} + activity {fmt(scores.activity_cost, 6)}"
    )
    out.append(f"closed loop: spectral radius {fmt(scores.radius, 6)} (stability margin {fmt(scores.margin, 4)})")
    if result is None:  # result_text puts the hint after its own tables
        out.append(EXPLAIN_HINT)
    return "\n\n".join(out)


def budget_terms(row: dict) -> str:
    """What a budget row of a result counts beyond plain link powers: cost
    weights, areas' activity, or the link it caps."""
    if row.get("cap_of"):
        return f"cap on {row['cap_of']}"
    parts = [f"{lid} x{w:g}" for lid, w in (row.get("costs") or {}).items() if w != 1]
    parts += [f"activity {a}" + (f" x{w:g}" if w != 1 else "") for a, w in (row.get("activity") or {}).items()]
    return ", ".join(parts) or "powers"


def result_text(result) -> str:
    """The full report of a design."""
    spec = result.spec
    parts = [f"design of '{spec.name}' ({result.form} form)"]
    parts.append(scores_text(spec, result.scores, result.gains, result))
    if result.budgets:
        rows = [[b.name, fmt(b.total), fmt(b.used), f"{100 * b.used / b.total:.2f}%" if b.total else "-",
                 fmt(b.shadow_price), "yes" if b.met else "NO",
                 budget_terms({"cap_of": b.cap_of, "costs": b.costs, "activity": b.activity})]
                for b in result.budgets.values()]
        parts.append(table(["budget", "total", "used", "use", "shadow price", "met", "terms"], rows))
    for verdict, head in (("switched off", "switched off by a zero budget:"),
                          ("not worth sending", "not worth sending (checked at this design):"),
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
    # The message speaks of the run that ended the design; the counts are
    # totals over every start, so say so (they would seem to disagree).
    parts.append(f"solver: {verdict}{agree}: {result.message} (in the run that ended the design); in all "
                 f"{_count(result.iterations, 'iteration')} over {_count(result.restarts, 'start')}, "
                 f"{_count(result.evaluations, 'evaluation')}, {result.seconds:.2f} s")
    if result.floor is not None:
        parts.append(floor_text(result))
    parts.append(EXPLAIN_HINT)
    return "\n\n".join(parts)


def floor_text(result) -> str:
    """The information floor beside a design: the bound, the gap and why
    the bound may sit below the best circuit."""
    f = result.floor
    if not f.ok:
        return f"information floor: {f.status} ({f.message})"
    line = (f"information floor: no circuit of this spec can reach an objective below {fmt(f.objective, 6)}; "
            f"this design is {fmt(result.objective - f.objective, 4)} ({100 * result.gap:.2f}%) above it, "
            f"at most what any better design could gain")
    if f.loose:
        line += "\n  the bound may be loose: " + "; ".join(f.loose)
    return line


def _count(n, word) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


# -- what the words mean ---------------------------------------------------

#: Printed under the tables of `evaluate` and `design`.
EXPLAIN_HINT = "(every column is explained by `hierarchy explain`; one word: `hierarchy explain power`)"

#: (table, column, meaning): every column the text tables print, and the
#: words of `hierarchy check`. Powers, errors and noise powers are in the
#: model's own units: squared units of the signals as the spec writes them.
EXPLANATIONS = (
    ("areas", "area", "the area's name"),
    ("areas", "tracks", "the world blocks whose (lagged) state the area estimates; 'relay' when it tracks nothing"),
    ("areas", "lag", "how many steps back the estimate looks: 0 the present, 1 the previous step, more smooths"),
    ("areas", "error", "E||e||^2, the stationary mean squared error of the area's estimate of its target "
                       "(model units squared)"),
    ("areas", "err/prior", "error divided by the prior: the variance of the target itself, which is the error "
                           "of an area that knows nothing; 1 means no better than guessing the mean"),
    ("areas", "activity", "E||z||^2, the mean squared size of the area's whole state"),
    ("links", "link", "the link's id, FROM->TO"),
    ("links", "kind", "prediction (top-down, sends G z) or residual (bottom-up, sends S u - P p~)"),
    ("links", "delay", "the link's conduction delay in steps: its receiver uses at t+1 what was sent at "
                       "t - delay + 1 (shown only when some link has a delay above 1)"),
    ("links", "power", "E||s||^2, the mean squared size of what the link sends per step, before its channel adds "
                       "noise (model units squared); this is what prices and budgets charge for"),
    ("links", "SNR", "power divided by the channel's noise power: how loud the link is above its noise"),
    ("links", "bits/step", "the information the link carries per step, 1/2 log2 det(I + N^-1 Cov s), "
                           "for Gaussian signals over its noisy channel"),
    ("links", "price", "what one unit of power costs in the objective; a link paid through a budget shows "
                       "'budget NAME' instead (its effective price is that budget's shadow price)"),
    ("links", "budget share", "the link's power as a percentage of each budget it belongs to"),
    ("links", "through gain", "the size of what the link passes on, ||K S|| (residual) or ||K G|| (prediction), "
                              "Frobenius norm: sender times receiver, free of the scaling gauge (a signal can be "
                              "sent louder and received softer with nothing changed)"),
    ("links", "note", "'silent' when the link sends nothing at this design; below the tables, whether it was "
                      "checked not worth sending or left untested, and why (docs/search.md says what each promises)"),
    ("physical", "bits/s", "the link's bits per step divided by the step's duration (spec `units: step`)"),
    ("physical", "EVENT/s", "events per second (spikes, bits, ...): bits/s divided by the bits one event carries "
                            "(map bits), or power divided by the power of one event per step (map power)"),
    ("physical", "energy (W)", "joules per second: events per second times the energy of one event; the presets' "
                               "numbers and their sources are in hierarchy/units.py and docs/spec.md"),
    ("budgets", "budget", "the budget group's name"),
    ("budgets", "total", "the most power the group's links may send together"),
    ("budgets", "used", "what they spend at this design: each link's power times its cost weight, plus the "
                        "weighted activity of the budget's areas"),
    ("budgets", "terms", "what the budget counts beyond plain powers: cost weights other than 1, areas' "
                         "activity, or (a cap row) the one link it caps"),
    ("budgets", "use", "used as a percentage of total"),
    ("budgets", "shadow price", "how much the objective would fall per unit of extra budget (the Lagrange "
                                "multiplier); 0 when the budget does not bind"),
    ("budgets", "met", "whether used is within total (to 1e-6 relative)"),
    ("totals", "objective", "weighted error + energy (price times power, summed over priced links) + activity "
                            "(activity price times activity); budgets limit power instead of pricing it"),
    ("totals", "spectral radius", "the largest modulus of the closed loop's eigenvalues; below 1 means stable"),
    ("totals", "stability margin", "1 - spectral radius: how far the loop is from instability"),
    ("check", "noise power", "tr N, the trace of a channel's noise covariance: the noise's mean squared size per "
                             "step, in the same units as power"),
    ("check", "level", "where drawings place a node: sensors 0; an area its spec's `level:`, else one above the "
                       "lowest node that sends it a residual"),
)


def explain_text(word=None) -> str:
    """What the columns of the text tables mean, all of them or one.

    Parameters
    ----------
    word : str, optional
        A column name (any case); ``None`` explains every column.

    Raises
    ------
    InputError
        For a word no table prints, with the words that exist.

    Examples
    --------
    >>> print(explain_text("snr"))
    links table, SNR: power divided by the channel's noise power: how loud the link is above its noise
    """
    from hierarchy.errors import InputError

    if word is None:
        out, table_name = [], None
        for tab, col, meaning in EXPLANATIONS:
            if tab != table_name:
                out.append(("" if table_name is None else "\n") + f"{tab}:")
                table_name = tab
            out.append(f"  {col}: {meaning}")
        return "\n".join(out)
    key = " ".join(str(word).lower().split())
    rows = [r for r in EXPLANATIONS if r[1].lower() == key]
    if not rows:
        import difflib

        words = sorted({c for _, c, _ in EXPLANATIONS}, key=str.lower)
        near = difflib.get_close_matches(key, [w.lower() for w in words], n=1)
        hint = f" (did you mean `{near[0]}`?)" if near else ""
        raise InputError(f"no table has a column `{word}`{hint}", place="explain",
                         fix="choose one of: " + ", ".join(words))
    return "\n".join(f"{tab} table, {col}: {meaning}" for tab, col, meaning in rows)
