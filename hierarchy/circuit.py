"""The notebook facade: :class:`Circuit`, one object from a spec to its design,
above every stage it calls.
"""

from __future__ import annotations

from hierarchy.spec.model import Spec
from hierarchy.graph import build_graph, reach_warnings

__all__ = ['Circuit']


class Circuit:
    """A loaded circuit: the spec, its graph, and the jobs one can run on it.

    This is the notebook entry point; the CLI calls the same methods.

    Parameters
    ----------
    spec : Spec

    Examples
    --------
    >>> import hierarchy
    >>> c = hierarchy.load("specs/single-loop.yaml")    # doctest: +SKIP
    >>> result = c.design()                             # doctest: +SKIP
    >>> result.scores.areas["v1"].error                 # doctest: +SKIP
    0.19...
    """

    def __init__(self, spec: Spec):
        self.spec = spec
        self.graph = build_graph(spec)

    @property
    def warnings(self) -> list:
        return list(self.spec.warnings) + reach_warnings(self.graph)

    def evaluate(self, gains=None):
        """Exact scores for ``gains`` (see :func:`hierarchy.loop.evaluate.evaluate`)."""
        from hierarchy.loop.evaluate import evaluate

        return evaluate(self.spec, gains)

    def simulate(self, gains=None, **kwargs):
        """Monte-Carlo run (see :func:`hierarchy.loop.simulate.simulate`)."""
        from hierarchy.loop.simulate import simulate

        return simulate(self.spec, gains, **kwargs)

    def design(self, options=None, start=None, compare_unpinned=True, floor=True):
        """Optimal gains (see :func:`hierarchy.design.design`)."""
        from hierarchy.design import design

        return design(self.spec, options, start, compare_unpinned, floor)
