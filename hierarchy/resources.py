"""How much memory and time a command will need, judged before it starts.

A circuit inside the spec reader's size limits can still need more memory
than the machine has (a 5000-state design needs tens of gigabytes) or run
for hours. :func:`estimate` judges both from the sizes alone, without
building anything; :func:`check_memory` refuses, with a clear message, work
that would exhaust the machine's available memory (``--force`` goes on).

The constants are measured, not derived: peak memory of one objective and
gradient evaluation grew as about ``7 nq^2`` floats (``nq``: states plus
noises of the closed loop) on circuits from 200 to 3400 in ``nq``, and one
evaluation took about ``1e-9 nq^2 nxi`` seconds on one core of the
development machine (2 cores, shared). They are upper estimates within a
factor of a few; the point is to refuse the hopeless, not to predict.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from hierarchy.errors import InputError

__all__ = ["Need", "estimate", "available_memory", "check_memory", "fmt_bytes", "fmt_seconds"]

#: Floats held per ``nq^2`` at the peak of one evaluation (measured, see above).
FLOATS_PER_NQ2 = 7.0
#: Seconds per ``nq^2 nxi`` of one evaluation on one core (measured, see above).
SECONDS_PER_UNIT = 1e-9
#: Memory of the interpreter with numpy, scipy and the package loaded.
BASE_BYTES = 150e6
#: Gains up to which the solver keeps a dense inverse Hessian (solver.DENSE_LIMIT).
DENSE_GAINS = 1500


@dataclass(frozen=True)
class Need:
    """What one design (or one evaluation) of a circuit will need.

    Attributes
    ----------
    memory : float
        Peak bytes of one process.
    evaluation_seconds : float
        Seconds of one objective-and-gradient evaluation, about.
    nxi, nq, gains : int
        Closed-loop states, states plus noises, and gain entries.
    """

    memory: float
    evaluation_seconds: float
    nxi: int
    nq: int
    gains: int


def _sizes(spec) -> tuple:
    lag = max((a.lag for a in spec.areas if a.has_target), default=0)
    nxi = spec.world.dim * (lag + 1) + sum(a.dim for a in spec.areas)
    nxi += sum((l.delay - 1) * l.dim for l in spec.links)  # signals in flight on delayed links
    nq = nxi + spec.world.dim + sum(s.dim for s in spec.sensors) + sum(l.dim for l in spec.links)
    dim = {n.name: n.dim for n in (*spec.areas, *spec.sensors)}
    gains = sum(a.dim * a.dim for a in spec.areas)
    for l in spec.links:  # every block a link may carry, free or pinned (an upper count)
        gains += l.dim * (dim[l.source] + dim[l.target] + l.dim)
    return nxi, nq, gains


def estimate(spec, evaluate_only: bool = False) -> Need:
    """Memory and time of designing ``spec`` (or, with ``evaluate_only``,
    of scoring one set of its gains), from its sizes.

    Examples
    --------
    >>> from hierarchy.spec import load_spec
    >>> need = estimate(load_spec("specs/single-loop.yaml"))
    >>> need.nxi, need.nq
    (2, 6)
    >>> need.memory < 200e6
    True
    """
    nxi, nq, gains = _sizes(spec)
    floats = FLOATS_PER_NQ2 * nq * nq
    if not evaluate_only:
        floats += 30.0 * gains  # gradient, line search and L-BFGS history
        if gains <= DENSE_GAINS:
            floats += float(gains) * gains  # the dense inverse Hessian
    return Need(BASE_BYTES + 8.0 * floats, SECONDS_PER_UNIT * nq * nq * nxi, nxi, nq, gains)


def available_memory() -> float | None:
    """Bytes of memory available to a new process now (``MemAvailable`` on
    Linux, free pages elsewhere), or ``None`` when the system does not say."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0
    except (OSError, ValueError, IndexError):
        pass
    try:
        return float(os.sysconf("SC_AVPHYS_PAGES")) * float(os.sysconf("SC_PAGE_SIZE"))
    except (OSError, ValueError, AttributeError):
        return None


def fmt_bytes(n: float) -> str:
    """``1.5 GB``, ``320 MB``.

    Examples
    --------
    >>> fmt_bytes(3.2e9), fmt_bytes(4.5e7), fmt_bytes(351e6)
    ('3.2 GB', '45 MB', '351 MB')
    """
    return f"{n / 1e9:.3g} GB" if n >= 1e9 else f"{n / 1e6:.3g} MB"


def fmt_seconds(s: float) -> str:
    """``40 s``, ``12 min``, ``3.5 h``.

    Examples
    --------
    >>> fmt_seconds(40), fmt_seconds(110), fmt_seconds(720), fmt_seconds(12600)
    ('40 s', '110 s', '12 min', '3.5 h')
    """
    if s < 120:
        return f"{s:.2g} s" if s < 100 else f"{s:.0f} s"
    if s < 7200:
        return f"{s / 60:.2g} min"
    return f"{s / 3600:.2g} h"


def check_memory(need: Need, processes: int = 1, option: str = "--force", available=None) -> None:
    """Refuse work whose estimated memory (``processes`` copies of
    ``need.memory``) exceeds what the machine has available now.

    Raises
    ------
    InputError
        Naming both amounts and the ways on.

    Examples
    --------
    >>> check_memory(Need(8e9, 1.0, 10, 20, 30), available=4e9)
    Traceback (most recent call last):
    ...
    hierarchy.errors.InputError: memory: this needs about 8 GB of memory (a closed loop of 10 states and 20 states plus noises), but only 4 GB is available
      fix: use a smaller circuit (or fewer --workers), free memory, or give --force to try anyway
    """
    available = available_memory() if available is None else available
    total = need.memory * processes
    if available is None or total <= available:
        return
    copies = f" in {processes} worker processes" if processes > 1 else ""
    raise InputError(f"this needs about {fmt_bytes(total)} of memory{copies} (a closed loop of {need.nxi} states "
                     f"and {need.nq} states plus noises), but only {fmt_bytes(available)} is available",
                     place="memory", fix=f"use a smaller circuit (or fewer --workers), free memory, or give "
                                         f"{option} to try anyway")
