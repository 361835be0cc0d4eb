"""Helpers shared by the test files.

Import them by name (``from helpers import random_gains``): pytest puts this
folder on ``sys.path`` (``tests/conftest.py`` makes sure of it), and a plain
module keeps the helpers callable with arguments, which fixtures are not.
"""

from __future__ import annotations

import contextlib
import math
import os
import sys
from collections import Counter

import numpy as np

__all__ = ["count_calls", "random_gains"]


def random_gains(spec, rng=1, *, scale=1.0, radius=0.8, per_column=True):
    """Random free gains of ``spec``, optionally at a chosen loop radius.

    Every free block is drawn ``scale * N(0, 1)``, divided by the square root
    of its column count when ``per_column`` (so a block's output has the size
    of its input whatever the dimensions). Then, unless ``radius`` is None,
    every ``M`` and ``K`` is scaled by one common factor until the area block
    of the closed loop (pins included) has spectral radius ``radius``. Each
    entry of that block carries exactly one ``M`` or ``K`` factor, so one
    scaling is exact; the copies of delayed links' signals carry fixed
    entries, so with delays the gains are shrunk again until the radius is at
    most ``radius``. Pinned gains are not scaled, so with pins the radius is
    only near ``radius``. An area block of radius 0 is left as drawn.

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
    for step in range(30):
        r = spectral_radius(assemble(lay, with_pins(spec, g)).Phi[lay.nx:, lay.nx:])
        # Scale once, then only shrink: pinned gains may hold the radius where
        # the free ones cannot move it, and growing them again would blow up.
        if r == 0 or step and r <= radius * (1 + 1e-9):
            break
        for blocks in g.areas.values():
            blocks["M"] *= radius / r
        for blocks in g.links.values():
            if "K" in blocks:
                blocks["K"] *= radius / r
    return g


@contextlib.contextmanager
def count_calls(*functions):
    """Count the calls of Python functions while the block runs: a measure of
    work that, unlike a clock, is the same on every machine.

    Each function is named as ``(module, name)``: the module object it is
    written in and its bare name (nested functions count too, which a
    reference to the function could not reach). Only the calling thread is
    watched.

    Yields
    ------
    collections.Counter
        Calls so far, keyed by ``name``.

    Examples
    --------
    >>> import json
    >>> with count_calls((json.decoder, "decode")) as calls:
    ...     _ = json.loads("[1, 2]")
    >>> calls["decode"]
    1
    """
    wanted = {(os.path.realpath(module.__file__), name) for module, name in functions}
    calls = Counter()

    def profile(frame, event, arg):
        if event == "call":
            code = frame.f_code
            if (os.path.realpath(code.co_filename), code.co_name) in wanted:
                calls[code.co_name] += 1

    previous = sys.getprofile()
    sys.setprofile(profile)
    try:
        yield calls
    finally:
        sys.setprofile(previous)
