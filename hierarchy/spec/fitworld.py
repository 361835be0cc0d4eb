"""A world fitted from data: least-squares VAR(p) with a stated block structure.

A recording (a CSV with a header row, or a 2-D ``.npy`` array, one column per
channel and one row per time step) is fitted by the vector autoregression

    x(t) = c + A_1 x(t-1) + ... + A_p x(t-p) + w(t),      w ~ N(0, Q),

where the channels are grouped into the named world blocks the user states.
Couplings from one block into another may be set to zero; each equation is
then fitted by least squares on the lagged channels it is allowed to see (a
restricted least-squares fit, equation by equation). The constant ``c`` only
absorbs the recording's mean: the tool's world is zero-mean, so ``c`` is
reported and dropped.

The fit becomes the spec's ``world:`` section:

* with ``p = 1`` each block is one world block, its own ``A`` block its
  ``dynamics``, the blocks from the others its ``driven_by``;
* with ``p > 1`` the lag order is reduced to state form: block ``B`` keeps its
  current channels (so sensors observe and areas track ``B`` as before) and
  gains blocks ``B-lag1 ... B-lag{p-1}`` that hold its past values, each a
  noiseless copy of the one before it (``driven_by: {B: identity}``); ``B``'s
  equation reads the lagged blocks through ``driven_by``.

The model's process noise is block-diagonal (one covariance per block), so a
noise correlation between two blocks cannot be written: it is dropped, and the
largest one dropped is reported. Put channels whose noises are correlated in
the same block.

Fit quality: the stability margin ``1 - rho`` (``rho`` the spectral radius of
the state-form transition matrix; the spec needs ``rho < 1``), ``R^2`` per
channel, the Ljung-Box statistic of each channel's residuals and the
multivariate portmanteau statistic of all residuals (Lütkepohl 2005, *New
Introduction to Multiple Time Series Analysis*, section 4.4.3), with their
p-values. A small p-value says the residuals are not white: a higher lag order
may be needed.

Examples
--------
>>> fit = fit_world(load_recording("specs/recordings/river-gauge.csv"),
...                 {"upstream": ["flow"], "station": ["level_a", "level_b"]})
>>> fit.margin > 0
True
"""

from __future__ import annotations

import csv
import io as _io
import math
import os
from dataclasses import dataclass, field

import numpy as np

from hierarchy.errors import InputError
from hierarchy.spec.rules import MAX_NUMBER, STABLE_RADIUS  # the spec's limits: a fitted world must be one a spec holds

__all__ = ["Recording", "WorldFit", "load_recording", "parse_blocks", "parse_zeros", "fit_world",
           "world_dict", "world_yaml", "into_template", "check_world_output", "write_world", "ljung_box", "portmanteau", "fit_text"]

#: Largest recording file read (bytes).
MAX_FILE = 200_000_000
#: Largest lag order: the state form holds p copies of the world, and the
#: spec's sizes are bounded (docs/spec.md, "Sizes").
MAX_LAGS = 50
#: Residual degrees of freedom needed per equation (common practice, no
#: source: fewer leaves the noise covariance and the tests meaningless).
MIN_DOF = 10
#: A stability margin below this is reported as a warning (the world's slowest
#: mode then takes more than 100 steps to decay by 1/e).
THIN_MARGIN = 0.01


@dataclass(frozen=True)
class Recording:
    """A multichannel time series: ``data`` is ``(steps, channels)``."""

    channels: tuple
    data: np.ndarray
    path: str = "data"


def _bad(place, message, fix):
    raise InputError(message, place=place, fix=fix)


def load_recording(path) -> Recording:
    """Read a recording: a CSV file with a header row of channel names, or a
    ``.npy`` file holding a 2-D float array (steps x channels; its channels
    are named ``0``, ``1``, ...). A 1-D array is one channel.

    Raises
    ------
    InputError
        Naming the file, row and column of a ragged row, a missing or
        non-numeric value, NaN or infinity.

    Examples
    --------
    >>> rec = load_recording("specs/recordings/river-gauge.csv")   # doctest: +SKIP
    >>> rec.channels                                              # doctest: +SKIP
    ('flow', 'level_a', 'level_b')
    """
    from hierarchy.io import ReadRefused, read_bytes

    path = os.fspath(path)
    try:
        raw = read_bytes(path, MAX_FILE)
    except ReadRefused as exc:
        _bad(path, f"cannot read the recording: {exc}", "give the path of a CSV or .npy file")
    if path.lower().endswith(".npy"):
        return _from_npy(path, raw)
    return _from_csv(path, raw)


def _from_npy(path, raw) -> Recording:
    try:
        arr = np.load(_io.BytesIO(raw), allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        _bad(path, f"this is not a readable .npy array ({' '.join(str(exc).split()) or 'bad header'})",
             "save the recording with numpy.save(path, array) (no pickled objects)")
    if not isinstance(arr, np.ndarray) or arr.dtype.kind not in "fiub" or arr.ndim not in (1, 2):
        _bad(path, f"expected a 1-D or 2-D array of numbers; got {getattr(arr, 'ndim', '?')}-D of dtype "
                   f"{getattr(arr, 'dtype', '?')}", "save a float array of shape (steps, channels)")
    data = np.asarray(arr, dtype=float)
    if data.ndim == 1:
        data = data[:, None]
    bad = np.argwhere(~np.isfinite(data))
    if bad.size:
        r, c = bad[0]
        _bad(f"{path}: row {r}, column {c}", f"the value is {data[r, c]}, not a finite number",
             "fill the gap (e.g. interpolate) or cut the recording before it: the fit needs consecutive "
             "finite samples")
    return Recording(tuple(str(i) for i in range(data.shape[1])), data, path)


def _from_csv(path, raw) -> Recording:
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        _bad(path, "the file is not UTF-8 text", "give a CSV file (or a .npy array, named *.npy)")
    rows = list(csv.reader(_io.StringIO(text)))
    while rows and not any(c.strip() for c in rows[-1]):
        rows.pop()  # trailing blank lines
    if not rows:
        _bad(path, "the file is empty", "give a CSV file with a header row of channel names and one row per step")
    header = [c.strip() for c in rows[0]]
    if all(_number(c) is not None for c in header):
        _bad(f"{path}: line 1", "the first line holds numbers, not channel names",
             "add a header row naming each column, e.g. `flow,level_a,level_b`")
    for i, name in enumerate(header):
        if not name:
            _bad(f"{path}: line 1, column {i + 1}", "a channel has no name", "name every column in the header")
        if header.index(name) != i:
            _bad(f"{path}: line 1, column {i + 1}", f"the channel name `{name}` is used twice",
                 "give each column its own name")
    data = np.empty((len(rows) - 1, len(header)))
    for n, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            _bad(f"{path}: line {n}", f"this row has {len(row)} field(s) but the header names {len(header)}",
                 "give every row one value per channel (a missing value cannot be fitted: fill or cut it)")
        for j, cell in enumerate(row):
            v = _number(cell)
            if v is None or not math.isfinite(v):
                what = "empty" if not cell.strip() else f"`{cell.strip()}`, not a finite number"
                _bad(f"{path}: line {n}, column `{header[j]}`", f"the value is {what}",
                     "fill the gap (e.g. interpolate) or cut the recording before it: the fit needs "
                     "consecutive finite samples")
            data[n - 2, j] = v
    return Recording(tuple(header), data, path)


def _number(text):
    try:
        return float(text)
    except ValueError:
        return None


# ---------------------------------------------------------------------------
# the block structure


_FORBIDDEN = ("->", "[", "]", ".")


def _check_name(name, place):
    if not name.strip() or any(f in name for f in _FORBIDDEN):
        _bad(place, f"`{name}` cannot name a world block (names are not blank and hold no `->`, `[`, `]` "
                    "or `.`)", "choose another block name, e.g. `slow`")


def parse_blocks(items, channels) -> dict:
    """Read ``--blocks`` items ``NAME=CH[,CH...]`` into ``{name: [channels]}``
    (in the order given). Without items, every channel is in one block
    ``world``.

    Examples
    --------
    >>> parse_blocks(["slow=a", "fast=b,c"], ("a", "b", "c"))
    {'slow': ['a'], 'fast': ['b', 'c']}
    """
    channels = list(channels)
    if not items:
        return {"world": channels}
    out, owner = {}, {}
    for item in items:
        name, eq, chans = str(item).partition("=")
        name = name.strip()
        if not eq or not chans.strip():
            _bad(f"--blocks {item}", "a block is written NAME=CHANNEL[,CHANNEL...]",
                 f"e.g. --blocks slow={channels[0]}" + (f" fast={','.join(channels[1:3])}" if len(channels) > 1
                                                        else ""))
        _check_name(name, f"--blocks {item}")
        if name in out:
            _bad(f"--blocks {item}", f"the block `{name}` is named twice", "give each block once, with all "
                                                                             "its channels")
        out[name] = []
        for ch in (c.strip() for c in chans.split(",")):
            if ch not in channels:
                import difflib

                near = difflib.get_close_matches(ch, channels, n=1)
                _bad(f"--blocks {item}", f"the recording has no channel `{ch}`"
                     + (f" (did you mean `{near[0]}`?)" if near else ""),
                     "channels: " + ", ".join(channels[:20]) + (" ..." if len(channels) > 20 else ""))
            if ch in owner:
                _bad(f"--blocks {item}", f"the channel `{ch}` is already in block `{owner[ch]}`",
                     "put each channel in one block")
            owner[ch] = name
            out[name].append(ch)
    return out


def parse_zeros(items, blocks) -> set:
    """Read ``--zero`` items ``SRC->DST`` (or ``SRC:DST``, shell-safe; or
    ``all``): the couplings from block ``SRC`` into block ``DST`` fixed at 0.
    Returns ``{(src, dst)}``.

    Examples
    --------
    >>> sorted(parse_zeros(["slow:fast"], {"slow": ["a"], "fast": ["b"]}))
    [('slow', 'fast')]
    """
    out = set()
    for item in items or ():
        text = str(item).strip()
        if text == "all":
            out |= {(a, b) for a in blocks for b in blocks if a != b}
            continue
        src, sep, dst = text.partition("->") if "->" in text else text.partition(":")
        src, dst = src.strip(), dst.strip()
        if not sep or not src or not dst:
            _bad(f"--zero {item}", "a coupling is written SRC:DST (block SRC does not drive block DST), or `all`",
                 "e.g. --zero " + ":".join((list(blocks) * 2)[:2]))
        for b in (src, dst):
            if b not in blocks:
                _bad(f"--zero {item}", f"there is no block `{b}`", "blocks: " + ", ".join(blocks))
        if src == dst:
            _bad(f"--zero {item}", "a block's own dynamics cannot be set to zero this way",
                 "name two different blocks")
        out.add((src, dst))
    return out


# ---------------------------------------------------------------------------
# the fit


@dataclass
class WorldFit:
    """A fitted world and how well it fits.

    Attributes
    ----------
    blocks : dict
        ``{block: [channels]}``, in state order.
    lags : int
        The lag order ``p``.
    coefs : ndarray
        ``(p, n, n)``: ``coefs[k]`` is ``A_{k+1}`` over the fitted channels
        (block order).
    intercept : ndarray
        The fitted constant ``c`` (zero when the mean was not fitted).
    noise : ndarray
        The residual covariance (``n x n``), scaled by the residual degrees
        of freedom of each equation.
    A, Q : ndarray
        The state-form world (``n p`` square): what the spec will hold
        (``Q`` block-diagonal, unlike ``noise``).
    radius, margin : float
        Spectral radius of ``A`` and ``1 - radius``.
    r2 : dict
        ``{channel: R^2}``.
    ljung_box : dict
        ``{channel: (statistic, dof, p_value)}`` at ``whiteness_lags``.
    whiteness : tuple
        ``(statistic, dof, p_value)`` of the multivariate portmanteau test.
    dropped_correlation : float
        The largest absolute noise correlation between two blocks, which the
        block-diagonal noise of the model drops (0 with one block).
    warnings : list of str
    """

    blocks: dict
    lags: int
    coefs: np.ndarray
    intercept: np.ndarray
    noise: np.ndarray
    residuals: np.ndarray
    A: np.ndarray
    Q: np.ndarray
    radius: float
    margin: float
    r2: dict
    ljung_box: dict
    whiteness: tuple
    whiteness_lags: int
    dropped_correlation: float
    zeros: tuple
    samples: int
    source: str = "data"
    ignored: tuple = ()
    warnings: list = field(default_factory=list)

    @property
    def channels(self) -> list:
        return [c for chans in self.blocks.values() for c in chans]


def fit_world(recording: Recording, blocks=None, *, lags=1, zeros=(), mean=True, whiteness_lags=None) -> WorldFit:
    """Fit a block-structured VAR(``lags``) to ``recording`` by least squares.

    Parameters
    ----------
    recording : Recording
    blocks : dict, optional
        ``{block: [channel names]}`` (see :func:`parse_blocks`); default one
        block ``world`` of every channel. Channels in no block are not used.
    lags : int
        The lag order ``p`` (1 or more).
    zeros : iterable of (str, str)
        ``(src, dst)``: block ``src`` does not drive block ``dst`` (at any lag).
    mean : bool
        Fit a constant (the recording's mean); ``False`` when the data are
        already zero-mean.
    whiteness_lags : int, optional
        Lags of the whiteness tests (default ``min(10, steps // 5)``, at
        least ``lags + 1``).

    Raises
    ------
    InputError
        Too few samples, a constant or collinear channel, a fit with no
        stationary regime (spectral radius >= 1), numbers too large for a
        spec. Each names the place and the fix.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> x = np.zeros((2000, 1))
    >>> for t in range(1, 2000):
    ...     x[t] = 0.8 * x[t - 1] + rng.normal()
    >>> fit = fit_world(Recording(("x",), x), lags=1)
    >>> round(float(fit.A[0, 0]), 1)
    0.8
    """
    blocks = dict(blocks) if blocks else {"world": list(recording.channels)}
    if isinstance(lags, bool) or not isinstance(lags, (int, np.integer)) or not 1 <= lags <= MAX_LAGS:
        _bad("--lags", f"the lag order must be a whole number from 1 to {MAX_LAGS}; got {lags}", "use e.g. --lags 1")
    index = {c: i for i, c in enumerate(recording.channels)}
    used = [c for chans in blocks.values() for c in chans]
    if len(set(used)) < len(used) or any(c not in index for c in used):
        parse_blocks([f"{b}={','.join(cs)}" for b, cs in blocks.items()], recording.channels)  # says which
    data = recording.data[:, [index[c] for c in used]]
    T, n = data.shape
    p = int(lags)
    if n * p > 5000:
        _bad("--lags", f"{n} channels x {p} lags make a world of {n * p} states; a spec holds at most 5000",
             "use fewer channels or a lower lag order")
    k = n * p + (1 if mean else 0)
    nobs = T - p
    need = k + max(MIN_DOF, n)
    if nobs < need:
        _bad(recording.path, f"{T} samples are too few for {n} channel(s) at lag order {p}: each equation fits "
                             f"up to {k} coefficient(s), and the noise needs at least {max(MIN_DOF, n)} "
                             f"residual degrees of freedom beyond them",
             f"give at least {need + p} samples, or fewer channels or a lower --lags")
    scale = np.abs(data).max(initial=0.0)
    if scale > MAX_NUMBER ** 0.5:
        _bad(recording.path, f"values reach {scale:.3g}; a spec's numbers (noise variances among them) must stay "
                             f"at most {MAX_NUMBER:g}", "rescale the recording (e.g. other units)")
    spread = data.std(axis=0)
    for j, s in enumerate(spread):
        if not s > 1e-12 * max(scale, 1e-300):
            _bad(f"{recording.path}: channel `{used[j]}`", "the channel is constant: nothing to fit",
                 "leave it out of --blocks")
    zeros = set(zeros)
    owner = [b for b, chans in blocks.items() for _ in chans]
    # Regressors: [x(t-1), ..., x(t-p), 1]; column j*n + i is channel i at lag j+1.
    X = np.hstack([data[p - j - 1:T - j - 1] for j in range(p)] + ([np.ones((nobs, 1))] if mean else []))
    Y = data[p:]
    B = np.zeros((k, n))
    resid = np.empty_like(Y)
    dof = np.empty(n)
    for i in range(n):
        allowed = [j * n + m for j in range(p) for m in range(n) if (owner[m], owner[i]) not in zeros]
        allowed += [k - 1] if mean else []
        Xi = X[:, allowed]
        coef, _, rank, _ = np.linalg.lstsq(Xi, Y[:, i], rcond=None)
        if rank < len(allowed):
            _bad(f"{recording.path}: channel `{used[i]}`", "its regressors are collinear (two channels move in "
                                                          "lock-step, or one is a constant)",
                 "leave one of the collinear channels out of --blocks")
        B[allowed, i] = coef
        resid[:, i] = Y[:, i] - Xi @ coef
        dof[i] = nobs - len(allowed)
    coefs = np.stack([B[j * n:(j + 1) * n].T for j in range(p)])
    intercept = B[k - 1] if mean else np.zeros(n)
    Q1 = resid.T @ resid / np.sqrt(np.outer(dof, dof))
    Q1 = (Q1 + Q1.T) / 2
    # State form: x~(t) = [x(t); x(t-1); ...; x(t-p+1)] (the companion matrix).
    A = np.zeros((n * p, n * p))
    A[:n] = np.hstack(list(coefs))
    A[n:, :-n] = np.eye(n * (p - 1))
    Qs = np.zeros_like(A)
    same = np.equal.outer(np.array(owner, dtype=object), np.array(owner, dtype=object))
    Qs[:n, :n] = np.where(same, Q1, 0.0)  # the model's noise is one covariance per block
    radius = float(np.abs(np.linalg.eigvals(A)).max())
    if not radius < STABLE_RADIUS:
        _bad(recording.path, f"the fitted dynamics have spectral radius {radius:.6g}: a world with a mode that "
                             "does not decay has no stationary regime",
             "difference the recording (fit the changes from step to step) or remove its trend, then fit again")
    if np.abs(A).max() > MAX_NUMBER or np.abs(Q1).max() > MAX_NUMBER:
        _bad(recording.path, "the fitted numbers exceed what a spec holds (1e12)", "rescale the recording")
    ybar = Y - Y.mean(axis=0) if mean else Y
    sst = (ybar ** 2).sum(axis=0)
    r2 = {used[i]: float(1 - (resid[:, i] ** 2).sum() / sst[i]) for i in range(n)}
    h = whiteness_lags if whiteness_lags is not None else max(min(10, nobs // 5), p + 1)
    if not p < h < nobs:
        _bad("--whiteness-lags", f"the whiteness tests need more lags than the lag order ({p}) and fewer than the "
                                 f"{nobs} residuals; got {h}", f"use e.g. --whiteness-lags {max(10, p + 1)}")
    lb = {used[i]: ljung_box(resid[:, i], h, model_df=p) for i in range(n)}
    white = portmanteau(resid, h, p)
    sd = np.sqrt(np.diag(Q1))
    corr = Q1 / np.outer(sd, sd)
    cross = [abs(corr[a, b]) for a in range(n) for b in range(n) if owner[a] != owner[b]]
    dropped = float(max(cross, default=0.0))
    warnings = []
    if 1 - radius < THIN_MARGIN:
        warnings.append(f"the stability margin is thin ({1 - radius:.3g}): the slowest mode decays by 1/e only "
                        f"over {1 / -math.log(radius):.0f} steps, and designs will be slow and badly conditioned")
    if dropped > 0.1:
        warnings.append(f"noise correlations between blocks (up to {dropped:.3g}) are dropped: the model's "
                        "process noise is one covariance per block; put correlated channels in one block")
    if white[2] < 0.01:
        warnings.append(f"the residuals are not white (portmanteau p = {white[2]:.3g} at {h} lags): try a "
                        "higher --lags")
    ignored = tuple(c for c in recording.channels if c not in used)
    return WorldFit(blocks, p, coefs, intercept, Q1, resid, A, Qs, radius, 1 - radius, r2, lb, white, h, dropped,
                    tuple(sorted(zeros)), T, recording.path, ignored, warnings)


def _acov(u, h):
    u = u - u.mean(axis=0)
    T = len(u)
    return [u[j:].T @ u[:T - j] / T for j in range(h + 1)]


def ljung_box(x, lags, model_df=0) -> tuple:
    """The Ljung-Box statistic of one series at ``lags`` lags,
    ``Q = T (T + 2) sum_k r_k^2 / (T - k)`` (Ljung and Box, Biometrika 1978),
    with ``lags - model_df`` degrees of freedom. Returns ``(Q, dof, p)``.

    Examples
    --------
    >>> q, dof, p = ljung_box(np.random.default_rng(0).normal(size=500), 10)
    >>> dof, p > 0.01
    (10, True)
    """
    from scipy import stats

    x = np.asarray(x, dtype=float)
    T = len(x)
    c = _acov(x[:, None], lags)
    r = np.array([c[j][0, 0] / c[0][0, 0] for j in range(1, lags + 1)])
    q = float(T * (T + 2) * np.sum(r ** 2 / (T - np.arange(1, lags + 1))))
    dof = lags - model_df
    return q, dof, float(stats.chi2.sf(q, dof)) if dof > 0 else float("nan")


def portmanteau(u, lags, model_lags) -> tuple:
    """The multivariate portmanteau statistic of residuals ``u`` (steps x n),
    ``T sum_j tr(C_j' C_0^-1 C_j C_0^-1)``, chi-squared with ``n^2 (lags -
    model_lags)`` degrees of freedom (Lütkepohl 2005, section 4.4.3).
    Returns ``(statistic, dof, p)``. With couplings fixed at zero the fit
    has fewer coefficients than the full VAR, and these degrees of freedom
    (those of the full model) are fewer than the exact ones: the test then
    calls residuals non-white a little too readily, never too rarely."""
    from scipy import stats

    u = np.asarray(u, dtype=float)
    T, n = u.shape
    c = _acov(u, lags)
    c0inv = np.linalg.inv(c[0])
    stat = float(T * sum(np.trace(c[j].T @ c0inv @ c[j] @ c0inv) for j in range(1, lags + 1)))
    dof = n * n * (lags - model_lags)
    return stat, dof, float(stats.chi2.sf(stat, dof)) if dof > 0 else float("nan")


# ---------------------------------------------------------------------------
# the world section


def _lag_name(block, j):
    return f"{block}-lag{j}"


def world_dict(fit: WorldFit) -> dict:
    """The ``world:`` section as plain data (see the module docstring)."""
    p = fit.lags
    rows = {}
    start = 0
    for b, cs in fit.blocks.items():
        rows[b] = list(range(start, start + len(cs)))
        start += len(cs)
    names = set(fit.blocks)
    for b in fit.blocks:
        for j in range(1, p):
            if _lag_name(b, j) in names:
                _bad(f"--blocks {b}", f"the block name `{_lag_name(b, j)}` is needed for the past of `{b}` at lag "
                                      f"order {p}", "rename that block")

    def mat(a):
        return [[float(v) for v in row] for row in np.atleast_2d(a)]

    states = {}
    for b, r in rows.items():
        entry = {"dim": len(r), "dynamics": mat(fit.coefs[0][np.ix_(r, r)]), "noise": mat(fit.noise[np.ix_(r, r)])}
        driven = {}
        for j in range(p):
            for other, ro in rows.items():
                if j == 0 and other == b:
                    continue
                block = fit.coefs[j][np.ix_(r, ro)]
                if np.any(block):
                    driven[_lag_name(other, j) if j else other] = mat(block)
        if driven:
            entry["driven_by"] = driven
        states[b] = entry
    for j in range(1, p):
        for b, r in rows.items():
            states[_lag_name(b, j)] = {"dim": len(r), "driven_by": {(_lag_name(b, j - 1) if j > 1 else b):
                                                                    "identity"}}
    return {"states": states}


def world_yaml(fit: WorldFit) -> str:
    """The ``world:`` section as YAML text, with a header comment that says
    where it came from and how well it fits."""
    import yaml

    body = yaml.safe_dump({"world": world_dict(fit)}, sort_keys=False, default_flow_style=None, width=100)
    head = [f"# world fitted by `hierarchy fit-world` from {os.path.basename(fit.source)}: least-squares "
            f"VAR({fit.lags}), {fit.samples} samples",
            f"# stability margin 1 - rho = {fit.margin:.4g}; R^2 " + ", ".join(f"{c} {v:.3f}"
                                                                             for c, v in fit.r2.items()),
            f"# portmanteau whiteness p = {fit.whiteness[2]:.3g} at {fit.whiteness_lags} lags",
            "# blocks: " + "; ".join(f"{b} = {', '.join(cs)}" for b, cs in fit.blocks.items())]
    if fit.lags > 1:
        head.append("# blocks named *-lagK hold the past values of a block (state form of the lag order); "
                    "sensors and areas use the block itself")
    if np.any(fit.intercept):
        head.append("# the recording's mean was fitted and dropped (the world is zero-mean)")
    head.append("# paste this section into a spec, then add sensors, areas and links")
    return "\n".join(head) + "\n" + body


def into_template(fit: WorldFit, template) -> str:
    """The spec file ``template`` with its ``world:`` section replaced by the
    fit, every other line (comments included) kept as written; checked by
    the spec reader before it is returned.

    Raises
    ------
    SpecError
        If the template is not a valid spec, or is no longer one with the
        fitted world (for example a sensor observes a block the fit lacks).
    InputError
        If the template has no top-level ``world:`` line to replace.
    """
    import re

    import yaml

    from hierarchy.errors import SpecError
    from hierarchy.spec import load_spec, parse_spec

    load_spec(template)  # a broken template is reported as itself, not as the output
    with open(template, encoding="utf-8") as fh:
        lines = fh.read().splitlines(keepends=True)
    start = next((i for i, ln in enumerate(lines) if re.match(r"world\s*:", ln)), None)
    if start is None:
        _bad(os.fspath(template), "the template has no top-level `world:` line to replace",
             "write the template's world in block style, starting with a line `world:`")
    end = next((i for i in range(start + 1, len(lines)) if re.match(r"[^\s#]", lines[i])), len(lines))
    while end > start + 1 and re.match(r"(#.*)?\s*$", lines[end - 1]):
        end -= 1  # comments just above the next key belong to it
    head = [ln for ln in world_yaml(fit).splitlines(keepends=True) if ln.startswith("#") and "paste" not in ln]
    body = yaml.safe_dump({"world": world_dict(fit)}, sort_keys=False, default_flow_style=None, width=100)
    text = "".join(lines[:start] + head + [body] + lines[end:])
    try:
        parse_spec(text, path=os.fspath(template))
    except SpecError as err:
        raise SpecError(f"with the fitted world the template is no longer a valid spec: {err.message}",
                        place=f"--template {os.fspath(template)}: {err.place}", fix=err.fix) from None
    return text


def check_world_output(path, force=False) -> None:
    """Refuse, before any work, an existing ``path`` unless ``force``."""
    from hierarchy.io import refuse_existing

    refuse_existing(path, force)


def write_world(fit: WorldFit, path, force=False, template=None) -> None:
    """Write :func:`world_yaml` (or, with ``template``, the template spec
    holding the fitted world: :func:`into_template`) to ``path`` atomically;
    an existing file is replaced only with ``force``.

    Raises
    ------
    InputError
        If ``path`` exists and ``force`` is false.
    """
    from hierarchy.io import atomic_write_text

    check_world_output(path, force)
    text = world_yaml(fit) if template is None else into_template(fit, template)
    atomic_write_text(os.fspath(path), text)


def fit_text(fit: WorldFit) -> str:
    """A plain-text report of the fit for the terminal."""
    from hierarchy.report.results import fmt, table

    lines = [f"fitted VAR({fit.lags}) on {fit.samples} samples of {len(fit.channels)} channel(s) in "
             f"{len(fit.blocks)} block(s)" + (f"; not used: {', '.join(fit.ignored)}" if fit.ignored else "")]
    if fit.zeros:
        lines.append("couplings fixed at zero: " + ", ".join(f"{a}->{b}" for a, b in fit.zeros))
    lines.append(f"spectral radius {fit.radius:.6g}, stability margin 1 - rho = {fit.margin:.4g}")
    owner = {c: b for b, cs in fit.blocks.items() for c in cs}
    rows = [[c, owner[c], f"{fit.r2[c]:.4f}", fmt(float(fit.noise[i, i])), fmt(fit.ljung_box[c][0]),
             f"{fit.ljung_box[c][2]:.3g}"] for i, c in enumerate(fit.channels)]
    lines.append(table(["channel", "block", "R^2", "noise var", f"Ljung-Box({fit.whiteness_lags})", "p"], rows))
    s, d, pv = fit.whiteness
    lines.append(f"portmanteau whiteness test at {fit.whiteness_lags} lags: statistic {s:.4g}, {d} dof, p = {pv:.3g}"
                 + (" (residuals look white)" if pv >= 0.05 else " (residuals NOT white at 5%)"))
    if len(fit.blocks) > 1:
        lines.append(f"largest noise correlation between blocks (dropped): {fit.dropped_correlation:.3g}")
    lines += [f"warning: {w}" for w in fit.warnings]
    return "\n".join(lines)
