"""The allocation block of the budget form: how much power each link may
send under every budget, a convex program solved with CVXPY (Clarabel).

Every budget of a spec is a linear constraint on the design's powers
(``docs/model.md``, "Budgets"): ``sum_l w_gl P_l + sum_a v_ga E||z_a||^2 <= B_g``,
and a cap on one link is a row with a single entry. :func:`constraints`
turns a spec's budgets into these rows.

:class:`Allocation` holds the program over link powers ``p``. The designed
objective is modelled link by link in the Gaussian-channel form
``a_l N_l / (N_l + p_l)`` (the error left by uncoded transmission of a
Gaussian source over a channel of noise ``N_l``), with ``a_l`` chosen so
that the model's slope at the current power equals the current design's
exact slope ``dJ/dP_l`` (and ``N_l`` refined by secant steps, see
:func:`hierarchy.design.design_budgets`). Areas' activity enters at its
current value. The powers stay inside a trust region around the current
ones, so that the model is only trusted where it was calibrated. The dual
values of the budget rows are the shadow prices the gains block prices
links at next.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

__all__ = ["Constraints", "constraints", "Allocation"]

#: Clarabel's tolerances. Its defaults (1e-8) leave the duals wrong by
#: about 1e-6 relative, which the shadow prices would inherit; the program
#: is small, so the extra interior-point steps cost little.
#: Scaled duals below this (times the largest, or 1) are slack rows' zeros.
DUAL_FLOOR = 1e-9
TOLERANCES = dict(tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12, tol_ktratio=1e-10)


@dataclass
class Constraints:
    """Every budget row of a spec: ``W p + V activity <= totals``.

    Attributes
    ----------
    names : tuple of str
        One per row: the budget's name, or ``"NAME: cap A->B"`` for a cap.
    W : ndarray
        ``(rows x links)`` cost weights of the link powers (spec order).
    V : ndarray
        ``(rows x areas)`` weights of the areas' activity (spec order).
    totals : ndarray
        The right-hand sides.
    links : tuple of tuple
        The link ids each row covers (its nonzero columns of ``W``).
    cap_of : tuple
        For a cap row the link it caps, else ``None``.
    """

    names: tuple
    W: np.ndarray
    V: np.ndarray
    totals: np.ndarray
    links: tuple
    cap_of: tuple = ()

    def subset(self, keep) -> "Constraints":
        """The rows where ``keep`` is true."""
        keep = np.asarray(keep, bool)
        pick = lambda seq: tuple(x for x, k in zip(seq, keep) if k)
        return Constraints(pick(self.names), self.W[keep], self.V[keep], self.totals[keep], pick(self.links),
                           pick(self.cap_of))

    @property
    def has_activity(self) -> bool:
        return bool(np.any(self.V))

    def used(self, powers, activity) -> np.ndarray:
        """What every row spends at these powers and activities (``inf``
        for every row when the loop is unstable and the powers are)."""
        powers, activity = np.asarray(powers, float), np.asarray(activity, float)
        if not (np.all(np.isfinite(powers)) and np.all(np.isfinite(activity))):
            return np.full(len(self.totals), np.inf)
        return self.W @ powers + self.V @ activity


def constraints(spec) -> Constraints:
    """The rows of every budget (and cap) of ``spec``.

    Examples
    --------
    >>> from hierarchy.spec import parse_spec
    >>> spec = parse_spec('''
    ... spec: 1
    ... world: {states: {x: {dynamics: 0.5, noise: 1}}}
    ... sensors: {s: {observes: {x: 1}, noise: 0.1}}
    ... areas: {a: {tracks: x}, b: {tracks: x}}
    ... links:
    ...   - {from: s, to: a, kind: residual, noise: 0.1}
    ...   - {from: a, to: b, kind: residual, noise: 0.1}
    ... budgets: [{name: total, links: all, total: 2, caps: {a->b: 0.5}}]
    ... ''')
    >>> cons = constraints(spec)
    >>> cons.names
    ('total', 'total: cap a->b')
    >>> cons.W.tolist(), cons.totals.tolist()
    ([[1.0, 1.0], [0.0, 1.0]], [2.0, 0.5])
    """
    index = {l.id: i for i, l in enumerate(spec.links)}
    areas = {a.name: i for i, a in enumerate(spec.areas)}
    names, W, V, totals, links, cap_of = [], [], [], [], [], []
    for b in spec.budgets:
        w, v = np.zeros(len(spec.links)), np.zeros(len(spec.areas))
        for lid in b.links:
            w[index[lid]] = b.weight(lid)
        for area, weight in b.activity.items():
            v[areas[area]] = weight
        names.append(b.name), W.append(w), V.append(v), totals.append(b.total), links.append(tuple(b.links))
        cap_of.append(None)
        for lid, cap in b.caps.items():
            w = np.zeros(len(spec.links))
            w[index[lid]] = 1.0
            names.append(f"{b.name}: cap {lid}"), W.append(w), V.append(np.zeros(len(spec.areas)))
            totals.append(cap), links.append((lid,)), cap_of.append(lid)
    shape = (0, len(spec.links)), (0, len(spec.areas))
    return Constraints(tuple(names), np.array(W).reshape(-1, len(spec.links)) if W else np.zeros(shape[0]),
                       np.array(V).reshape(-1, len(spec.areas)) if V else np.zeros(shape[1]),
                       np.array(totals, float), tuple(links), tuple(cap_of))


class Allocation:
    """The convex allocation program over the links' powers.

    The variables are the links' SNRs ``q_l = p_l / N_l`` (so that every
    parameter enters in the form CVXPY can re-solve without compiling again,
    its "disciplined parametrized programming"):

        minimise    sum_l c_l / (1 + q_l) + s_l q_l
        subject to  (W diag N) q <= totals - V activity,   lo <= q <= hi.

    Parameters
    ----------
    cons : Constraints
        The rows (zero-total rows are left out by the caller).
    noise : ndarray
        ``N_l`` per link, the noise of each link's Gaussian-channel model.

    Examples
    --------
    >>> alloc = Allocation(cons, noise)                              # doctest: +SKIP
    >>> p, mu = alloc.solve(powers, slopes, activity, spread=2.0)    # doctest: +SKIP
    """

    def __init__(self, cons: Constraints, noise):
        import cvxpy as cp

        self.cons = cons
        self.noise = np.asarray(noise, float).copy()
        n, m = cons.W.shape[1], cons.W.shape[0]
        self._q = cp.Variable(n)
        self._c = cp.Parameter(n, nonneg=True)
        self._s = cp.Parameter(n, nonneg=True)
        self._lo = cp.Parameter(n, nonneg=True)
        self._hi = cp.Parameter(n, nonneg=True)
        self._WN = cp.Parameter((m, n))
        self._rhs = cp.Parameter(m)
        q = self._q
        self._rows = self._WN @ q <= self._rhs
        objective = cp.sum(cp.multiply(self._c, cp.inv_pos(1 + q))) + self._s @ q
        self._problem = cp.Problem(cp.Minimize(objective), [self._rows, q >= self._lo, q <= self._hi])
        # Rows scaled to a total of one, the objective to a model value of
        # one: the duals are then of order one whatever the units.
        self._row_scale = np.maximum(np.abs(cons.totals), 1e-300)

    def solve(self, powers, slopes, activity, spread: float, fixed=None):
        """Solve the program calibrated at the current design.

        Parameters
        ----------
        powers : ndarray
            Current power of every link.
        slopes : ndarray
            Exact ``dJ/dP_l`` of the current design (negative where more
            power lowers the objective).
        activity : ndarray
            Current activity of every area.
        spread : float
            Trust region: every power stays within ``[p / spread, p spread]``.
        fixed : ndarray of bool, optional
            Links held at their current power (silent links: at zero).

        Returns
        -------
        (powers, duals) or None
            The allocated powers and the dual value of every row (the
            shadow prices, in objective units per unit of the row's total);
            ``None`` when no allocation in the trust region (nor from zero
            up to it) meets the budgets.
        """
        import cvxpy as cp

        N = self.noise
        p0 = np.maximum(np.asarray(powers, float), 0.0)
        q0 = p0 / N
        s = np.asarray(slopes, float) * N  # dJ/dq
        fixed = np.zeros(len(N), bool) if fixed is None else np.asarray(fixed, bool)
        # c / (1 + q) has slope -c / (1 + q0)^2 at q0: match the exact slope.
        down = (s < 0) & ~fixed
        c = np.where(down, -s * (1 + q0) ** 2, 0.0)
        lin = np.where(down | fixed, 0.0, np.maximum(s, 0.0))
        scale = max(float(np.sum(c / (1 + q0)) + np.sum(lin * q0)), 1e-300)
        rhs = (self.cons.totals - self.cons.V @ np.asarray(activity, float)) / self._row_scale
        self._c.value, self._s.value = c / scale, lin / scale
        self._WN.value = self.cons.W * N[None, :] / self._row_scale[:, None]
        self._rhs.value = rhs
        hi = np.where(fixed, q0, q0 * spread)
        for lo in (np.where(fixed, q0, q0 / spread), np.where(fixed, q0, 0.0)):
            self._lo.value, self._hi.value = lo, hi
            try:
                with warnings.catch_warnings():
                    # An "inaccurate" finish at these tight tolerances is still
                    # far better than the defaults; the status is checked below.
                    warnings.simplefilter("ignore", UserWarning)
                    self._problem.solve(solver=cp.CLARABEL, **TOLERANCES)
            except cp.error.SolverError:
                continue
            if self._problem.status in (cp.OPTIMAL, cp.OPTIMAL_INACCURATE) and self._q.value is not None:
                duals = np.maximum(np.asarray(self._rows.dual_value, float), 0.0)
                # An interior-point dual of a slack row is tiny, not zero.
                duals[duals <= DUAL_FLOOR * max(float(duals.max(initial=0.0)), 1.0)] = 0.0
                duals *= scale / self._row_scale
                return np.maximum(self._q.value, 0.0) * N, duals
        return None
