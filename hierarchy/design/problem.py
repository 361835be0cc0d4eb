"""The optimisation problem behind a design: which gains are free, in what
units the solver sees them, and the objective with its exact gradient.

Gains are scaled so that the solver works in natural units: a sender gain is
measured in units of its channel's noise (so scaling a link's noise by ``c``
and its price by ``1/c`` gives the solver the very same problem: docs/model.md's
scale law), a receiver gain in the inverse units, and the objective relative
to the weighted prior error. Flattening is private to this module and the
solver; everything else sees named :class:`~hierarchy.loop.gains.Gains`.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from hierarchy.loop.closedloop import Layout
from hierarchy.loop.evaluate import _gradient, _priced_value, _solve, area_radius
from hierarchy.loop.gains import Gains, gain_shapes, pinned_gains
from hierarchy.memory import keep_freed_memory
from hierarchy.spec.model import PREDICTION, Spec

__all__ = ["EVALUATIONS", "SEARCH_MARGIN", "PRECONDITION_STEP", "PRECONDITION_FLOOR", "PRECONDITION_REUSE", "Problem"]

#: The design search keeps the area block's spectral radius below
#: ``1 - SEARCH_MARGIN``: closer to the edge the covariances grow like
#: ``1 / (1 - radius)`` and a line search that walks an area there (a mode
#: that costs nothing, say) is left with steps too small to move at all
#: (a 64-area design once stopped at radius 1 - 1.8e-8, "line search cannot
#: make progress"). Scores of given gains still accept any stable loop
#: (:data:`~hierarchy.spec.rules.STABLE_RADIUS`).
SEARCH_MARGIN = 1e-6
#: Forward-difference step of :meth:`Problem.preconditioner`, in each gain's
#: units, and the smallest eigenvalue it keeps in a block, relative to the
#: block's largest (a flat direction, a silent mode, must not get an
#: unbounded step).
PRECONDITION_STEP = 1e-5
PRECONDITION_FLOOR = 1e-6
#: A preconditioner asked for again within this many evaluations per free
#: gain of the last one is that one (in the new units): it costs one
#: gradient per gain, and polish rounds that each start afresh would
#: otherwise pay it every round.
PRECONDITION_REUSE = 3

#: Evaluations made by every :class:`Problem` of this process, for progress
#: reports from another thread (see ``hierarchy.cli``); only ever increased.
EVALUATIONS = [0]


def _rms(cov: np.ndarray) -> float:
    k = cov.shape[0]
    return float(np.sqrt(max(np.trace(cov), 0.0) / k)) if k else 0.0


class Problem:
    """Free gains of ``spec``, their scaling, and ``J(theta)`` with its gradient.

    Parameters
    ----------
    spec : Spec
    prices : array_like, optional
        Per-link prices (default: the spec's). The budget form changes these
        (``prices`` is a plain attribute: the prices at the current multipliers).

    Examples
    --------
    >>> prob = Problem(spec)                  # doctest: +SKIP
    >>> J, g = prob.value_and_grad(prob.pack(gains))   # doctest: +SKIP
    """

    def __init__(self, spec: Spec, prices=None):
        keep_freed_memory()  # an optimisation reuses its temporaries thousands of times
        self.spec = spec
        self.layout = Layout(spec)
        self.prices = self.layout.price.copy() if prices is None else np.asarray(prices, float).copy()
        self.pins = pinned_gains(spec)
        self.links = {l.id: l for l in spec.links}
        world = spec.world
        self.world_cov = sla.solve_discrete_lyapunov(world.A, world.Q)
        self.node_scale = self._node_scales()
        self.link_scale = {}
        for l in spec.links:
            noise = _rms(l.noise)
            self.link_scale[l.id] = noise if noise > 0 else self.node_scale[l.source]
        shapes = gain_shapes(spec)
        self.blocks = []  # (kind, owner, name, shape, factor, offset)
        offset = 0
        for kind in ("areas", "links"):
            for owner, blocks in shapes[kind].items():
                for name, shape in blocks.items():
                    if self.pins.get(owner, name) is not None:
                        continue
                    factor = self._factor(owner, name)
                    self.blocks.append((kind, owner, name, shape, factor, offset))
                    offset += shape[0] * shape[1]
        self.size = offset
        # Solver units -> the layout's flat gain vector: pins stay in `base`,
        # free entries go to `free_at`, each multiplied by its block's factor.
        lay = self.layout
        self.base = np.zeros(lay.n_gains)
        for (owner, name), (off, shape) in lay.gain_slots.items():
            pin = self.pins.get(owner, name)
            if pin is not None:
                self.base[off:off + shape[0] * shape[1]] = np.asarray(pin, dtype=float).ravel()
        at, fac = [np.zeros(0, int)], [np.zeros(0)]
        for kind, owner, name, shape, factor, off in self.blocks:
            start = lay.gain_slots[(owner, name)][0]
            at.append(start + np.arange(shape[0] * shape[1]))
            fac.append(np.full(shape[0] * shape[1], factor))
        self.free_at, self.free_factor = np.concatenate(at), np.concatenate(fac)
        self.by_owner = {}  # owner -> [(name, slice of theta, shape)]
        for kind, owner, name, shape, factor, off in self.blocks:
            self.by_owner.setdefault(owner, []).append((name, slice(off, off + shape[0] * shape[1]), shape))
        prior = sum(a.weight * float(np.trace(world.selector(a.tracks) @ self.world_cov @ world.selector(a.tracks).T))
                    for a in spec.areas if a.has_target)
        self.reference = prior if prior > 0 else 1.0
        self.evaluations = 0  # values with gradients
        self.values = 0  # values alone
        self.solves = 0  # distinct points evaluated (a gradient at the last point reuses its solve)
        self.trial_iterations = 0  # iterations of stream trials (outside any descent's allowance)
        self._last = None  # (theta, flat gains, radius, solution) of the last evaluation

    def _node_scales(self) -> dict:
        world, cov = self.spec.world, self.world_cov
        out = {}
        for s in self.spec.sensors:
            C = s.C(world)
            out[s.name] = _rms(C @ cov @ C.T + s.noise) or 1.0
        for a in self.spec.areas:
            if a.has_target:
                T = world.selector(a.tracks)
                out[a.name] = _rms(T @ cov @ T.T) or 1.0
            else:
                out[a.name] = 1.0
        return out

    def _factor(self, owner: str, name: str) -> float:
        if name == "M":
            return 1.0
        link = self.links[owner]
        sigma = self.link_scale[owner]
        if name == "K":
            return self.node_scale[link.target] / sigma
        if name == "G" or name == "S":
            return sigma / self.node_scale[link.source]
        pair = f"{link.target}->{link.source}"  # name == "P"
        return sigma / self.link_scale[pair]

    # -- flattening (private to the solver) --------------------------------
    def flat(self, theta: np.ndarray) -> np.ndarray:
        """The layout's flat gain vector (pins included) for ``theta``."""
        g = self.base.copy()
        g[self.free_at] = self.free_factor * theta
        return g

    def unpack(self, theta: np.ndarray) -> Gains:
        """Gains (pins included) for the solver's vector ``theta``."""
        return self.layout.unflatten(self.flat(theta))

    def units(self, theta: np.ndarray) -> np.ndarray:
        """Typical size of every free entry at ``theta``, for the solver.

        Noise units make 1 typical near an SNR of 1, and area gains ``M`` are
        unitless. At high SNR a link's sender gains grow like sqrt(SNR) and
        its receiver gains shrink alike, so a link whose sender gains have
        RMS ``s > 1`` gets units ``s`` (sender) and ``1/s`` (receiver)."""
        unit = np.ones(self.size)
        for owner, blocks in self.by_owner.items():
            sender = [sl for name, sl, shape in blocks if name in "GSP"]
            if not sender:
                continue
            s = float(np.sqrt(np.mean(np.concatenate([theta[sl] for sl in sender]) ** 2)))
            if s > 1:
                s = min(s, 1e12)
                for name, sl, shape in blocks:
                    unit[sl] = s if name in "GSP" else 1.0 / s
        return unit

    def area_radius(self, theta: np.ndarray) -> float:
        """Spectral radius of the area block of the closed loop at ``theta``."""
        return area_radius(self.layout, self.flat(theta))

    def pack(self, gains: Gains) -> np.ndarray:
        theta = np.zeros(self.size)
        for kind, owner, name, shape, factor, off in self.blocks:
            n = shape[0] * shape[1]
            theta[off:off + n] = np.asarray(getattr(gains, kind)[owner][name]).ravel() / factor
        return theta

    def _solution(self, theta: np.ndarray):
        """``(g, radius, solution)`` at ``theta``; the last one is kept, so
        that a gradient asked for at an accepted trial point costs only its
        adjoint."""
        last = self._last
        if last is not None and np.array_equal(last[0], theta):
            return last[1:]
        g = self.flat(theta)
        self.solves += 1
        radius, sol = _solve(self.layout, g, SEARCH_MARGIN)
        self._last = (np.array(theta, dtype=float), g, radius, sol)
        return g, radius, sol

    def _value(self, sol):
        return _priced_value(self.layout, sol, self.prices)

    def value_and_grad(self, theta: np.ndarray):
        """Relative objective ``J / reference`` and its gradient in solver
        units (``inf, None`` when the closed loop is unstable, or its area
        block within :data:`SEARCH_MARGIN` of the edge)."""
        self.evaluations += 1
        EVALUATIONS[0] += 1
        g, radius, sol = self._solution(theta)
        if sol is None:
            return float("inf"), None
        J, lam = self._value(sol)
        grad = _gradient(self.layout, g, sol, lam)
        return J / self.reference, self.free_factor * grad[self.free_at] / self.reference

    def value(self, theta: np.ndarray) -> float:
        """The objective of :meth:`value_and_grad` alone (the very same
        number), at about half the cost: for trial points that need no
        gradient. ``inf`` when the closed loop is unstable."""
        self.values += 1
        EVALUATIONS[0] += 1
        g, radius, sol = self._solution(theta)
        if sol is None:
            return float("inf")
        return self._value(sol)[0] / self.reference

    def preconditioner(self, theta: np.ndarray, unit: np.ndarray):
        """Block-diagonal inverse Hessian at ``theta``, in variables measured
        in ``unit``: one block per link (its sender and receiver gains) and
        per area (its ``M``), each from forward differences of the exact
        gradient (one gradient per free gain), its eigenvalues made positive
        (absolute values, at least ``PRECONDITION_FLOOR`` of the block's
        largest, or of the median block's largest if that is more). ``None`` where a difference leaves the stable set. Asked
        again within ``PRECONDITION_REUSE`` evaluations per gain, it returns
        the last one.

        The gains of one link, and of one area, are coupled far more
        strongly with each other than with the rest, and their scales differ
        by orders of magnitude at high SNR. A quasi-Newton model started from
        these blocks crosses those valleys at once: on a 16-area circuit's
        active sub-circuit (772 gains), 725 dense-BFGS iterations instead of
        6,659 from a scaled identity (``benchmarks/scale.py``, issue 12)."""
        n = len(theta)
        done = self.evaluations + self.values
        last = getattr(self, "_preconditioner", None)
        if last is not None and done - last[0] < PRECONDITION_REUSE * n:
            return last[1] / np.outer(unit, unit)
        g0 = self.value_and_grad(theta)[1]
        if g0 is None:
            return None
        parts = []
        for owner, blocks in self.by_owner.items():
            at = np.concatenate([np.arange(sl.start, sl.stop) for _, sl, _ in blocks])
            if not len(at):
                continue
            B = np.empty((len(at), len(at)))
            for k, j in enumerate(at):
                x = theta.copy()
                x[j] += PRECONDITION_STEP * unit[j]
                g = self.value_and_grad(x)[1]
                if g is None:
                    return None
                B[:, k] = (g[at] - g0[at]) * unit[at] / PRECONDITION_STEP
            w, V = np.linalg.eigh(0.5 * (B + B.T))
            parts.append((at, np.abs(w), V))
        # A block the objective does not feel (the gains of a link whose
        # partner is switched off) is floored against a typical block's
        # curvature, not its own zero: a floor of 1e-306 gave steps of 1e300
        # and an overflowed model at 32 generated areas.
        typical = float(np.median([w.max() for _, w, _ in parts])) if parts else 1.0
        H0 = np.zeros((n, n))
        for at, w, V in parts:
            w = np.maximum(w, PRECONDITION_FLOOR * max(float(w.max()), typical, 1e-300))
            H0[np.ix_(at, at)] = (V / w) @ V.T
        self._preconditioner = (self.evaluations + self.values, H0 * np.outer(unit, unit))
        return H0

    def slices(self, owner: str, names: str = "MGSPK") -> list:
        """Slices of ``theta`` holding the free gains ``names`` of one link or area."""
        return [sl for name, sl, shape in self.by_owner.get(owner, ()) if name in names]

    def sender_slices(self, link_id: str) -> list:
        return self.slices(link_id, "GSP")

    def sender_block(self, link_id: str):
        """``(slice, shape)`` of the free gain that forms a link's signal from
        its source (``G`` or ``S``), or ``None`` if it is pinned."""
        for name, sl, shape in self.by_owner.get(link_id, ()):
            if name in "GS":
                return sl, shape
        return None

    def receiver_slices(self, link_id: str) -> list:
        return self.slices(link_id, "K")

    # -- starting points ----------------------------------------------------
    def informed_start(self) -> Gains:
        """A stable, non-zero start that mimics a local Kalman-like circuit:
        each area carries its target's dynamics, predictions send what the
        receiver should see, residuals pass the difference with a moderate gain."""
        spec, world = self.spec, self.spec.world
        A = world.A
        g = Gains()
        for a in spec.areas:
            M = np.zeros((a.dim, a.dim))
            if a.has_target:
                T = world.selector(a.tracks)
                k = T.shape[0]
                M[:k, :k] = 0.9 * (T @ A @ T.T)
            g.areas[a.name] = {"M": M}
        link_shapes = gain_shapes(spec)["links"]
        for l in spec.links:
            shapes = link_shapes[l.id]
            blocks = {}
            for name, shape in shapes.items():
                blocks[name] = _eye(shape)
            if l.kind == PREDICTION:
                src = spec.area(l.source)
                G = np.zeros(shapes["G"])
                if src.has_target and spec.is_sensor(l.target):
                    T = world.selector(src.tracks)
                    CT = spec.sensor(l.target).C(world) @ T.T
                    r, c = min(G.shape[0], CT.shape[0]), min(G.shape[1], CT.shape[1])
                    G[:r, :c] = CT[:r, :c]
                else:
                    G = _eye(shapes["G"])
                blocks["G"] = G
            if "K" in blocks:
                blocks["K"] = 0.5 * blocks["K"] * (1.0 if l.kind != PREDICTION else 0.2)
            g.links[l.id] = blocks
        # Shrink until the loop is comfortably stable. Only the area block
        # shrinks: a slow world (radius 0.95 or more) would otherwise squash
        # every start onto the zero-gain saddle.
        for _ in range(40):
            if self.area_radius(self.pack(g)) < 0.95:
                break
            for blocks in g.links.values():
                if "K" in blocks:
                    blocks["K"] *= 0.7
            for blocks in g.areas.values():
                blocks["M"] *= 0.9
        return g

    def random_start(self, rng: np.random.Generator, scale: float = 0.3) -> np.ndarray:
        """A random start in solver units, shrunk until the area block of the
        loop is comfortably stable (see :meth:`informed_start`)."""
        theta = scale * rng.standard_normal(self.size) / np.sqrt(3.0)
        for _ in range(60):
            if self.area_radius(theta) < 0.95:
                return theta
            theta *= 0.7
        return theta


def _eye(shape) -> np.ndarray:
    return np.eye(*shape)
