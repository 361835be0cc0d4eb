"""How many threads BLAS may use while the tool works.

Our matrices are small (tens to a few hundred rows), and BLAS threads buy
little on them while costing a lot as soon as anything else wants the cores.
Measured on the 2-core development machine, `hierarchy design` of a generated
16-area circuit (200 iterations): alone, 2.12 s on one thread against 1.95 s
on two (but 2.19 s against 3.10 s of CPU); two such designs at once, 2.67 s
against 5.24 s; and under a loaded machine an exact evaluation of a 128-state
circuit once took 870 ms with the default threads against 22 ms with one. So
the tool runs BLAS on one thread, unless the user chose a thread count in the
environment.
"""

from __future__ import annotations

import contextlib
import os

__all__ = ["THREAD_VARIABLES", "single_thread"]

#: Environment variables by which a user picks BLAS threads; if any is set, we
#: leave the choice to them.
THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS")


def single_thread(force: bool = False):
    """A context manager that runs BLAS on one thread.

    Parameters
    ----------
    force : bool
        Limit even if the environment names a thread count (worker
        processes of a study, which share the cores).

    Examples
    --------
    >>> with single_thread():
    ...     pass
    """
    if not force and any(os.environ.get(v) for v in THREAD_VARIABLES):
        return contextlib.nullcontext()
    import numpy  # noqa: F401  threadpoolctl limits only the BLAS libraries
    import scipy.linalg  # noqa: F401  already loaded: numpy's and scipy's
    from threadpoolctl import threadpool_limits

    return threadpool_limits(1, user_api="blas")
