"""Closed-loop matrices of a circuit for a given set of gains.

Stack the state ``xi = [x(t), x(t-1), ..., x(t-L); z_1; ...; z_A; c]`` (the
world augmented with delayed copies for lagged targets, every area, then the
signals in flight on delayed links: a link of delay ``k`` keeps ``k - 1``
copies of its channel output, and its receiver reads the oldest) and all
noises ``nu = [w; v_sensors...; eta_links...]`` with covariance ``Omega``. With
``q = [xi; nu]`` every quantity of one time step is linear in ``q``:

* the signal a link sends, ``s_l = Hq_l q``; what arrives, ``Rq_l q`` with
  ``Rq_l = Hq_l + (selector of eta_l)``;
* the next state, ``xi(t+1) = Psi q = Phi xi + Gamma nu``;
* an area's error, ``e_a = F_a q``.

Because ``xi(t)`` and ``nu(t)`` are independent, ``Cov(q) = blkdiag(Sigma,
Omega)`` where ``Sigma`` solves ``Sigma = Phi Sigma Phi' + Gamma Omega Gamma'``.
Timing (docs/model.md): predictions are formed from ``z(t)``, residuals from sensor
values at ``t`` and the predictions received at ``t``, and areas move on to
``t+1``.

Those dense rows over ``q`` are what a simulation needs. The exact
evaluation works on a compact form instead (:class:`Structure`): with every
link's signal rows stacked (``m`` rows in all, in the order of the link
noises) and the node signals ``u = [y_sensors; z]``,

* ``Gs`` (``m x dim u``) holds each link's sender gain (``G`` or ``S``),
* ``Pm`` (``m x m``) each residual's ``P`` on its paired prediction's rows,
* ``Km`` (``dim z x m``) each receiver's ``K``, ``Mz`` the areas' ``M``;

then what arrives is ``R = (I - Pm)(Gs U + E)`` (``E`` picks the link
noises; ``Pm`` maps prediction rows into residual rows only, so ``Pm^2 = 0``
and ``(I + Pm)^-1 = I - Pm``), what is sent is ``R - E``, and the areas move
on as ``z(t+1) = Mz z + Km R q``. On a delayed link what arrives is a state
(its oldest copy), so its ``K`` and a residual's ``P`` on a delayed
prediction act on ``xi`` directly (``Kd``, ``Pd``); the copies' own rows are
fixed entries (``Km`` feeds the first copy, shifts move the rest), and the
"areas" block ``z`` of the compact form includes the copies. Every piece is a sum of small blocks, so
the link count enters only through sparse products and index gathers, never
through dense ``(nq x nq)`` matrices.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from hierarchy.loop.gains import Gains, gain_shapes, paired_prediction
from hierarchy.spec.model import PREDICTION, Spec

__all__ = ['Layout', 'LinkLayout', 'ClosedLoop', 'assemble', 'Structure', 'Parts', 'Entries', 'SparseProduct']


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
    delay: int = 1
    copies: slice | None = None  # the delay - 1 copies of what was received, inside xi

    @property
    def last_copy(self) -> slice | None:
        """Where the copy that arrives now sits in ``xi`` (``None`` without a delay)."""
        if self.copies is None:
            return None
        return slice(self.copies.stop - self.dim, self.copies.stop)


def _sums(idx, weights, minlength):
    """``np.bincount`` with weights, always float: with no entries at all
    (a circuit without links) bincount returns integers, and adding floats
    into them fails."""
    return np.bincount(idx, weights=weights, minlength=minlength).astype(float, copy=False)


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
        self.n_area_states = pos - self.nx
        # A link of delay k keeps k - 1 copies of what it received: copy j
        # holds the channel output of t - j (the noise entered once, at t - j).
        copies = {}
        for l in spec.links:
            if l.delay > 1:
                copies[l.id] = slice(pos, pos + (l.delay - 1) * l.dim)
                pos += (l.delay - 1) * l.dim
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
                delay=l.delay, copies=copies.get(l.id),
            ))
        self.delayed = [ll for ll in self.links if ll.delay > 1]
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
        # The flat gain vector: every block (pinned or free) in a fixed order,
        # so the exact evaluation reads gains by index instead of by name.
        self.gain_slots = {}
        pos = 0
        for kind in ("areas", "links"):
            for owner, blocks in self.shapes[kind].items():
                for name, shape in blocks.items():
                    self.gain_slots[(owner, name)] = (pos, shape)
                    pos += shape[0] * shape[1]
        self.n_gains = pos

    @cached_property
    def Omega(self) -> np.ndarray:
        """Covariance of ``nu`` (dense; only simulation and plain reference
        computations need it, so it is built on first use)."""
        Omega = np.zeros((self.nnu, self.nnu))
        off = self.nxi
        blocks = [(self.w_slice, self.spec.world.Q)]
        blocks += [(self.sensor_noise[s.name], s.noise) for s in self.spec.sensors]
        blocks += [(ll.noise, l.noise) for ll, l in zip(self.links, self.spec.links)]
        for sl, cov in blocks:
            Omega[sl.start - off:sl.stop - off, sl.start - off:sl.stop - off] = cov
        return Omega

    @cached_property
    def structure(self) -> "Structure":
        """The compact form used by the exact evaluation (built on first use)."""
        return Structure(self)

    def flatten(self, gains: Gains) -> np.ndarray:
        """Complete ``gains`` as one vector in the order of ``gain_slots``.

        Examples
        --------
        >>> lay.unflatten(lay.flatten(gains)).links["eye->v1"]["K"]   # doctest: +SKIP
        array([[0.5]])
        """
        out = np.empty(self.n_gains)
        for (owner, name), (off, shape) in self.gain_slots.items():
            table = gains.links if "->" in owner else gains.areas
            out[off:off + shape[0] * shape[1]] = np.asarray(table[owner][name], dtype=float).ravel()
        return out

    def unflatten(self, vec: np.ndarray) -> Gains:
        """The :class:`~hierarchy.loop.gains.Gains` that a flat vector holds."""
        g = Gains()
        for (owner, name), (off, shape) in self.gain_slots.items():
            table = g.links if "->" in owner else g.areas
            table.setdefault(owner, {})[name] = np.array(vec[off:off + shape[0] * shape[1]]).reshape(shape)
        return g

    def state_rows(self, area: str) -> np.ndarray:
        sl = self.area_slice[area]
        Z = np.zeros((sl.stop - sl.start, self.nq))
        Z[:, sl] = np.eye(sl.stop - sl.start)
        return Z

    def noise_rows(self, link: LinkLayout) -> np.ndarray:
        E = np.zeros((link.dim, self.nq))
        E[:, link.noise] = np.eye(link.dim)
        return E

    def copy_rows(self, link: LinkLayout) -> np.ndarray:
        """Rows over ``q`` of the copy that arrives now at a delayed link's receiver."""
        Z = np.zeros((link.dim, self.nq))
        Z[:, link.last_copy] = np.eye(link.dim)
        return Z


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
        ``Rq_l``: the channel's output now, ``Hq_l`` plus the link noise.
    arrived : list of ndarray
        What the link's receiver uses now: ``received`` for a link of delay
        1, else the oldest copy of it held in the state.
    """

    layout: Layout
    Phi: np.ndarray
    Gamma: np.ndarray
    Psi: np.ndarray
    sent: list
    received: list
    arrived: list

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

    ``gains`` must be complete (see :func:`hierarchy.loop.gains.check_gains`).

    Examples
    --------
    >>> loop = assemble(Layout(spec), gains)     # doctest: +SKIP
    >>> loop.Phi.shape                           # doctest: +SKIP
    (7, 7)
    """
    nq, nxi, nx = layout.nq, layout.nxi, layout.nx
    sent = [None] * len(layout.links)
    received = [None] * len(layout.links)
    arrived = [None] * len(layout.links)

    def send(ll, H):
        sent[ll.index] = H
        received[ll.index] = H + layout.noise_rows(ll)
        arrived[ll.index] = received[ll.index] if ll.copies is None else layout.copy_rows(ll)

    # Predictions first: they depend only on the sender's state.
    for ll in layout.links:
        if ll.kind == PREDICTION:
            send(ll, gains.links[ll.id]["G"] @ layout.output[ll.source])
    for ll in layout.links:
        if ll.kind != PREDICTION:
            blocks = gains.links[ll.id]
            H = blocks["S"] @ layout.output[ll.source]
            if ll.pair is not None:
                H = H - blocks["P"] @ arrived[ll.pair]
            send(ll, H)
    Psi = np.zeros((nxi, nq))
    Psi[:nx, :nx] = layout.A_aug
    Psi[:layout.n, layout.w_slice] = np.eye(layout.n)
    for a in layout.spec.areas:
        sl = layout.area_slice[a.name]
        Psi[sl, sl] = gains.areas[a.name]["M"]
    for ll in layout.links:
        if ll.target_is_area:
            Psi[layout.area_slice[ll.target]] += gains.links[ll.id]["K"] @ arrived[ll.index]
    for ll in layout.delayed:  # copies move one step along: the first takes what arrives now
        c0, d = ll.copies.start, ll.dim
        Psi[c0:c0 + d] = received[ll.index]
        Psi[c0 + d:ll.copies.stop, c0:ll.copies.stop - d] = np.eye(ll.copies.stop - c0 - d)
    return ClosedLoop(layout, Psi[:, :nxi], Psi[:, nxi:], Psi, sent, received, arrived)


# ---------------------------------------------------------------------------
# The compact form (see the module docstring)


@dataclass(frozen=True)
class Entries:
    """Where the entries of one kind of gain sit: ``rows`` and ``cols`` in
    its global matrix, ``at`` in the flat gain vector (one per entry)."""

    rows: np.ndarray
    cols: np.ndarray
    at: np.ndarray

    @staticmethod
    def of(blocks) -> "Entries":
        """Entries of blocks given as ``(row0, col0, at0, (h, w))``, each
        stored row by row from ``at0`` in the flat vector."""
        rows, cols, at = [np.zeros(0, int)], [np.zeros(0, int)], [np.zeros(0, int)]
        for r0, c0, a0, (h, w) in blocks:
            rows.append(r0 + np.repeat(np.arange(h), w))
            cols.append(c0 + np.tile(np.arange(w), h))
            at.append(a0 + np.arange(h * w))
        return Entries(np.concatenate(rows), np.concatenate(cols), np.concatenate(at))


class SparseProduct:
    """Products ``A @ X`` with a matrix ``A`` known by its entries (row,
    column), whose values change from call to call.

    Small products are a gather of the rows of ``X`` and a sorted segment
    sum; large ones go to one scipy CSR matrix built here and refilled in
    place (building a scipy.sparse object per call would cost more than the
    small products themselves, and the segment sum is slower than scipy's
    compiled kernel on large ones).

    Examples
    --------
    >>> A = SparseProduct(np.array([0, 1, 1]), np.array([1, 0, 1]), (2, 2))
    >>> A.matmul(np.array([2.0, 3.0, 4.0]), np.eye(2))
    array([[0., 2.],
           [3., 4.]])
    """

    #: Above this many multiplications a product goes to the CSR kernel.
    CSR_WORK = 20_000

    def __init__(self, rows: np.ndarray, cols: np.ndarray, shape):
        import scipy.sparse as sp

        self.order = np.lexsort((cols, rows))
        self.cols = cols[self.order]
        self.targets, self.starts = np.unique(rows[self.order], return_index=True)
        self.shape = shape
        indptr = np.searchsorted(rows[self.order], np.arange(shape[0] + 1))
        self.csr = sp.csr_matrix((np.zeros(len(cols)), self.cols, indptr), shape=shape)

    def matmul(self, values: np.ndarray, X: np.ndarray) -> np.ndarray:
        """``A @ X`` where ``values`` are ``A``'s entries in the order given
        to the constructor."""
        if len(self.cols) * X.shape[1] > self.CSR_WORK:
            self.csr.data[:] = values[self.order]
            return self.csr @ X
        out = np.zeros((self.shape[0], X.shape[1]))
        if len(self.cols):
            terms = X[self.cols]
            terms *= values[self.order, None]
            out[self.targets] = np.add.reduceat(terms, self.starts, axis=0)
        return out


@dataclass
class Parts:
    """The compact closed loop for one flat gain vector.

    ``B = Gs U_xi`` and ``H = (I - Pm) B`` are the link rows over ``xi`` (what
    is sent, before and after subtracting predictions), held by their
    entries ``b`` and ``h`` on the fixed patterns of :class:`Structure`
    (a link row has only its sender's and its paired prediction's columns);
    ``Phi_z`` the area rows of ``Phi``; ``Gv`` the sender gains on sensor
    readings (``m x dim v``); ``Q1 = Km Gv`` and ``Q2 = Km (I - Pm)`` map
    sensor and link noises into the areas (``q2`` holds ``Q2``'s entries,
    ``q2_omega`` those of ``Q2 Omega_eta``); ``p`` and ``k`` are the entries
    of ``Pm`` and ``Km`` and ``P_omega`` holds ``(Pm Omega_eta)`` at ``Pm``'s
    entries.
    """

    b: np.ndarray
    h: np.ndarray
    Phi_z: np.ndarray
    Gv: np.ndarray
    p: np.ndarray
    k: np.ndarray
    Q1: np.ndarray
    q2: np.ndarray
    q2_omega: np.ndarray
    P_omega: np.ndarray


def _pairs(left: np.ndarray, right: np.ndarray):
    """Every index pair ``(i, j)`` with ``left[i] == right[j]``: the terms of
    a product of two sparse patterns that share the inner index.

    Examples
    --------
    >>> i, j = _pairs(np.array([0, 1, 1]), np.array([1, 0, 1]))
    >>> sorted(zip(i.tolist(), j.tolist()))
    [(0, 1), (1, 0), (1, 2), (2, 0), (2, 2)]
    """
    left, right = np.asarray(left, dtype=int), np.asarray(right, dtype=int)
    order = np.argsort(right, kind="stable")
    lo = np.searchsorted(right[order], left, "left")
    counts = np.searchsorted(right[order], left, "right") - lo
    i = np.repeat(np.arange(len(left)), counts)
    shift = np.repeat(lo - (np.cumsum(counts) - counts), counts)
    return i, order[shift + np.arange(len(i))]


class Structure:
    """Index maps and constant matrices of the compact form of one layout.

    Rows of link signals are numbered as the link noises in ``nu`` are (spec
    order); columns of ``Gv`` as the sensor noises. Built once per
    :class:`Layout`.

    Examples
    --------
    >>> st = Layout(spec).structure                        # doctest: +SKIP
    >>> parts = st.parts(layout.flatten(gains))            # doctest: +SKIP
    >>> parts.Phi_z.shape == (st.nz, st.nxi)               # doctest: +SKIP
    True
    """

    def __init__(self, layout: Layout):
        spec, world = layout.spec, layout.spec.world
        self.layout = layout
        self.n, self.nx, self.nz, self.nxi = layout.n, layout.nx, layout.nz, layout.nxi
        nx = self.nx
        eta0 = layout.nxi + layout.n + sum(s.dim for s in spec.sensors)
        v0 = layout.nxi + layout.n
        self.m = layout.nq - eta0
        self.nv = eta0 - v0
        rows = {ll.id: ll.noise.start - eta0 for ll in layout.links}
        dims = np.array([ll.dim for ll in layout.links], dtype=int)
        self.row_link = np.repeat(np.arange(len(layout.links)), dims)
        self.link_start = np.array([rows[ll.id] for ll in layout.links], dtype=int)
        vcol = {s.name: layout.sensor_noise[s.name].start - v0 for s in spec.sensors}
        zcol = {a.name: layout.area_slice[a.name].start - nx for a in spec.areas}

        slot = layout.gain_slots
        self.M = Entries.of((zcol[a.name], zcol[a.name], *slot[(a.name, "M")]) for a in spec.areas)
        # Delayed links: what arrives is a state (the oldest copy), so their
        # K is a gain from a state (like M) and a residual's P on a delayed
        # prediction is a sender gain on a state (like G, with a minus sign).
        arrive = {ll.id: ll.last_copy.start - nx for ll in layout.delayed}
        gz, gv, pm, km, kd, pd = [], [], [], [], [], []
        for ll in layout.links:
            sender = "G" if ll.kind == PREDICTION else "S"
            if ll.source in vcol:
                gv.append((rows[ll.id], vcol[ll.source], *slot[(ll.id, sender)]))
            else:
                gz.append((rows[ll.id], zcol[ll.source], *slot[(ll.id, sender)]))
            if ll.pair is not None:
                pair = layout.links[ll.pair]
                if pair.copies is None:
                    pm.append((rows[ll.id], rows[pair.id], *slot[(ll.id, "P")]))
                else:
                    pd.append((rows[ll.id], arrive[pair.id], *slot[(ll.id, "P")]))
            if ll.target_is_area:
                if ll.copies is None:
                    km.append((zcol[ll.target], rows[ll.id], *slot[(ll.id, "K")]))
                else:
                    kd.append((zcol[ll.target], arrive[ll.id], *slot[(ll.id, "K")]))
        self.Gz, self.Gv, self.P = (Entries.of(b) for b in (gz, gv, pm))
        self.Kd, self.Pd = Entries.of(kd), Entries.of(pd)
        # The first copy of a delayed link takes what its channel puts out:
        # fixed entries 1 in Km, read from the slot just past the gains.
        self.one = layout.n_gains
        self.delays = bool(layout.delayed)  # without any, every delay step below is skipped
        feed = [(ll.copies.start - nx + np.arange(ll.dim), rows[ll.id] + np.arange(ll.dim))
                for ll in layout.delayed]
        K = Entries.of(km)
        self.K = Entries(np.concatenate([K.rows] + [r for r, _ in feed]).astype(int),
                         np.concatenate([K.cols] + [c for _, c in feed]).astype(int),
                         np.concatenate([K.at] + [np.full(len(r), self.one) for r, _ in feed]).astype(int))
        # ... and each later copy the one before it (fixed entries 1 in Phi_z).
        shift = [(ll.copies.start - nx + ll.dim + np.arange(ll.copies.stop - ll.copies.start - ll.dim),
                  ll.copies.start - nx + np.arange(ll.copies.stop - ll.copies.start - ll.dim))
                 for ll in layout.delayed]
        self.shift = (np.concatenate([np.zeros(0, int)] + [r for r, _ in shift]).astype(int),
                      np.concatenate([np.zeros(0, int)] + [c for _, c in shift]).astype(int))
        # Links grouped by signal size, with their rows (for batched per-link
        # covariances), and where each residual's P block starts among Pm's entries.
        by_dim = {}
        for ll in layout.links:
            by_dim.setdefault(ll.dim, []).append(ll.index)
        self.link_groups = [(idx, self.link_start[idx][:, None] + np.arange(d)) for d, idx in by_dim.items()]
        starts = np.cumsum([0] + [h * w for *_, (h, w) in pm])
        undelayed_pairs = [ll for ll in layout.links
                           if ll.pair is not None and layout.links[ll.pair].copies is None]
        self.p_blocks = {ll.index: (int(e0), (ll.dim, layout.links[ll.pair].dim))
                         for ll, e0 in zip(undelayed_pairs, starts)}
        self.PmT = SparseProduct(self.P.cols, self.P.rows, (self.m, self.m))
        self.Km = SparseProduct(self.K.rows, self.K.cols, (self.nz, self.m))
        self.KmT = SparseProduct(self.K.cols, self.K.rows, (self.m, self.nz))

        # Constant matrices: sensor views, noise covariances.
        self.C_all = np.vstack([s.C(world) for s in spec.sensors])
        self.Omega_v = np.zeros((self.nv, self.nv))
        for s in spec.sensors:
            sl = slice(vcol[s.name], vcol[s.name] + s.dim)
            self.Omega_v[sl, sl] = s.noise
        noise = Entries.of((rows[l.id], rows[l.id], 0, l.noise.shape) for l in spec.links)
        self.eta = noise
        self.omega_eta = np.concatenate([[0.0]] + [l.noise.ravel() for l in spec.links])[1:]
        # (Pm Omega_eta) at each entry of Pm: entry (i, j) of P_l sums P_l[i, c] N_p[c, j]
        # over the paired prediction's noise N_p (Omega_eta is block diagonal).
        dst, src, val, base = [], [], [], 0
        for ll in undelayed_pairs:  # a delayed prediction's noise is in the state
            N = spec.links[ll.pair].noise
            h, w = ll.dim, N.shape[0]
            i, j, c = (a.ravel() for a in np.meshgrid(np.arange(h), np.arange(w), np.arange(w), indexing="ij"))
            dst.append(base + i * w + j)
            src.append(base + i * w + c)
            val.append(N[c, j])
            base += h * w
        cat = (lambda xs, dtype: np.concatenate(xs).astype(dtype) if xs else np.zeros(0, dtype))
        self.p_omega = (cat(dst, int), cat(src, int), cat(val, float))
        # (Km' Y) at each entry (i, j) of Pm needs the K entries in column i.
        by_col = {}
        for f, c in enumerate(self.K.cols):
            by_col.setdefault(int(c), []).append(f)
        pk_e, pk_f = [], []
        for e, i in enumerate(self.P.rows):
            for f in by_col.get(int(i), ()):
                pk_e.append(e)
                pk_f.append(f)
        self.p_k = (np.array(pk_e, dtype=int), np.array(pk_f, dtype=int))

        # Error rows F (over xi), their weights, and the fixed part of the cost
        # matrix on the area rows (errors and activity prices).
        self.targets = [a for a in spec.areas if a.has_target]
        F = np.vstack([layout.error_map[a.name][:, :layout.nxi] for a in self.targets]) if self.targets \
            else np.zeros((0, layout.nxi))
        self.F = F
        k = [layout.error_map[a.name].shape[0] for a in self.targets]
        self.target_start = np.concatenate([[0], np.cumsum(k)[:-1]]).astype(int) if k else np.zeros(0, int)
        self.w_rows = np.repeat([a.weight for a in self.targets], k)
        W = F.T @ (self.w_rows[:, None] * F)
        kappa = np.concatenate([np.full(a.dim, a.activity_price) for a in spec.areas]
                               + [np.zeros(self.nz - layout.n_area_states)])
        W[nx:, nx:] += np.diag(kappa)
        self.Wz_fixed = W[nx:, :]
        self.area_start = np.array([zcol[a.name] for a in spec.areas], dtype=int)
        self.n_area_states = layout.n_area_states
        self.kappa = np.array([a.activity_price for a in spec.areas])
        self._patterns()
        # The world's stationary part, solved by hierarchy.loop.evaluate on first use.
        self.world = None

    def _patterns(self):
        """Fixed sparsity patterns of the link rows and the noise maps, and
        the index pairs of every product the evaluation forms from them.

        A link row has at most its sender's columns and its paired
        prediction's: a handful of entries, where dense ``m x dim xi`` rows
        made the link rows, ``H' diag(price) H`` and the gradient on ``K``
        the bulk of an evaluation at a few hundred links. Patterns are
        structural (from the positions of the gains), so the same index
        maps serve every gain vector. Keys are ``row * columns + column``."""
        nx, nxi, nz, m = self.nx, self.nxi, self.nz, self.m
        # B = Gv C (sensor senders) + Gz (area senders) on the xi columns.
        Cr, Cc = np.nonzero(self.C_all)
        gi, ci = _pairs(self.Gv.cols, Cr)
        kv = self.Gv.rows[gi] * nxi + Cc[ci]
        kz = self.Gz.rows * nxi + nx + self.Gz.cols
        # A residual's P on a delayed prediction acts on a state, like a sender gain.
        kd = self.Pd.rows * nxi + nx + self.Pd.cols
        bkeys = np.unique(np.concatenate([kv, kz, kd]))
        self.b_gv = (np.searchsorted(bkeys, kv), gi, self.C_all[Cr[ci], Cc[ci]])
        self.b_gz = np.searchsorted(bkeys, kz)
        self.b_pd = np.searchsorted(bkeys, kd)
        self.b_rows, self.b_cols = bkeys // nxi, bkeys % nxi
        # H = B - Pm B: each residual row takes its paired prediction's entries.
        pe, bf = _pairs(self.P.cols, self.b_rows)
        kp = self.P.rows[pe] * nxi + self.b_cols[bf]
        hkeys = np.unique(np.concatenate([bkeys, kp]))
        self.h_b = np.searchsorted(hkeys, bkeys)
        self.h_p = (np.searchsorted(hkeys, kp), pe, bf)
        self.h_rows, self.h_cols = hkeys // nxi, hkeys % nxi
        # Km H (the area rows of Phi, dense), and entries of H' H by row.
        ke, kh = _pairs(self.K.cols, self.h_rows)
        self.km_h = (ke, kh, self.K.rows[ke] * nxi + self.h_cols[kh])
        f1, f2 = _pairs(self.h_rows, self.h_rows)
        self.hh = (f1, f2, self.h_cols[f1] * nxi + self.h_cols[f2])
        area = self.h_cols[f1] >= nx
        self.hh_z = (f1[area], f2[area], (self.h_cols[f1[area]] - nx) * nxi + self.h_cols[f2[area]])
        # Q2 = Km - Km Pm on (area state, link row), Q2 Omega_eta, and Q2 Omega_eta Q2'.
        pk_e, pk_f = self.p_k
        kk = self.K.rows * m + self.K.cols
        kq = self.K.rows[pk_f] * m + self.P.cols[pk_e]
        qkeys = np.unique(np.concatenate([kk, kq]))
        self.q_k, self.q_p = np.searchsorted(qkeys, kk), np.searchsorted(qkeys, kq)
        self.q_rows, self.q_cols = qkeys // m, qkeys % m
        qa, ob = _pairs(self.q_cols, self.eta.rows)
        ko = self.q_rows[qa] * m + self.eta.cols[ob]
        okeys = np.unique(ko)
        self.q_omega = (np.searchsorted(okeys, ko), qa, ob)
        self.o_rows, self.o_cols = okeys // m, okeys % m
        vo, vq = _pairs(self.o_cols, self.q_cols)
        self.v2 = (vo, vq, self.o_rows[vo] * nz + self.q_rows[vq])

    def dense_h(self, h: np.ndarray) -> np.ndarray:
        """The link rows ``H`` (``m x dim xi``) from their entries ``h``."""
        H = np.zeros((self.m, self.nxi))
        H[self.h_rows, self.h_cols] = h
        return H

    def parts(self, g: np.ndarray) -> Parts:
        """The compact closed loop for the flat gain vector ``g``."""
        nx, nxi = self.nx, self.nxi
        if self.delays:
            g = np.append(g, 1.0)  # slot `one`: the fixed entries of delayed links
        Gv = np.zeros((self.m, self.nv))
        Gv[self.Gv.rows, self.Gv.cols] = g[self.Gv.at]
        dst, gi, cv = self.b_gv
        nb = len(self.b_rows)
        b = _sums(dst, weights=g[self.Gv.at][gi] * cv, minlength=nb)
        b[self.b_gz] += g[self.Gz.at]
        if self.delays:
            b[self.b_pd] -= g[self.Pd.at]
        p, k = g[self.P.at], g[self.K.at]
        h = np.zeros(len(self.h_rows))
        h[self.h_b] = b
        dst, pe, bf = self.h_p
        h -= _sums(dst, weights=p[pe] * b[bf], minlength=len(h))
        ke, kh, dst = self.km_h
        Phi_z = _sums(dst, weights=k[ke] * h[kh], minlength=self.nz * nxi).reshape(self.nz, nxi)
        Phi_z[self.M.rows, nx + self.M.cols] += g[self.M.at]
        if self.delays:
            Phi_z[self.Kd.rows, nx + self.Kd.cols] += g[self.Kd.at]
            Phi_z[self.shift[0], nx + self.shift[1]] += 1.0
        pk_e, pk_f = self.p_k
        nq = len(self.q_rows)
        q2 = _sums(self.q_k, weights=k, minlength=nq)
        q2 -= _sums(self.q_p, weights=k[pk_f] * p[pk_e], minlength=nq)
        dst, qa, ob = self.q_omega
        q2_omega = _sums(dst, weights=q2[qa] * self.omega_eta[ob], minlength=len(self.o_rows))
        dst, src, val = self.p_omega
        P_omega = _sums(dst, weights=p[src] * val, minlength=len(p))
        return Parts(b, h, Phi_z, Gv, p, k, self.Km.matmul(k, Gv), q2, q2_omega, P_omega)
