"""The design variables: named gain blocks per link and per area.

Which gains exist follows the model (``docs/model.md``):

* area ``a``: ``M`` (d_a x d_a), how the area's state carries over;
* prediction link ``a->b``: ``G`` (m x d_a), and ``K`` (d_b x m) when ``b`` is
  an area (a sensor has no state to update);
* residual link ``b->a``: ``S`` (m x size of b's signal), ``P`` (m x m_p) when
  the prediction ``a->b`` exists, and ``K`` (d_a x m).

A :class:`Gains` object holds plain numpy matrices keyed by link id and area
name. Gains pinned in the spec are merged in by :func:`with_pins`. On disk a
design is a JSON file (see :func:`save_gains`).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from hierarchy.errors import GainsError
from hierarchy.io import atomic_write_text
from hierarchy.spec.model import PREDICTION, RESIDUAL, Spec

__all__ = [
    "GAINS_FORMAT", "GAINS_VERSION", "MAX_GAIN", "MAX_GAINS_FILE", "paired_prediction",
    "gain_shapes", "Gains", "pinned_gains", "with_pins", "missing_gains", "check_gains",
    "gains_from_dict", "load_gains", "save_gains",
]

GAINS_FORMAT = "hierarchy-gains"
GAINS_VERSION = 1
#: Largest gain entry accepted (in size). Products of a few gains must stay
#: far from overflow when the closed loop is assembled.
MAX_GAIN = 1e30
#: Largest gains file read, in bytes.
MAX_GAINS_FILE = 50_000_000


def paired_prediction(spec: Spec, link):
    """The prediction link that residual ``link`` subtracts, or ``None``."""
    if link.kind != RESIDUAL:
        return None
    rev = f"{link.target}->{link.source}"
    for other in spec.links:
        if other.id == rev and other.kind == PREDICTION:
            return other
    return None


def gain_shapes(spec: Spec) -> dict:
    """Shapes of every gain block of a circuit.

    Returns
    -------
    dict
        ``{"areas": {name: {"M": shape}}, "links": {id: {name: shape}}}``.

    Examples
    --------
    >>> shapes = gain_shapes(spec)              # doctest: +SKIP
    >>> shapes["links"]["eye->v1"]["K"]         # doctest: +SKIP
    (2, 2)
    """
    areas = {a.name: {"M": (a.dim, a.dim)} for a in spec.areas}
    links = {}
    for l in spec.links:
        blocks = {}
        if l.kind == PREDICTION:
            blocks["G"] = (l.dim, spec.area(l.source).dim)
        else:
            blocks["S"] = (l.dim, spec.node_dim(l.source))
            pair = paired_prediction(spec, l)
            if pair is not None:
                blocks["P"] = (l.dim, pair.dim)
        if not spec.is_sensor(l.target):
            blocks["K"] = (spec.area(l.target).dim, l.dim)
        links[l.id] = blocks
    return {"areas": areas, "links": links}


@dataclass
class Gains:
    """A full or partial set of gains, keyed by area name and link id.

    Attributes
    ----------
    areas : dict
        ``{area name: {"M": ndarray}}``
    links : dict
        ``{link id: {"G"|"S"|"P"|"K": ndarray}}``
    """

    areas: dict = field(default_factory=dict)
    links: dict = field(default_factory=dict)

    def copy(self) -> "Gains":
        return Gains(
            {k: {n: np.array(m, dtype=float) for n, m in v.items()} for k, v in self.areas.items()},
            {k: {n: np.array(m, dtype=float) for n, m in v.items()} for k, v in self.links.items()},
        )

    def get(self, owner: str, name: str):
        table = self.links if "->" in owner else self.areas
        return table.get(owner, {}).get(name)

    def to_dict(self) -> dict:
        def plain(table):
            return {k: {n: np.asarray(m).tolist() for n, m in v.items()} for k, v in table.items()}

        return {"areas": plain(self.areas), "links": plain(self.links)}


def pinned_gains(spec: Spec) -> Gains:
    """The gains the spec pins (these are never optimised)."""
    g = Gains()
    for a in spec.areas:
        if a.pin:
            g.areas[a.name] = {k: np.array(v, dtype=float) for k, v in a.pin.items()}
    for l in spec.links:
        if l.pin:
            g.links[l.id] = {k: np.array(v, dtype=float) for k, v in l.pin.items()}
    return g


def with_pins(spec: Spec, gains: Gains | None) -> Gains:
    """Merge the spec's pinned gains over ``gains`` (pins win)."""
    out = gains.copy() if gains is not None else Gains()
    pins = pinned_gains(spec)
    for table_out, table_pin in ((out.areas, pins.areas), (out.links, pins.links)):
        for owner, blocks in table_pin.items():
            table_out.setdefault(owner, {}).update(blocks)
    return out


def missing_gains(spec: Spec, gains: Gains) -> list:
    """Names ``owner.block`` of gains that ``gains`` does not give."""
    shapes = gain_shapes(spec)
    missing = []
    for kind in ("areas", "links"):
        table = getattr(gains, kind)
        for owner, blocks in shapes[kind].items():
            for name in blocks:
                if table.get(owner, {}).get(name) is None:
                    missing.append(f"{owner}.{name}")
    return missing


def check_gains(spec: Spec, gains: Gains, source: str = "gains") -> Gains:
    """Check that ``gains`` gives every block of the circuit with the right shape.

    Raises
    ------
    GainsError
        Naming the first unknown owner, unknown block, wrong shape, non-finite
        entry or missing block.
    """
    shapes = gain_shapes(spec)
    for kind in ("areas", "links"):
        table = getattr(gains, kind)
        known = shapes[kind]
        for owner, blocks in table.items():
            if owner not in known:
                what = "link id" if kind == "links" else "area"
                raise GainsError(
                    f"unknown {what} '{owner}'",
                    place=f"{source}: {kind}.{owner}",
                    fix=f"use one of: {', '.join(known) or '(none)'}",
                )
            for name, mat in blocks.items():
                if name not in known[owner]:
                    raise GainsError(
                        f"'{owner}' has no gain '{name}'",
                        place=f"{source}: {kind}.{owner}.{name}",
                        fix=f"its gains are: {', '.join(known[owner])}",
                    )
                try:
                    arr = np.asarray(mat, dtype=float)
                except (TypeError, ValueError, OverflowError):
                    raise GainsError("not a matrix of numbers", place=f"{source}: {kind}.{owner}.{name}",
                                     fix="give a list of lists of numbers") from None
                if arr.shape != known[owner][name]:
                    raise GainsError(
                        f"shape {arr.shape} does not fit, expected {known[owner][name]}",
                        place=f"{source}: {kind}.{owner}.{name}",
                        fix="give a list of lists with that many rows and columns",
                    )
                if not np.all(np.isfinite(arr)):
                    raise GainsError(
                        "entries must be finite numbers",
                        place=f"{source}: {kind}.{owner}.{name}",
                        fix="replace NaN or infinite entries",
                    )
                if arr.size and np.abs(arr).max() > MAX_GAIN:
                    raise GainsError(
                        f"an entry is {np.abs(arr).max():.3g} in size, larger than {MAX_GAIN:g}",
                        place=f"{source}: {kind}.{owner}.{name}",
                        fix="no usable design has gains this large; run `hierarchy design` to get one",
                    )
    missing = missing_gains(spec, gains)
    if missing:
        raise GainsError(
            f"no value for {len(missing)} gain(s): {', '.join(missing[:6])}"
            + (" ..." if len(missing) > 6 else ""),
            place=source,
            fix="give them in the gains file, pin them in the spec, or run `hierarchy design` to get a full design",
        )
    return gains


def _matrix(value, place: str) -> np.ndarray:
    """A gain from JSON: a non-empty list of equally long rows of finite
    numbers (not booleans, not text), each at most ``MAX_GAIN`` in size."""
    if not isinstance(value, list) or not value or not all(isinstance(r, list) for r in value):
        raise GainsError("a gain must be a list of rows, each a list of numbers", place=place,
                         fix="write a 1x1 gain as [[value]] and a 2x2 one as [[a, b], [c, d]]")
    width = len(value[0])
    for row in value:
        if len(row) != width or not row:
            raise GainsError("the rows of this gain are empty or of different lengths", place=place,
                             fix="give every row the same, non-zero number of entries")
        for x in row:
            if isinstance(x, bool) or not isinstance(x, (int, float)):
                what = "text" if isinstance(x, str) else "null" if x is None else type(x).__name__
                raise GainsError(f"an entry is {what}, not a number", place=place,
                                 fix="write plain numbers, without quotes")
            try:
                x = float(x)
            except OverflowError:
                x = math.inf
            if not math.isfinite(x):
                raise GainsError("entries must be finite numbers", place=place,
                                 fix="replace NaN or infinite entries")
            if abs(x) > MAX_GAIN:
                raise GainsError(f"an entry is {x:.3g}, larger than {MAX_GAIN:g}", place=place,
                                 fix="no usable design has gains this large; check the file, or "
                                     "run `hierarchy design` to get one")
    return np.array(value, dtype=float)


def gains_from_dict(data, source: str = "gains") -> Gains:
    """Build :class:`Gains` from the JSON form (see :func:`save_gains`)."""
    if not isinstance(data, dict):
        raise GainsError("a gains file must hold a JSON object", place=source,
                         fix="see the gains format in the README")
    if data.get("format", GAINS_FORMAT) != GAINS_FORMAT:
        raise GainsError(f"format {json.dumps(data.get('format'))} is not a gains file",
                         place=f"{source}: format",
                         fix=f"a gains file has \"format\": \"{GAINS_FORMAT}\"")
    version = data.get("version", GAINS_VERSION)
    if isinstance(version, bool) or version != GAINS_VERSION:
        raise GainsError(f"version {json.dumps(version)} is not one this tool reads",
                         place=f"{source}: version",
                         fix=f"a gains file has \"version\": {GAINS_VERSION}; write the design "
                             f"again with this version of the tool")
    unknown = set(data) - {"format", "version", "spec", "areas", "links", "note"}
    if unknown:
        raise GainsError(f"unknown key(s) {', '.join(sorted(map(str, unknown)))}", place=source,
                         fix="allowed keys: format, version, spec, areas, links, note")
    out = Gains()
    for kind in ("areas", "links"):
        table = data.get(kind, {}) or {}
        if not isinstance(table, dict):
            raise GainsError(f"'{kind}' must be an object", place=f"{source}: {kind}",
                             fix="map each name to its gain blocks")
        for owner, blocks in table.items():
            if not isinstance(blocks, dict):
                raise GainsError("must map gain names to matrices", place=f"{source}: {kind}.{owner}",
                                 fix='for example {"K": [[1.0]]}')
            parsed = {}
            for name, mat in blocks.items():
                parsed[name] = _matrix(mat, f"{source}: {kind}.{owner}.{name}")
            getattr(out, kind)[owner] = parsed
    return out


def load_gains(path, spec: Spec | None = None) -> Gains:
    """Read a design saved by :func:`save_gains` (and check it against ``spec``).

    Examples
    --------
    >>> g = load_gains("specs/single-loop.gains.json", spec)   # doctest: +SKIP
    """
    from hierarchy.io import ReadRefused, read_text

    try:
        data = json.loads(read_text(path, MAX_GAINS_FILE))
    except ReadRefused as err:
        if err.reason == "missing":
            raise GainsError("file not found", place=str(path), fix="check the path to the gains file") from None
        if err.reason == "folder":
            raise GainsError("this is a folder, not a gains file", place=str(path),
                             fix="give the path of a .json gains file") from None
        if err.reason == "too large":
            raise GainsError(f"the file is too large (more than {MAX_GAINS_FILE:,} bytes)",
                             place=str(path), fix="a gains file holds one design; check the path") from None
        if err.reason == "not regular":
            raise GainsError(f"the gains file is not a regular file ({err})", place=str(path),
                             fix="save the gains to a file and give its path") from None
        raise GainsError(f"cannot read it ({err})", place=str(path),
                         fix="check the file's permissions and that it is a text file") from None
    except RecursionError:
        raise GainsError("the JSON is nested too deeply", place=str(path),
                         fix="a gains file is only a few levels deep; check the file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise GainsError(f"cannot read it ({exc.__class__.__name__})", place=str(path),
                         fix="check the file's permissions and that it is a text file") from None
    except json.JSONDecodeError as exc:
        raise GainsError(f"not valid JSON ({exc.msg})", place=f"{path} line {exc.lineno}",
                         fix="fix the JSON syntax") from None
    except ValueError as exc:  # an integer of thousands of digits
        raise GainsError(f"a value cannot be read ({exc})", place=str(path),
                         fix="write numbers with at most a few dozen digits") from None
    gains = gains_from_dict(data, source=str(path))
    if spec is not None:
        gains = check_gains(spec, with_pins(spec, gains), source=str(path))
    return gains


def save_gains(path, gains: Gains, spec: Spec | None = None, note: str | None = None) -> None:
    """Write ``gains`` as JSON, atomically (temporary file, then rename).

    The file is ``{"format": "hierarchy-gains", "version": 1, "spec": NAME,
    "areas": {area: {"M": rows}}, "links": {"FROM->TO": {"G"|"S"|"P"|"K": rows}}}``.

    Examples
    --------
    >>> save_gains("design.json", result.gains, spec)   # doctest: +SKIP
    """
    data = {"format": GAINS_FORMAT, "version": GAINS_VERSION}
    if spec is not None:
        data["spec"] = spec.name
    if note:
        data["note"] = note
    data.update(gains.to_dict())
    atomic_write_text(path, json.dumps(data, indent=1) + "\n")
