"""A study as terminal text.
"""

from __future__ import annotations

from hierarchy.studies.tables import Study

__all__ = ['study_text']


def study_text(study: Study, show=None) -> str:
    """A plain-text summary of a study for the terminal."""
    from hierarchy.report.results import fmt, table

    parts = []
    axes = [a["path"] for a in study.axes]
    if study.kind == "compare":
        by_price = study.extra.get("form") == "price"
        coord = "price_scale" if by_price else "budget"
        for lab in study.extra["labels"]:
            rows = [r for r in study.rows if r["spec"] == lab]
            what = "every link price x scale" if by_price else f"budget `{study.extra['budgets'][lab]}`"
            parts.append(f"{lab} ({what}):\n" + table(
                [coord.replace("_", " "), "status", "energy used", "weighted error", "objective", "silent"],
                [[fmt(r[coord]), r["status"], fmt(r.get("energy_used")), fmt(r.get("weighted_error"), 6),
                  fmt(r.get("objective"), 6), ", ".join(r.get("silent_links") or [])] for r in rows]))
        parts.append(f"best architecture by {'price scale' if by_price else 'budget'} range "
                     "(margin: runner-up minus best):\n" + table(
            ["best", "price scales" if by_price else "budgets", "points", "margin", "relative", "all converged"],
            [[b["best"], f"{fmt(b['from'])} .. {fmt(b['to'])}", b["points"],
              _span(b["margin_min"], b["margin_max"], fmt),
              _span(b["relative_min"], b["relative_max"], lambda v: f"{100 * v:.3g}%"),
              "yes" if b["all_converged"] else "NO"] for b in study.extra["best"]]))
        for w in study.extra["warnings"]:
            parts.append(f"warning: {w}")
    else:
        show = [c for c in (show or []) if c in study.columns]
        header = axes + ["status", "objective"] + show + ["silent"]
        rows = [[fmt(r[a]) for a in axes] + [r["status"], fmt(r.get("objective"), 6)]
                + [fmt(r.get(c)) for c in show] + [", ".join(r.get("silent_links") or [])] for r in study.rows]
        parts.append(table(header, rows))
        if study.kind == "sweep":
            ranges = study.silent_ranges()
            lines = [f"  {lid}: {_range_text(r, fmt)}" for lid, rs in ranges.items() for r in rs]
            parts.append("silent ranges of " + axes[0] + ":\n" + ("\n".join(lines) or "  none"))
        else:
            parts.append("sets of silent links (points):\n" + "\n".join(
                f"  {k or 'none'}: {v}" for k, v in study.extra.get("silent_sets", {}).items()))
    bad = sum(1 for r in study.rows if not r.get("converged"))
    its = sum(int(r.get("iterations") or 0) for r in study.rows)
    parts.append(f"{len(study.rows)} points ({study.computed} designed, {study.reused} reused from an earlier "
                 f"run), {len(study.chunks)} chunk(s), warm starts {'on' if study.warm else 'off'}, "
                 f"{its} solver iterations in all, {study.seconds:.1f} s"
                 + (f"; {bad} point(s) NOT converged (hollow in plots)" if bad else "; every point converged"))
    return "\n\n".join(parts)


def _range_text(r, fmt) -> str:
    """``silent from A to B (n points); edges between ...`` for a silent run."""
    if r["below"] is None and r["above"] is None:
        return f"silent over the whole grid ({r['points']} point(s))"
    text = f"silent from {fmt(r['from'])} to {fmt(r['to'])} ({r['points']} point(s))"
    edges = [f"between {fmt(a)} and {fmt(b)}" for a, b in ((r["below"], r["from"]), (r["to"], r["above"]))
             if a is not None and b is not None]
    return text + "; edge " + " and ".join(edges)


def _span(lo, hi, f) -> str:
    if lo is None:
        return "-"
    return f(lo) if hi == lo else f"{f(lo)} .. {f(hi)}"
