"""A result as the drawings read it: the result file (``hierarchy design
--json``, ``hierarchy evaluate --json``) checked field by field, and the
graph of its circuit."""

from __future__ import annotations

import json
import math
import os

from hierarchy.errors import InputError
from hierarchy.spec.model import PREDICTION, RESIDUAL

__all__ = ["MAX_RESULT_FILE", "read_result", "result_graph"]

#: A result file is refused above this size (bytes): a 5000-dim design
#: writes a few megabytes.
MAX_RESULT_FILE = 50_000_000


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
