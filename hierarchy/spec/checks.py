"""Checks shared by the sections: known names, totals, covariances, pins.
"""

from __future__ import annotations

import numpy as np

from hierarchy.spec import rules
from hierarchy.spec.model import frozen_array
from hierarchy.spec.kinds import _Fields, _Shorthand
from hierarchy.spec.positions import _At

__all__ = []


def _known(at: _At, name, known, what: str) -> None:
    rules.check_known(name, known, what, at.place, at.line)


def _check_total(at: _At, sizes, what: str) -> None:
    """Refuse circuits too big to build, before any big matrix is made."""
    rules.check_total(sizes, what, at.place, at.line)


def _covariance(matrix: _Shorthand, n: int, why: str) -> np.ndarray:
    """Expand a covariance and check that it is symmetric and PSD."""
    return rules.check_covariance(matrix.expand(n, n, why), matrix.at.place, matrix.at.line)


def _expand_pins(pins: _Fields | None, shapes: dict) -> dict:
    """Expand the pinned gains given; ``shapes`` maps gain -> (rows, cols, why)."""
    if pins is None:
        return {}
    return {gain: frozen_array(pins.get(gain).expand(*shape))
            for gain, shape in shapes.items() if pins.given(gain)}
