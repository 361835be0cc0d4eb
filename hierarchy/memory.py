"""Keep freed memory in the process for reuse (glibc only).

An evaluation makes temporaries of a few hundred kilobytes to a few
megabytes. glibc serves blocks above its mmap threshold (128 KiB at first)
straight from the system and gives them back on ``free``, and trims the heap
top above 128 KiB; the next evaluation then faults the same pages in again.
At 32 areas that churn cost millions of page faults and a third of a
design's time in the kernel. Raising the two thresholds once lets the heap
keep and reuse those blocks. Elsewhere (macOS, Windows, musl) this does
nothing.
"""

from __future__ import annotations

import ctypes
import sys

__all__ = ["keep_freed_memory", "MMAP_THRESHOLD", "TRIM_THRESHOLD"]

#: Blocks up to this size come from the heap (glibc's largest allowed value
#: on 64-bit systems is 32 MiB).
MMAP_THRESHOLD = 32 << 20
#: Free memory at the top of the heap is given back only above this.
TRIM_THRESHOLD = 256 << 20
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # glibc's malloc.h
_DONE: list = []


def keep_freed_memory() -> bool:
    """Tell glibc's malloc to keep freed blocks for reuse; once per process.

    Returns whether the setting took effect (``False`` off Linux/glibc).

    Examples
    --------
    >>> isinstance(keep_freed_memory(), bool)
    True
    """
    if _DONE:
        return _DONE[0]
    ok = False
    if sys.platform.startswith("linux"):
        try:
            mallopt = ctypes.CDLL(None).mallopt
            gnu = ctypes.CDLL(None).gnu_get_libc_version  # glibc only: musl's mallopt does nothing
        except (OSError, AttributeError):
            mallopt = gnu = None
        if mallopt is not None and gnu is not None:
            mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
            ok = bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)) & bool(mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD))
    _DONE.append(ok)
    return ok
