"""Helpers shared by the test files.

Import them by name (``from helpers import random_gains``): pytest puts this
folder on ``sys.path`` (``tests/conftest.py`` makes sure of it), and a plain
module keeps the helpers callable with arguments, which fixtures are not.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["random_gains"]


def random_gains(spec, rng=1, *, scale=1.0, radius=0.8, per_column=True):
    """Random free gains of ``spec``, optionally at a chosen loop radius.

    Every free block is drawn ``scale * N(0, 1)``, divided by the square root
    of its column count when ``per_column`` (so a block's output has the size
    of its input whatever the dimensions). Then, unless ``radius`` is None,
    every ``M`` and ``K`` is scaled by one common factor until the area block
    of the closed loop (pins included) has spectral radius ``radius``. Each
    entry of that block carries exactly one ``M`` or ``K`` factor, so one
    scaling is exact; the copies of delayed links' signals carry fixed
    entries, so with delays the scaling is repeated until it holds. An area
    block of radius 0 is left as drawn.

    Parameters
    ----------
    spec : hierarchy.spec.model.Spec
    rng : int or numpy.random.Generator
        A seed (the same seed, the same gains) or a generator to draw from
        (successive calls then give different gains).
    scale : float
        Size of the entries as drawn.
    radius : float or None
        Spectral radius of the area block (above 1: an unstable loop); None
        keeps the gains as drawn.
    per_column : bool
        Divide each block by the square root of its column count.

    Returns
    -------
    hierarchy.loop.gains.Gains
        The free gains only (pins stay in the spec).

    Examples
    --------
    The whole loop's radius is the larger of the world's and the areas':

    >>> from pathlib import Path
    >>> from hierarchy.loop.closedloop import Layout, assemble
    >>> from hierarchy.loop.evaluate import loop_radius
    >>> from hierarchy.loop.gains import with_pins
    >>> from hierarchy.spec import load_spec
    >>> spec = load_spec(Path(__file__).parents[1] / "specs" / "two-level.yaml")
    >>> gains = random_gains(spec, 3, radius=1.5)
    >>> round(loop_radius(assemble(Layout(spec), with_pins(spec, gains))), 9)
    1.5
    """
    from hierarchy.loop.closedloop import Layout, assemble
    from hierarchy.loop.evaluate import spectral_radius
    from hierarchy.loop.gains import Gains, gain_shapes, with_pins

    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)

    def draw(shape):
        block = scale * rng.standard_normal(shape)
        return block / math.sqrt(shape[1]) if per_column else block

    shapes = gain_shapes(spec)
    g = Gains({o: {k: draw(s) for k, s in b.items()} for o, b in shapes["areas"].items()},
              {o: {k: draw(s) for k, s in b.items()} for o, b in shapes["links"].items()})
    if radius is None:
        return g
    lay = Layout(spec)
    for _ in range(30):
        r = spectral_radius(assemble(lay, with_pins(spec, g)).Phi[lay.nx:, lay.nx:])
        if r == 0 or abs(r - radius) <= 1e-9 * radius:
            break
        for blocks in g.areas.values():
            blocks["M"] *= radius / r
        for blocks in g.links.values():
            if "K" in blocks:
                blocks["K"] *= radius / r
    return g

