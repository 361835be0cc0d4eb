"""Studies: how the best circuit changes as the spec changes.

Three studies share one point runner and one scheduler:

* a **sweep** varies one spec value over a grid and designs every point;
* a **phase map** varies two values over a grid (which links are silent where);
* a **comparison** designs several specs over a range of total budgets, or
  of scales of their link prices (which architecture wins where, and by how
  much).

Values are addressed by a *path* on the typed spec (never by editing YAML):

===============================  ==================================================
path                             meaning of the number given
===============================  ==================================================
``links[FROM->TO].price``        the link's price per unit of power (>= 0)
``links[FROM->TO].noise``        channel noise: the number times the identity
``budgets[NAME].total``          the budget's total (>= 0)
``areas[NAME].weight``           weight of the area's error (>= 0)
``areas[NAME].activity_price``   price of the area's activity (>= 0)
``sensors[NAME].noise``          sensor noise: the number times the identity
``world.states[NAME].noise``     process noise of the block: number times identity
``world.states[NAME].dynamics``  the block's own dynamics: number times identity
===============================  ==================================================

A path may select several places at once (a *grouped path*): in place of a
name write ``*`` (every link, area, sensor, budget or state block of the
section) or, for links, ``kind:prediction``, ``kind:residual``,
``from:NODE`` or ``to:NODE``. Every selected place is set to the same number:
``links[kind:prediction].price`` sweeps every prediction price together
(``areas[*].weight`` leaves relays out: they have no error to weigh). A
name of the spec is always read as that name first. A group that selects
nothing is refused, and the modified spec passes the same checks as a single
path's.

A noise set by a number replaces the whole covariance by that multiple of the
identity (a vector link's off-diagonal terms are dropped). Every modified
spec is checked by :func:`hierarchy.spec.rules.check_spec`, the rules the spec
reader applies (a priced or budgeted link needs positive definite noise, a
noisy link needs a price or a budget, the world must stay stable within the
margin, a relay has no weight) before any point
is designed, and a bad path or value is an :class:`~hierarchy.errors.InputError`
that names it.

Continuation: the points of a study are laid along chains (the grid in order;
a phase map row by row, back and forth). Each point is designed from the
gains of the point before it on its chain (a warm start). To run in parallel
a chain is cut into contiguous chunks, one per worker; the first point of
each chunk starts cold. So the table can depend, within solver tolerance and
up to local optima, on the number of chunks: rerun with the same ``workers``
to reproduce a table exactly. A warm-started point skips the designer's
probe phase (one start: nothing to choose), and every point is checked for a
silent prediction into a sensor that would pay if woken, a saddle the
designer does not test (see :func:`run_point`).

Long runs: with an ``output`` base path, every finished point is written at
once to ``<output>.parts/<key>.json`` (atomically). The key hashes the
modified spec's content, the paths and values, the designer options and the
warm-start setting, so a changed spec never reuses a stale point. A rerun of
the same study loads the finished points and designs only the others; the
tables (``<output>.csv``, ``<output>.json``) are written atomically at the end.

Examples
--------
>>> from hierarchy.spec import load_spec
>>> spec = load_spec("specs/single-loop.yaml")                       # doctest: +SKIP
>>> st = sweep(spec, "links[estimate->thermometer].price",
...            grid(1e-4, 1, 9, log=True), log=True, workers=1)      # doctest: +SKIP
>>> st.silent_ranges()["estimate->thermometer"]                      # doctest: +SKIP
[{'from': 0.0316..., 'to': 1.0, 'points': 4, 'below': 0.01, 'above': None}]
"""

from hierarchy._lazy import lazy_parts

# The parts load when a name is first used (hierarchy._lazy).
_WHERE = {
    'MAX_POINTS': 'paths',
    'ValuePath': 'paths',
    'settable_paths': 'paths',
    'parse_path': 'paths',
    'set_value': 'paths',
    'grid': 'paths',
    'parse_range': 'paths',
    'STUDY_VERSION': 'runner',
    'POINT_FORMAT': 'runner',
    'MAX_PART_FILE': 'runner',
    'spec_digest': 'runner',
    'run_point': 'runner',
    'WATCH_PARENT_SECONDS': 'runner',
    'default_workers': 'runner',
    'AGREE_RTOL': 'walk',
    'STUDY_FORMAT': 'tables',
    'TIMING_COLUMNS': 'tables',
    'Study': 'tables',
    'quantity_columns': 'tables',
    'parse_show': 'tables',
    'check_columns': 'tables',
    'output_base': 'tables',
    'sweep_silent_ranges': 'sweep',
    'sweep': 'sweep',
    'phase_map': 'phase',
    'TIE_RTOL': 'compare',
    'varied_budget': 'compare',
    'best_ranges': 'compare',
    'scale_prices': 'compare',
    'compare': 'compare',
    'study_text': 'text',
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_parts(__name__, _WHERE)

# `sweep` and `compare` share their names with the parts that hold them.
# Importing such a part after the package (as `pytest --doctest-modules` or
# any `import hierarchy.studies.sweep` does) binds the package's name to the
# part module, and `studies.sweep(...)` then fails; loaded here, first, the
# names stay the functions.
from hierarchy.studies.compare import compare  # noqa: E402
from hierarchy.studies.sweep import sweep  # noqa: E402
