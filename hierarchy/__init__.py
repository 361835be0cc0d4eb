"""hierarchy: design multi-area predictive circuits under energy limits.

Typical use::

    import hierarchy
    circuit = hierarchy.load("specs/two-level.yaml")
    result = circuit.design()
    print(result.status, result.objective)
"""

__version__ = "0.1.0"

from hierarchy.circuit import Circuit
from hierarchy.errors import GainsError, HierarchyError, InputError, SpecError, UnstableError
from hierarchy.design.floor import Floor, information_floor
from hierarchy.loop.gains import Gains, load_gains, save_gains


def load_spec(path):
    """Read and validate a spec file (see :func:`hierarchy.spec.load_spec`)."""
    from hierarchy.spec import load_spec as _load

    return _load(path)


def load(path) -> Circuit:
    """Load a spec file as a :class:`Circuit` ready to evaluate, simulate or design.

    Examples
    --------
    >>> import hierarchy
    >>> hierarchy.load("specs/single-loop.yaml").design().status   # doctest: +SKIP
    'converged'
    """
    return Circuit(load_spec(path))


def evaluate(spec, gains=None):
    """Exact stationary scores (see :func:`hierarchy.loop.evaluate.evaluate`)."""
    from hierarchy.loop.evaluate import evaluate as _evaluate

    return _evaluate(spec, gains)


def design(spec, options=None, start=None, compare_unpinned=True):
    """Optimal gains (see :func:`hierarchy.design.design`)."""
    from hierarchy.design import design as _design

    return _design(spec, options, start, compare_unpinned)


__all__ = [
    "Circuit", "Floor", "Gains", "GainsError", "HierarchyError", "InputError", "SpecError",
    "UnstableError", "design", "evaluate", "information_floor", "load", "load_gains", "load_spec",
    "save_gains",
]
