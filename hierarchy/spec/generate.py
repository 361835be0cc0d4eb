"""Synthetic layered circuits, for tests and benchmarks at any size.

The scenario is invented: a survey network watching a layered field. The
world has one state block per level (``tier-1`` at the bottom, fast; the top
tier slow). Each tier is driven by the one above it, and the bottom tier by
every tier above it, so what the probes read mixes all timescales: through
a chain alone the upper tiers would be invisible from the bottom (even a
free, central Kalman filter could not beat their prior). Probes at the
bottom read the bottom tier; areas sit on levels 1..L (written into the
spec as ``level:``, so drawings show them there even when a level-skipping
residual reaches them early), each tracking its own tier (or none, for a
relay) with an optional lag. Links:

* between neighbouring levels (probes are level 0), every pair of nodes gets
  a residual up and the prediction down that it subtracts;
* a ``density`` fraction of the pairs that skip one or more levels get the
  same pair of links, and a ``density`` fraction of the ordered pairs of
  areas on the same level get a lateral feed-forward residual.

Every link has positive-definite channel noise and a price; with
``budgets=True`` the links sent by areas are unpriced and grouped instead in
one budget per sending level. The output is an ordinary spec (``spec: 1``).
The same arguments always give the same text.
"""

from __future__ import annotations

import numpy as np

from hierarchy.errors import InputError
from hierarchy.io import atomic_write_text
from hierarchy.spec.rules import MAX_LAG, MAX_TOTAL_DIM

__all__ = ["MAX_AREAS", "generate_spec_text", "write_spec"]

#: Largest circuit the generator writes (the spec reader's own size limits
#: would refuse much larger ones anyway).
MAX_AREAS = 1000


def _num(x: float) -> str:
    return f"{float(x):.6g}"


def _mat(M: np.ndarray) -> str:
    return "[" + ", ".join("[" + ", ".join(_num(v) for v in row) + "]" for row in np.atleast_2d(M)) + "]"


def _noise(rng, k: int, scale: float) -> np.ndarray:
    """A random symmetric positive-definite k x k covariance of size ``scale``.

    The 0.5 I floor keeps it positive definite after rounding to 6 digits."""
    B = rng.standard_normal((k, k)) / np.sqrt(k)
    N = scale * (0.5 * np.eye(k) + 0.25 * B @ B.T)
    N = np.round(N, 6)
    return np.triu(N) + np.triu(N, 1).T


def _dynamics(rng, k: int, radius: float) -> np.ndarray:
    """A k x k block with spectral radius ``radius``: an orthogonal matrix
    times ``radius``, so every mode decays at the same rate."""
    Q, R = np.linalg.qr(rng.standard_normal((k, k)))
    return radius * Q * np.sign(np.diag(R))


def _check_args(areas, levels, density, area_dim, world_dim, max_lag, relays):
    def bad(place, message, fix):
        raise InputError(message, place=place, fix=fix)

    if not 1 <= levels <= areas:
        bad("--levels", f"{levels} level(s) cannot be filled by {areas} area(s)",
            "use between 1 level and as many levels as areas")
    if areas > MAX_AREAS:
        bad("--areas", f"at most {MAX_AREAS} areas", f"use --areas {MAX_AREAS} or fewer")
    if not 0.0 <= density <= 1.0:
        bad("--density", f"density {density:g} is not a fraction", "use a number from 0 to 1")
    if area_dim < 1:
        bad("--area-dim", "an area needs at least one state", "use --area-dim 1 or more")
    if areas * area_dim > MAX_TOTAL_DIM:  # the spec reader's limit, checked before anything is drawn
        bad("--area-dim", f"{areas} areas of {area_dim} states are {areas * area_dim:,} states in all, more "
                          f"than the {MAX_TOTAL_DIM} a spec may hold",
            f"use --area-dim {max(1, MAX_TOTAL_DIM // areas)} or less, or fewer areas")
    if world_dim > MAX_TOTAL_DIM:
        bad("--world-dim", f"a world of {world_dim:,} states is more than the {MAX_TOTAL_DIM} a spec may hold",
            f"use --world-dim {MAX_TOTAL_DIM} or less")
    if world_dim % levels or world_dim < levels:
        bad("--world-dim", f"world size {world_dim} does not split into {levels} equal tiers",
            f"use a multiple of {levels}")
    if world_dim // levels > area_dim:
        bad("--world-dim", f"each tier has {world_dim // levels} states, more than an area's {area_dim}",
            f"use --world-dim {levels * area_dim} or less, or a larger --area-dim")
    if not 0 <= max_lag <= MAX_LAG:
        bad("--max-lag", f"a lag is from 0 to {MAX_LAG}; got {max_lag}", f"use 0 to {MAX_LAG}")
    if not 0.0 <= relays < 1.0:
        bad("--relays", f"relay fraction {relays:g} is not below 1", "use a number from 0 to below 1")


def generate_spec_text(areas: int, levels: int, density: float, seed: int, area_dim: int = 2,
                       world_dim: int | None = None, max_lag: int = 0, relays: float = 0.0,
                       budgets: bool = False) -> str:
    """YAML text of a synthetic layered circuit.

    Parameters
    ----------
    areas : int
        Number of areas, spread as evenly as possible over the levels (lower
        levels take the remainder).
    levels : int
        Number of levels of areas (and of world tiers).
    density : float
        Fraction (0..1) of the level-skipping node pairs linked by a residual
        and a prediction, and of the same-level ordered area pairs linked by
        a lateral residual.
    seed : int
        Seed of every random choice.
    area_dim : int
        Size of each area's state.
    world_dim : int, optional
        Size of the world; a multiple of ``levels`` (default ``levels *
        area_dim``). A tier may not be larger than ``area_dim``.
    max_lag : int
        Each tracking area gets a lag drawn from 0..max_lag.
    relays : float
        Fraction of the areas above level 1 that track nothing (relays).
    budgets : bool
        Put the links sent by areas into one budget per sending level
        (unpriced) instead of pricing them.

    Returns
    -------
    str
        A version-1 spec; :func:`hierarchy.spec.parse_spec` reads it.

    Raises
    ------
    InputError
        For arguments that cannot make a circuit.

    Examples
    --------
    >>> from hierarchy.spec import parse_spec
    >>> spec = parse_spec(generate_spec_text(areas=4, levels=2, density=0.5, seed=1))
    >>> len(spec.areas), spec.world.dim
    (4, 4)
    """
    world_dim = levels * area_dim if world_dim is None else world_dim
    _check_args(areas, levels, density, area_dim, world_dim, max_lag, relays)
    rng = np.random.default_rng(seed)
    tier = world_dim // levels
    # Nodes by level: level 0 holds one probe per bottom-level area.
    per_level = [areas // levels + (1 if i < areas % levels else 0) for i in range(levels)]
    nodes = [[f"probe-{i + 1}" for i in range(per_level[0])]]
    nodes += [[f"n{k}-{i + 1}" for i in range(per_level[k - 1])] for k in range(1, levels + 1)]
    level_of = {name: k for k, names in enumerate(nodes) for name in names}

    out = [f"# Synthetic layered circuit: {areas} areas on {levels} levels, density {density:g}, seed {seed}.",
           "# Written by `hierarchy generate`; the scenario (a survey network over a",
           "# layered field) is invented.",
           "spec: 1",
           f"name: layered survey network ({areas} areas, {levels} levels, density {density:g}, seed {seed})",
           "world:", "  states:"]
    for k in range(1, levels + 1):
        # Lower tiers are fast, upper ones slow: radius 0.5 at the bottom up to 0.95.
        radius = 0.5 + 0.45 * (k - 1) / max(levels - 1, 1)
        A = _dynamics(rng, tier, radius)
        q = 0.1 * (1.0 - radius ** 2)  # every tier's own variance about 0.1
        # Coupling 0.5 (1 - radius): a slow input is summed over ~1/(1 - radius) steps.
        drivers = range(2, levels + 1) if k == 1 else [k + 1] if k < levels else []
        coupling = {j: 0.5 * (1.0 - radius) * rng.standard_normal((tier, tier)) / np.sqrt(tier) for j in drivers}
        line = f"    tier-{k}: {{dim: {tier}, dynamics: {_mat(A)}, noise: {_num(q)}"
        if coupling:
            line += ", driven_by: {" + ", ".join(f"tier-{j}: {_mat(B)}" for j, B in coupling.items()) + "}"
        out.append(line + "}")
    out.append("sensors:")
    for name in nodes[0]:
        C = np.eye(tier) + 0.3 * rng.standard_normal((tier, tier)) / np.sqrt(tier)
        out.append(f"  {name}: {{observes: {{tier-1: {_mat(C)}}}, noise: {_mat(_noise(rng, tier, 0.05))}}}")
    out.append("areas:")
    for k in range(1, levels + 1):
        for name in nodes[k]:
            relay = k > 1 and rng.random() < relays
            lag = int(rng.integers(0, max_lag + 1)) if max_lag else 0
            if relay:
                out.append(f"  {name}: {{dim: {area_dim}, level: {k}}}")
            else:
                weight = 0.5 + rng.random()
                entry = f"  {name}: {{dim: {area_dim}, level: {k}, tracks: tier-{k}, weight: {_num(weight)}"
                out.append(entry + (f", lag: {lag}}}" if lag else "}"))

    pairs = [(lo, hi) for k in range(levels) for lo in nodes[k] for hi in nodes[k + 1]]
    skips = [(lo, hi) for j in range(levels + 1) for k in range(j + 2, levels + 1)
             for lo in nodes[j] for hi in nodes[k]]
    laterals = [(a, b) for k in range(1, levels + 1) for a in nodes[k] for b in nodes[k] if a != b]
    pick = sorted(rng.choice(len(skips), size=int(round(density * len(skips))), replace=False))
    pairs += [skips[i] for i in pick]
    pick = sorted(rng.choice(len(laterals), size=int(round(density * len(laterals))), replace=False))

    links = []  # (from, to, kind)
    for lo, hi in pairs:
        links.append((lo, hi, "residual"))
        links.append((hi, lo, "prediction"))
    links += [(*laterals[i], "residual") for i in pick]
    dims = {name: (tier if level_of[name] == 0 else area_dim) for name in level_of}
    out.append("links:")
    groups = {}
    for src, dst, kind in links:
        dim = dims[src] if kind == "residual" else dims[dst]
        noise = _mat(_noise(rng, dim, 0.02 + 0.03 * rng.random()))
        price = 0.02 + 0.18 * rng.random()
        if budgets and level_of[src] > 0:
            groups.setdefault(level_of[src], []).append((f"{src}->{dst}", noise))
            out.append(f"  - {{from: {src}, to: {dst}, kind: {kind}, noise: {noise}}}")
        else:
            out.append(f"  - {{from: {src}, to: {dst}, kind: {kind}, noise: {noise}, price: {_num(price)}}}")
    if groups:
        out.append("budgets:")
        for k in sorted(groups):
            ids = [lid for lid, _ in groups[k]]
            # Half a unit of SNR per link on average: tight enough to bind.
            total = 0.5 * len(ids) * 0.035 * area_dim
            out.append(f"  - {{name: level-{k}-out, links: [{', '.join(ids)}], total: {_num(total)}}}")
    return "\n".join(out) + "\n"


def write_spec(path, **kwargs) -> None:
    """Generate a spec (see :func:`generate_spec_text`) and write it atomically.

    Raises
    ------
    InputError
        For unusable arguments or a folder that does not exist.

    Examples
    --------
    >>> write_spec("big.yaml", areas=32, levels=16, density=0.175, seed=0)   # doctest: +SKIP
    """
    from hierarchy.errors import SpecError
    from hierarchy.spec import parse_spec

    text = generate_spec_text(**kwargs)
    try:  # some limits (the links' total size) depend on the random draw
        parse_spec(text)
    except SpecError as err:
        raise InputError(f"the circuit drawn is not a valid spec ({err.message}); nothing was written",
                         place="--areas/--area-dim/--density",
                         fix="use fewer or smaller areas, or a lower --density") from None
    atomic_write_text(path, text)
