"""Atomic file output: a result is written to a temporary file beside the
target and renamed over it, so an existing file is never half-overwritten."""

from __future__ import annotations

import os
import tempfile

from .errors import InputError


def atomic_write_bytes(path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically.

    Examples
    --------
    >>> atomic_write_bytes("out.bin", b"...")   # doctest: +SKIP
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise InputError("the folder does not exist", place=path, fix="create the folder or choose another path")
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=os.path.basename(path)[-40:], dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_text(path, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    atomic_write_bytes(path, text.encode("utf-8"))
