"""Optimal gains for a circuit: price form and budget form.

Price form minimises ``J`` of the model (``docs/model.md``) with a stability-keeping L-BFGS over
all free gain blocks, using the exact adjoint gradient (two Lyapunov solves
per evaluation), from several deterministic starts. Budget form is a block
coordinate descent: the same quasi-Newton on the Lagrangian at the prices
set by the budgets' multipliers, and a convex allocation of power over the
links under every budget (CVXPY, :mod:`hierarchy.design.allocation`) whose dual
values are the next multipliers (the shadow prices). The final design is
re-scored exactly; budgets are checked, not assumed.
"""

from hierarchy._lazy import lazy_parts

# The parts load when a name is first used (hierarchy._lazy).
_WHERE = {
    'BUDGET_TOL': 'result',
    'AGREE_RTOL': 'result',
    'Options': 'result',
    'BudgetUse': 'result',
    'DesignResult': 'result',
    'SILENT_FRACTION': 'silent',
    'FADING': 'silent',
    'WAKE_DELTAS': 'silent',
    'SCREEN_MIN': 'silent',
    'STREAM_ITER': 'silent',
    'MAX_STREAMS': 'silent',
    'STREAM_SCALES': 'silent',
    'CHUNK': 'prices',
    'BALANCE_SNR': 'prices',
    'design_prices': 'prices',
    'raise_unstable_pins': 'prices',
    'design_budgets': 'budgets',
    'BLOCK_ITER': 'budgets',
    'BLOCK_SETTLED': 'budgets',
    'BUDGET_ITER': 'budgets',
    'SPREAD': 'budgets',
    'COARSE_TOL': 'budgets',
    'COARSE_STEPS': 'budgets',
    'NARROW_MAX_GAINS': 'search',
    'MAX_NARROW': 'search',
    'NARROW_RESTARTS': 'search',
    'FLOOR_MAX_DIM': 'search',
    'FLOOR_RTOL': 'search',
    'design': 'search',
    'floor_of': 'search',
    'without_pins': 'search',
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_parts(__name__, _WHERE)
