"""The words and numbers written on a drawing: numbers in a few digits,
physical units, link and node labels and the title."""

from __future__ import annotations

__all__ = ["MAX_TITLE_BUDGETS"]

MAX_TITLE_BUDGETS = 4


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
