"""Closed-loop matrices of a circuit for a given set of gains.

Stack the state ``xi = [x(t), x(t-1), ..., x(t-L); z_1; ...; z_A]`` (the world
augmented with delayed copies for lagged targets, then every area) and all
noises ``nu = [w; v_sensors...; eta_links...]`` with covariance ``Omega``. With
``q = [xi; nu]`` every quantity of one time step is linear in ``q``:

* the signal a link sends, ``s_l = Hq_l q``; what arrives, ``Rq_l q`` with
  ``Rq_l = Hq_l + (selector of eta_l)``;
* the next state, ``xi(t+1) = Psi q = Phi xi + Gamma nu``;
* an area's error, ``e_a = F_a q``.

Because ``xi(t)`` and ``nu(t)`` are independent, ``Cov(q) = blkdiag(Sigma,
Omega)`` where ``Sigma`` solves ``Sigma = Phi Sigma Phi' + Gamma Omega Gamma'``.
Timing (model.md): predictions are formed from ``z(t)``, residuals from sensor
values at ``t`` and the predictions received at ``t``, and areas move on to
``t+1``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .gains import Gains, gain_shapes, paired_prediction
from .model import PREDICTION, Spec


@dataclass(frozen=True)
class LinkLayout:
    id: str
    kind: str
    index: int
    dim: int
    source: str
    target: str
    target_is_area: bool
    noise: slice  # eta_l inside q
    pair: int | None  # index of the prediction a residual subtracts


class Layout:
    """Index bookkeeping for one spec: where every state and noise sits in q.

    Parameters
    ----------
    spec : Spec

    Examples
    --------
    >>> lay = Layout(spec)       # doctest: +SKIP
    >>> lay.nxi, lay.nq          # doctest: +SKIP
    (7, 15)
    """

    def __init__(self, spec: Spec):
        self.spec = spec
        world = spec.world
        n = world.dim
        self.n = n
        self.max_lag = max((a.lag for a in spec.areas if a.has_target), default=0)
        self.nx = n * (self.max_lag + 1)
        pos = self.nx
        self.area_slice = {}
        for a in spec.areas:
            self.area_slice[a.name] = slice(pos, pos + a.dim)
            pos += a.dim
        self.nxi = pos
        self.nz = self.nxi - self.nx
        # noises
        self.w_slice = slice(pos, pos + n)
        pos += n
        self.sensor_noise = {}
        for s in spec.sensors:
            self.sensor_noise[s.name] = slice(pos, pos + s.dim)
            pos += s.dim
        link_pos = {}
        for l in spec.links:
            link_pos[l.id] = slice(pos, pos + l.dim)
            pos += l.dim
        self.nq = pos
        self.nnu = self.nq - self.nxi
        index = {l.id: i for i, l in enumerate(spec.links)}
        self.links = []
        for i, l in enumerate(spec.links):
            pair = paired_prediction(spec, l)
            self.links.append(LinkLayout(
                id=l.id, kind=l.kind, index=i, dim=l.dim, source=l.source, target=l.target,
                target_is_area=not spec.is_sensor(l.target), noise=link_pos[l.id],
                pair=None if pair is None else index[pair.id],
            ))
        self.link_index = index
        self.shapes = gain_shapes(spec)

        # Constant pieces.
        A = world.A
        L = self.max_lag
        A_aug = np.zeros((self.nx, self.nx))
        A_aug[:n, :n] = A
        for i in range(1, L + 1):
            A_aug[i * n:(i + 1) * n, (i - 1) * n:i * n] = np.eye(n)
        self.A_aug = A_aug
        self.Omega = np.zeros((self.nnu, self.nnu))
        off = self.nxi
        self.Omega[self.w_slice.start - off:self.w_slice.stop - off, self.w_slice.start - off:self.w_slice.stop - off] = world.Q
        for s in spec.sensors:
            sl = self.sensor_noise[s.name]
            self.Omega[sl.start - off:sl.stop - off, sl.start - off:sl.stop - off] = s.noise
        for l in spec.links:
            sl = link_pos[l.id]
            self.Omega[sl.start - off:sl.stop - off, sl.start - off:sl.stop - off] = l.noise
        # Output map of every node (what u_b is, as rows over q).
        self.output = {}
        for s in spec.sensors:
            U = np.zeros((s.dim, self.nq))
            U[:, :n] = s.C(world)
            U[:, self.sensor_noise[s.name]] = np.eye(s.dim)
            self.output[s.name] = U
        for a in spec.areas:
            self.output[a.name] = self.state_rows(a.name)
        # Error maps F_a over q (zero rows for untargeted areas).
        self.error_map = {}
        self.target_map = {}
        for a in spec.areas:
            if not a.has_target:
                continue
            T = world.selector(a.tracks)
            k = T.shape[0]
            F = np.zeros((k, self.nq))
            F[:, self.area_slice[a.name].start:self.area_slice[a.name].start + k] = np.eye(k)
            F[:, a.lag * n:(a.lag + 1) * n] -= T
            self.error_map[a.name] = F
            Tq = np.zeros((k, self.nq))
            Tq[:, a.lag * n:(a.lag + 1) * n] = T
            self.target_map[a.name] = Tq
        self.price = np.array([l.price for l in spec.links], dtype=float)
        self.weight = {a.name: a.weight for a in spec.areas}
        self.activity_price = {a.name: a.activity_price for a in spec.areas}

    def state_rows(self, area: str) -> np.ndarray:
        sl = self.area_slice[area]
        Z = np.zeros((sl.stop - sl.start, self.nq))
        Z[:, sl] = np.eye(sl.stop - sl.start)
        return Z

    def noise_rows(self, link: LinkLayout) -> np.ndarray:
        E = np.zeros((link.dim, self.nq))
        E[:, link.noise] = np.eye(link.dim)
        return E


@dataclass
class ClosedLoop:
    """Closed-loop matrices for one set of gains.

    Attributes
    ----------
    Phi, Gamma : ndarray
        ``xi(t+1) = Phi xi(t) + Gamma nu(t)``.
    Omega : ndarray
        Covariance of ``nu``.
    sent : list of ndarray
        ``Hq_l``: the signal link ``l`` sends, as rows over ``q = [xi; nu]``.
    received : list of ndarray
        ``Rq_l``: what arrives at the link's receiver.
    """

    layout: Layout
    Phi: np.ndarray
    Gamma: np.ndarray
    Psi: np.ndarray
    sent: list
    received: list

    @property
    def Omega(self):
        return self.layout.Omega

    @property
    def H(self):
        """Signals as ``s = H xi + D nu`` (all links stacked)."""
        return np.vstack(self.sent)[:, :self.layout.nxi] if self.sent else np.zeros((0, self.layout.nxi))

    @property
    def D(self):
        return np.vstack(self.sent)[:, self.layout.nxi:] if self.sent else np.zeros((0, self.layout.nnu))


def assemble(layout: Layout, gains: Gains) -> ClosedLoop:
    """Build the closed-loop matrices of ``layout.spec`` for ``gains``.

    ``gains`` must be complete (see :func:`hierarchy.gains.check_gains`).

    Examples
    --------
    >>> loop = assemble(Layout(spec), gains)     # doctest: +SKIP
    >>> loop.Phi.shape                           # doctest: +SKIP
    (7, 7)
    """
    nq, nxi, nx = layout.nq, layout.nxi, layout.nx
    sent = [None] * len(layout.links)
    received = [None] * len(layout.links)
    # Predictions first: they depend only on the sender's state.
    for ll in layout.links:
        if ll.kind == PREDICTION:
            G = gains.links[ll.id]["G"]
            H = G @ layout.output[ll.source]
            sent[ll.index] = H
            received[ll.index] = H + layout.noise_rows(ll)
    for ll in layout.links:
        if ll.kind != PREDICTION:
            blocks = gains.links[ll.id]
            H = blocks["S"] @ layout.output[ll.source]
            if ll.pair is not None:
                H = H - blocks["P"] @ received[ll.pair]
            sent[ll.index] = H
            received[ll.index] = H + layout.noise_rows(ll)
    Psi = np.zeros((nxi, nq))
    Psi[:nx, :nx] = layout.A_aug
    Psi[:layout.n, layout.w_slice] = np.eye(layout.n)
    for a in layout.spec.areas:
        sl = layout.area_slice[a.name]
        Psi[sl, sl] = gains.areas[a.name]["M"]
    for ll in layout.links:
        if ll.target_is_area:
            Psi[layout.area_slice[ll.target]] += gains.links[ll.id]["K"] @ received[ll.index]
    return ClosedLoop(layout, Psi[:, :nxi], Psi[:, nxi:], Psi, sent, received)
