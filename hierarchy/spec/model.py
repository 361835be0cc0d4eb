"""Typed, immutable description of a circuit (what a spec file states).

These objects are produced by :mod:`hierarchy.spec` from a YAML file (or built
directly in Python) and are read by every later stage. All matrices are plain
read-only numpy arrays of floats, already expanded from the shorthand.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

__all__ = [
    "PREDICTION", "RESIDUAL", "LINK_KINDS", "frozen_array", "frozen_map", "StateBlock", "World",
    "Sensor", "Area", "Link", "Budget", "Spec",
]

PREDICTION = "prediction"
RESIDUAL = "residual"
LINK_KINDS = (PREDICTION, RESIDUAL)


def frozen_array(value) -> np.ndarray:
    """Return a read-only float64 copy of ``value``."""
    arr = np.array(value, dtype=float)
    arr.setflags(write=False)
    return arr


def frozen_map(mapping) -> Mapping:
    return MappingProxyType(dict(mapping))


@dataclass(frozen=True)
class StateBlock:
    """A named block of the world state.

    ``dynamics`` is the diagonal block A[name, name]; ``driven_by`` maps another
    block's name to the off-diagonal block A[name, other]; ``noise`` is the
    process-noise covariance of this block.
    """

    name: str
    dim: int
    dynamics: np.ndarray
    noise: np.ndarray
    driven_by: Mapping[str, np.ndarray] = field(default_factory=dict)


@dataclass(frozen=True)
class World:
    """The stationary linear-Gaussian world ``x(t+1) = A x(t) + w(t)``."""

    states: tuple  # of StateBlock, in the order they stack

    @property
    def dim(self) -> int:
        return sum(b.dim for b in self.states)

    @property
    def names(self) -> tuple:
        return tuple(b.name for b in self.states)

    def slices(self) -> dict:
        """Map each block name to its slice of the world state."""
        out, start = {}, 0
        for b in self.states:
            out[b.name] = slice(start, start + b.dim)
            start += b.dim
        return out

    @property
    def A(self) -> np.ndarray:
        sl = self.slices()
        A = np.zeros((self.dim, self.dim))
        for b in self.states:
            A[sl[b.name], sl[b.name]] = b.dynamics
            for other, block in b.driven_by.items():
                A[sl[b.name], sl[other]] = block
        return A

    @property
    def Q(self) -> np.ndarray:
        sl = self.slices()
        Q = np.zeros((self.dim, self.dim))
        for b in self.states:
            Q[sl[b.name], sl[b.name]] = b.noise
        return Q

    def selector(self, names) -> np.ndarray:
        """Rows that pick the named blocks (stacked in the given order)."""
        sl = self.slices()
        rows = [np.eye(self.dim)[sl[n]] for n in names]
        return np.vstack(rows) if rows else np.zeros((0, self.dim))


@dataclass(frozen=True)
class Sensor:
    """A memoryless sensor ``y = sum_k C_k x_k + v``, ``v ~ N(0, noise)``."""

    name: str
    observes: Mapping[str, np.ndarray]  # block name -> C block (dim x block dim)
    noise: np.ndarray

    @property
    def dim(self) -> int:
        return self.noise.shape[0]

    def C(self, world: World) -> np.ndarray:
        sl = world.slices()
        C = np.zeros((self.dim, world.dim))
        for name, block in self.observes.items():
            C[:, sl[name]] = block
        return C


@dataclass(frozen=True)
class Area:
    """An area: state ``z`` of size ``dim``; optional target and prices.

    ``tracks`` is empty for a free relay. ``pin`` may hold ``M``. ``level``
    is where drawings and ``hierarchy check`` place the area (1 or more);
    ``None`` leaves it to the default rule of :func:`hierarchy.circuit.levels`.
    It changes no number the tool computes.
    """

    name: str
    dim: int
    tracks: tuple = ()
    weight: float = 0.0
    lag: int = 0
    activity_price: float = 0.0
    pin: Mapping[str, np.ndarray] = field(default_factory=dict)
    level: int | None = None

    @property
    def has_target(self) -> bool:
        return bool(self.tracks)


@dataclass(frozen=True)
class Link:
    """A noisy channel from ``source`` to ``target``.

    ``kind`` is ``"prediction"`` or ``"residual"``; ``dim`` the size of the
    signal sent; ``noise`` its channel-noise covariance (dim x dim); ``pin``
    may hold ``G``, ``K`` (prediction) or ``S``, ``P``, ``K`` (residual).
    ``delay`` is the conduction delay in whole steps (1 or more): the
    receiver's update of ``t+1`` uses what was sent at ``t - delay + 1``.
    """

    source: str
    target: str
    kind: str
    dim: int
    noise: np.ndarray
    price: float = 0.0
    pin: Mapping[str, np.ndarray] = field(default_factory=dict)
    delay: int = 1

    @property
    def id(self) -> str:
        return f"{self.source}->{self.target}"


@dataclass(frozen=True)
class Budget:
    """A hard energy budget, a linear constraint on powers:
    ``sum_l costs[l] P_l + sum_a activity[a] E||z_a||^2 <= total`` over
    ``links`` (cost weight 1 unless ``costs`` says otherwise), and every
    link named in ``caps`` sends at most its cap on its own."""

    name: str
    links: tuple  # resolved link ids
    total: float
    selector: str = ""  # how the spec named the group, for reports
    costs: Mapping[str, float] = field(default_factory=dict)  # link id -> cost weight (default 1)
    caps: Mapping[str, float] = field(default_factory=dict)  # link id -> most power it may send
    activity: Mapping[str, float] = field(default_factory=dict)  # area -> weight of its activity

    def weight(self, link_id: str) -> float:
        """The cost weight of one of the budget's links."""
        return float(self.costs.get(link_id, 1.0))


@dataclass(frozen=True)
class Spec:
    """A whole circuit as stated by the user."""

    name: str
    world: World
    sensors: tuple = ()
    areas: tuple = ()
    links: tuple = ()
    budgets: tuple = ()
    version: int = 1
    warnings: tuple = ()
    path: str | None = None
    units: object = None  # hierarchy.spec.units.Units, or None: the model's own units only

    def sensor(self, name):
        return next(s for s in self.sensors if s.name == name)

    def area(self, name):
        return next(a for a in self.areas if a.name == name)

    def link(self, link_id):
        return next(l for l in self.links if l.id == link_id)

    def node_dim(self, name) -> int:
        for s in self.sensors:
            if s.name == name:
                return s.dim
        return self.area(name).dim

    def is_sensor(self, name) -> bool:
        return any(s.name == name for s in self.sensors)
