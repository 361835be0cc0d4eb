"""A study's result: its rows, columns and CSV.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from hierarchy.errors import InputError
from hierarchy.io import atomic_write_text
from hierarchy.spec.model import Spec
from hierarchy.studies.paths import _choices, _close
from hierarchy.studies.runner import _HEAD, _TAIL, STUDY_VERSION, _columns_of, spec_digest

__all__ = ['STUDY_FORMAT', 'TIMING_COLUMNS', 'Study', 'quantity_columns', 'parse_show', 'check_columns', 'output_base']


STUDY_FORMAT = "hierarchy-study"
#: Columns that differ from run to run of the same design (timings).
TIMING_COLUMNS = ("seconds",)


@dataclass
class Study:
    """The table of a study and what it found.

    Attributes
    ----------
    kind : str
        ``"sweep"``, ``"phase"`` or ``"compare"``.
    axes : list of dict
        ``{"path", "values", "scale"}`` per varied value (compare: the budget).
    columns : list of str
        Table columns; a row lacks the columns that do not apply to it.
    rows : list of dict
        One row per point: its coordinates, ``status``, ``converged``,
        ``objective``, the parts of the objective, ``areas[A].error``,
        ``links[L].power``, ``links[L].through_gain``, ``links[L].silent``,
        ``budgets[B].used``, ``budgets[B].shadow_price``, ``silent_links``,
        ``iterations``, ``evaluations``, ``seconds``, ``message``.
    gains : list of dict
        The design of every row (gains-file layout, or ``None``).
    computed, reused : int
        Points designed in this run, and loaded from finished parts.
    """

    kind: str
    specs: list
    axes: list
    columns: list
    rows: list
    gains: list
    options: dict
    warm: bool
    chunks: list
    computed: int = 0
    reused: int = 0
    seconds: float = 0.0
    extra: dict = field(default_factory=dict)

    def column(self, name) -> list:
        """The values of one column (``None`` where a row lacks it)."""
        if name not in self.columns:
            raise InputError(f"the table has no column `{name}`{_close(name, self.columns)}", place="--show",
                             fix="choose among: " + _choices(quantity_columns(self), 20))
        return [r.get(name) for r in self.rows]

    @property
    def values(self) -> list:
        return self.axes[0]["values"]

    def silent_ranges(self) -> dict:
        """Sweep: for each link, the runs of grid points where it is silent,
        ``{"from", "to", "points", "below", "above"}``: the first and last
        silent value, and the nearest values on either side where it is not
        (``None`` at the end of the grid). The true edge lies between
        ``below`` and ``from`` (and between ``to`` and ``above``). A failed
        point counts as not silent."""
        return self.extra.get("silent_ranges", {})

    def to_dict(self) -> dict:
        from hierarchy.report.results import _clean

        d = {"format": STUDY_FORMAT, "version": STUDY_VERSION, "kind": self.kind, "specs": self.specs,
             "axes": self.axes, "options": self.options, "warm_starts": self.warm,
             "chunks": self.chunks, "points": len(self.rows), "computed": self.computed,
             "reused": self.reused, "seconds": self.seconds,
             "not_converged": [i for i, r in enumerate(self.rows) if not r.get("converged")],
             **self.extra, "columns": self.columns, "rows": self.rows}
        return _clean(d)

    def csv_text(self) -> str:
        """The table as CSV text (written with pandas; cells as
        :func:`_csv_cell` spells them, so floats keep every digit)."""
        import pandas as pd

        frame = pd.DataFrame([[_csv_cell(r.get(c)) for c in self.columns] for r in self.rows],
                             columns=self.columns, dtype=object)
        return frame.to_csv(index=False, lineterminator="\n")

    def write(self, base) -> list:
        """Write ``<base>.csv`` and ``<base>.json`` atomically; returns the paths."""
        from hierarchy.report.results import write_json

        base = Path(base)
        csv_path, json_path = Path(f"{base}.csv"), Path(f"{base}.json")
        atomic_write_text(csv_path, self.csv_text())
        write_json(json_path, self.to_dict())
        return [csv_path, json_path]

    def to_pandas(self):
        """The table as a pandas DataFrame, one row per point in the study's
        order (row ``i`` is ``rows[i]``), one column per entry of
        :attr:`columns` (see :func:`hierarchy.notebook.study_frame`).

        Examples
        --------
        >>> import hierarchy
        >>> from hierarchy.studies import sweep
        >>> spec = hierarchy.load_spec("specs/single-loop.yaml")
        >>> st = sweep(spec, "links[thermometer->estimate].price", [0.1, 1.0], workers=1)
        >>> st.to_pandas()["links[thermometer->estimate].price"].tolist()
        [0.1, 1.0]
        """
        from hierarchy.notebook import study_frame

        return study_frame(self)

    def to_xarray(self):
        """The study as an xarray Dataset with one dimension per swept value
        (a sweep: its path; a phase map: the y path and the x path; a
        comparison: ``spec`` and ``budget``), coordinates labelled with the
        study's values (see :func:`hierarchy.notebook.study_dataset`).

        Examples
        --------
        >>> import hierarchy
        >>> from hierarchy.studies import sweep
        >>> spec = hierarchy.load_spec("specs/single-loop.yaml")
        >>> st = sweep(spec, "links[thermometer->estimate].price", [0.1, 1.0], workers=1)
        >>> ds = st.to_xarray()
        >>> ds["objective"].dims
        ('links[thermometer->estimate].price',)
        """
        from hierarchy.notebook import study_dataset

        return study_dataset(self)

    def __repr__(self) -> str:
        from hierarchy.notebook import study_repr

        return study_repr(self)

    def _repr_html_(self) -> str:
        from hierarchy.notebook import study_html

        return study_html(self)


def _csv_cell(v):
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    if isinstance(v, (list, tuple)):
        return "; ".join(map(str, v))
    return v


def quantity_columns(study: Study) -> list:
    """Numeric columns one may plot (``--show``)."""
    skip = {"status", "converged", "silent_links", "message"}
    return [c for c in study.columns if c not in skip and not c.endswith(".silent")
            and c not in {a["path"] for a in study.axes} and c not in ("spec", "budget")]


def parse_show(text) -> list:
    """Split ``--show`` at commas outside brackets:
    ``"links[a->s].power,objective"`` -> two columns."""
    out, depth, cur = [], 0, ""
    for ch in str(text or ""):
        depth += (ch == "[") - (ch == "]")
        if ch == "," and depth == 0:
            out.append(cur.strip())
            cur = ""
        else:
            cur += ch
    out.append(cur.strip())
    return [c for c in out if c]


def check_columns(specs, names, coords=()) -> None:
    """Refuse, before any design, a ``--show`` column the table will not have."""
    known = [c for c in _columns(list(coords), list(specs)) if c not in _HEAD[:2] and c not in _TAIL[:1]
             and c != "message" and not c.endswith(".silent") and c not in coords]
    for name in names:
        if name not in known:
            raise InputError(f"the table will have no column `{name}`{_close(name, known)}", place="--show",
                             fix="choose among: " + _choices(known, 20))


def output_base(path) -> Path:
    """``results/run`` from ``results/run``, ``results/run.csv`` or ``.json``;
    the folder must exist."""
    p = Path(path)
    if p.suffix.lower() in (".csv", ".json"):
        p = p.with_suffix("")
    folder = p.parent if str(p.parent) else Path(".")
    if not folder.is_dir():
        raise InputError("the output folder does not exist", place=str(path),
                         fix="create the folder or choose another --out")
    return p


def _spec_info(spec: Spec, label=None) -> dict:
    return {"name": spec.name, "label": label or spec.name, "file": spec.path, "digest": spec_digest(spec)}


def _columns(coords: list, specs: list) -> list:
    cols = list(coords) + list(_HEAD)
    for spec in specs:
        cols += [c for c in _columns_of(spec) if c not in cols]
    return cols + list(_TAIL)
