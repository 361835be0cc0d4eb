"""What a design returns: the designer's options, budget use and :class:`DesignResult`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from hierarchy.loop.evaluate import Scores
from hierarchy.loop.gains import Gains
from hierarchy.spec.model import Spec
from hierarchy.design.quasinewton import CONVERGED, F_FLOOR

if TYPE_CHECKING:
    from hierarchy.design.floor import Floor

__all__ = ['BUDGET_TOL', 'AGREE_RTOL', 'Options', 'BudgetUse', 'DesignResult']


#: Budgets are met when used <= total * (1 + BUDGET_TOL).
BUDGET_TOL = 1e-6
#: Searches whose objectives are within this (relative) of the best agree.
AGREE_RTOL = 1e-6


@dataclass
class Options:
    """Knobs of the designer.

    Attributes
    ----------
    restarts : int
        Starts tried (the informed start plus seeded random ones).
    max_iter : int
        L-BFGS iterations for the best start (the budget form may use
        ``BUDGET_ITER`` times this over its block steps, ``LIMITED_BUDGET_ITER``
        times above ``DENSE_LIMIT`` free gains).
    probe_iter : int
        Iterations each start gets before the best one is carried on.
    seed : int
        Seed of the random starts (same seed, same design).
    gtol, ftol : float
        Convergence tolerances on the relative objective (the budget form
        takes ``ftol`` down to ``BUDGET_FTOL``: its shadow prices need
        gains stationary to ``gtol``).
    budget_rounds : int
        Most block coordinate descent steps in budget form.
    budget_rtol : float
        At a stationary design whose budgets are within this (relative) of
        their totals, the block steps stop: the price changes that would
        close the rest move the gradient by less than ``gtol``. The
        allocation's multipliers there are the shadow prices (a Newton step
        to the exact totals on the calibrated model), and the exact scaling
        closes the design's last miss (which changes the objective by the
        multiplier times the miss, to first order).
    """

    restarts: int = 4
    max_iter: int = 3000
    probe_iter: int = 60
    seed: int = 0
    gtol: float = 1e-7
    ftol: float = 1e-12
    budget_rounds: int = 80
    budget_rtol: float = 3e-5


@dataclass
class BudgetUse:
    """One budget row at a design: a budget, or a cap on one of its links
    (``cap_of`` names the link). ``used`` counts each link's power times its
    cost weight (``costs``, default 1) plus the weighted ``activity``."""

    name: str
    total: float
    used: float
    shadow_price: float
    links: tuple
    costs: dict = field(default_factory=dict)
    activity: dict = field(default_factory=dict)
    cap_of: str | None = None

    @property
    def met(self) -> bool:
        return self.used <= self.total * (1 + BUDGET_TOL) + 1e-300


@dataclass
class DesignResult:
    """The outcome of a design: gains, exact scores and honest status.

    Attributes
    ----------
    status : str
        ``"converged"``, ``"iteration limit"`` or ``"failed"``.
    message : str
        Why the solver stopped, and any check that failed.
    gains : Gains
        The full design (pins included).
    scores : Scores
        Exact stationary scores of ``gains`` under the spec's own prices.
    objective : float
        ``scores.objective`` (price form) or the constrained objective
        (budget form: error plus priced terms, without multiplier terms).
    budgets : dict
        :class:`BudgetUse` by budget name (budget form only).
    silent : dict
        Link id -> why it is silent: ``verdict`` ("not worth sending" only
        when the wake-up test at this design found nothing, alone or with its
        stream; else "untested"), ``tested``, ``stream`` and ``reason``.
    searches : list of dict
        What each search of :func:`design` reached (``search``,
        ``objective``, ``status``).
    floor : Floor or None
        The information floor of the spec (:mod:`hierarchy.design.floor`), computed
        apart from the search, or ``None`` when it was not asked for.
    """

    spec: Spec
    status: str
    message: str
    gains: Gains
    scores: Scores
    objective: float
    form: str
    iterations: int = 0
    restarts: int = 0
    evaluations: int = 0
    seconds: float = 0.0
    grad_norm: float = float("nan")
    budgets: dict = field(default_factory=dict)
    silent: dict = field(default_factory=dict)
    reference: "DesignResult | None" = None
    searches: list = field(default_factory=list)
    floor: "Floor | None" = None

    @property
    def converged(self) -> bool:
        return self.status == CONVERGED

    @property
    def gap(self) -> float:
        """Relative gap ``(objective - floor) / objective`` to the
        information floor: at most what any better design could still gain;
        ``nan`` without a usable bound."""
        return float("nan") if self.floor is None else self.floor.gap(self.objective)

    @property
    def agreement(self) -> tuple:
        """``(k, n)``: ``k`` of the ``n`` searches reached this design's
        objective (within ``AGREE_RTOL``)."""
        if not self.searches:
            return (1, 1)
        tol = AGREE_RTOL * max(abs(self.objective), F_FLOOR)
        k = sum(1 for s in self.searches if abs(s["objective"] - self.objective) <= tol)
        return (k, len(self.searches))

    def to_dict(self) -> dict:
        from hierarchy.report.results import result_to_dict

        return result_to_dict(self)

    def to_pandas(self):
        """The areas and links of this design as two pandas DataFrames.

        Returns
        -------
        hierarchy.notebook.DesignTables
            A named tuple ``(areas, links)``: ``areas`` indexed by area name
            (exact errors, priors, activities, weights, lags, relay flag and
            drawing level), ``links`` indexed by link id (kind, power, noise
            power, SNR, bits, price, identifiability, through gain, silence
            and budget shares). Columns are listed in
            :func:`hierarchy.notebook.design_tables`.

        Examples
        --------
        >>> import hierarchy
        >>> result = hierarchy.load("specs/single-loop.yaml").design()
        >>> areas, links = result.to_pandas()
        >>> float(areas.loc["estimate", "error"]) == result.scores.areas["estimate"].error
        True
        >>> list(links.index)
        ['thermometer->estimate', 'estimate->thermometer']
        """
        from hierarchy.notebook import design_tables

        return design_tables(self)

    def __repr__(self) -> str:
        from hierarchy.notebook import design_repr

        return design_repr(self)

    def _repr_html_(self) -> str:
        from hierarchy.notebook import design_html

        return design_html(self)
