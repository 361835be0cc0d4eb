"""Bounded file input, atomic file output, and paths the tool makes up itself.

Every file the tool reads (specs, gains, results, study parts) goes through
:func:`read_bytes`: regular files only (a named pipe, a device or a socket
is refused without blocking: the file is opened non-blocking and checked
with ``fstat`` before any read), and never more than the reader's limit,
whatever size the system reports.

Every file the tool writes (results, gains, tables, pictures, the schema) is
written to a temporary file beside the target, flushed to disk and renamed
over the target, so an existing file is never half-overwritten: a crash, a
full disk or Ctrl-C leaves either the old file or the new one, and no
temporary file behind.

The files written by this process are logged, so that an interrupted command
can say which of its outputs were written (:func:`mark`,
:func:`written_since`). File names the tool generates (for example one file
per study point) go through :func:`path_inside`, which refuses any name that
would land outside the chosen output folder.
"""

from __future__ import annotations

import contextlib
import os
import re
import stat
import tempfile

from hierarchy.errors import InputError

__all__ = [
    "ReadRefused", "read_bytes", "read_text", "refuse_existing", "check_output", "atomic_writer",
    "atomic_write_bytes", "atomic_write_text", "mark", "written_since", "safe_filename",
    "path_inside",
]

_WRITTEN: list = []


class ReadRefused(OSError):
    """A file :func:`read_bytes` will not read. ``reason`` is one of
    ``"missing"``, ``"folder"``, ``"not regular"``, ``"too large"`` and
    ``"unreadable"``; ``str(err)`` says it in words."""

    def __init__(self, reason: str, text: str):
        super().__init__(text)
        self.reason = reason


def read_bytes(path, limit: int) -> bytes:
    """The content of the regular file ``path``, at most ``limit`` bytes.

    Raises
    ------
    ReadRefused
        If the file does not exist, is a folder, is not a regular file (a
        named pipe, a device, a socket), holds more than ``limit`` bytes, or
        cannot be read. Never blocks on a pipe; never reads past
        ``limit + 1`` bytes (a device reporting size 0 is refused before any
        read, and a file growing while it is read is cut off).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.NamedTemporaryFile(delete=False) as fh:
    ...     _ = fh.write(b"spec: 1")
    >>> read_bytes(fh.name, 100)
    b'spec: 1'
    >>> read_bytes(fh.name, 3)
    Traceback (most recent call last):
    ...
    hierarchy.io.ReadRefused: the file is larger than 3 bytes
    >>> read_bytes("/dev/null", 100)
    Traceback (most recent call last):
    ...
    hierarchy.io.ReadRefused: this is a character device, not a regular file
    >>> os.unlink(fh.name)
    """
    path = os.fspath(path)
    try:
        # O_NONBLOCK: opening a FIFO with no writer would otherwise wait forever.
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    except FileNotFoundError:
        raise ReadRefused("missing", "no such file") from None
    except IsADirectoryError:
        raise ReadRefused("folder", "this is a folder") from None
    except NotADirectoryError:  # `spec.yaml/`: a file used as a folder
        raise ReadRefused("unreadable", "a part of the path is a file, not a folder (a '/' too many?)") from None
    except OSError as exc:
        raise ReadRefused("unreadable", exc.strerror or exc.__class__.__name__) from None
    try:
        info = os.fstat(fd)
        if stat.S_ISDIR(info.st_mode):
            raise ReadRefused("folder", "this is a folder")
        if not stat.S_ISREG(info.st_mode):
            raise ReadRefused("not regular", f"this is {_kind(info.st_mode)}, not a regular file")
        if info.st_size > limit:
            raise ReadRefused("too large", f"the file is larger than {limit:,} bytes")
        chunks, got = [], 0
        while got <= limit:
            try:
                chunk = os.read(fd, min(1 << 20, limit + 1 - got))
            except OSError as exc:
                raise ReadRefused("unreadable", exc.strerror or exc.__class__.__name__) from None
            if not chunk:
                break
            chunks.append(chunk)
            got += len(chunk)
        if got > limit:
            raise ReadRefused("too large", f"the file is larger than {limit:,} bytes")
        return b"".join(chunks)
    finally:
        os.close(fd)


def _kind(mode: int) -> str:
    for test, name in ((stat.S_ISFIFO, "a named pipe"), (stat.S_ISCHR, "a character device"),
                       (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket")):
        if test(mode):
            return name
    return "a special file"


def read_text(path, limit: int) -> str:
    """:func:`read_bytes` decoded as UTF-8 (``UnicodeDecodeError`` if it is not)."""
    return read_bytes(path, limit).decode("utf-8")


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _target_folder(path: str) -> str:
    """The folder ``path`` will be written in; refuse paths that cannot be."""
    if not path:
        raise InputError("the output path is empty", place="output",
                         fix="give a file name, e.g. result.json")
    if os.path.isdir(path):
        raise InputError("this is a folder, not a file", place=path,
                         fix="give a file name inside it, e.g. " + os.path.join(path, "result.json"))
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise InputError("the folder does not exist", place=path, fix="create the folder or choose another path")
    return folder


def _refuse_unsafe_target(path: str) -> None:
    """An existing target must be a regular file that may be written: a
    write-protected file is the user's way of saying "keep this"."""
    try:
        info = os.stat(path)
    except OSError:
        return  # a new file
    if not stat.S_ISREG(info.st_mode):
        raise InputError(f"the output exists and is {_kind(info.st_mode)}, not a regular file", place=path,
                         fix="choose another path")
    # (os.access alone says yes to root; the mode bits say what the user meant.)
    if not (info.st_mode & 0o222) or not os.access(path, os.W_OK):
        raise InputError("the output file is write-protected; it is left as it is", place=path,
                         fix="choose another path, or make the file writable first (chmod u+w)")


def refuse_existing(path, force: bool = False) -> None:
    """Refuse an output that exists unless ``force``: for commands that write
    a file a user goes on to edit by hand (a fitted world, an imported
    spec), where replacing it silently would lose the edits.

    Examples
    --------
    >>> refuse_existing("/", force=True)
    """
    path = os.fspath(path)
    if not force and os.path.lexists(path):
        raise InputError("the file exists; it is left as it is", place=path,
                         fix="choose another -o, or add --force to replace it")


def check_output(path, place: str = "output") -> str:
    """Refuse, before any work, an output path that could not be written:
    empty, ending in '/', a folder, in a missing or unwritable folder, or an
    existing file that is write-protected or not a regular file. Nothing is
    left behind by the check.

    Examples
    --------
    >>> check_output("")
    Traceback (most recent call last):
    ...
    hierarchy.errors.InputError: output: the output path is empty
      fix: give a file name, e.g. result.json
    """
    path = os.fspath(path)
    if not path:
        raise InputError("the output path is empty", place=place, fix="give a file name, e.g. result.json")
    if path.endswith(("/", os.sep)):
        raise InputError("an output path cannot end with '/'", place=path,
                         fix="give a file name, e.g. " + os.path.join(path, "result.json"))
    folder = _target_folder(path)
    _refuse_unsafe_target(path)
    try:  # the only honest test that the folder takes new files (root, read-only mounts)
        fd, probe = tempfile.mkstemp(prefix=".tmp-check-", dir=folder)
    except OSError as exc:
        raise InputError(f"cannot write in this folder ({exc.strerror or exc.__class__.__name__})",
                         place=path, fix="check the folder's permissions and free space, "
                                         "or choose another path") from None
    os.close(fd)
    os.unlink(probe)
    return path


@contextlib.contextmanager
def atomic_writer(path):
    """Open a temporary binary file beside ``path``; on a clean exit, rename it
    over ``path``. On any error (or Ctrl-C) the temporary file is removed and
    an existing ``path`` is left as it was.

    The new file gets the usual permissions (those of the file it replaces,
    or the umask's), not the private ones of a temporary file.

    Examples
    --------
    >>> with atomic_writer("figure.png") as fh:     # doctest: +SKIP
    ...     fig.savefig(fh, format="png")
    """
    path = os.fspath(path)
    folder = _target_folder(path)
    _refuse_unsafe_target(path)
    try:
        mode = os.stat(path).st_mode & 0o7777
    except OSError:
        mode = 0o666 & ~_umask()
    try:
        fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=os.path.basename(path)[-40:], dir=folder)
    except OSError as exc:
        raise InputError(f"cannot write in this folder ({exc.strerror or exc.__class__.__name__})",
                         place=path, fix="check the folder's permissions and free space, "
                                         "or choose another path") from None
    try:
        with os.fdopen(fd, "wb") as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, mode)
        os.replace(tmp, path)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        if isinstance(exc, OSError):
            raise InputError(f"the file could not be written ({exc.strerror or exc.__class__.__name__}); "
                             f"any earlier version is untouched", place=path,
                             fix="check the free space and permissions, or choose another path") from None
        raise
    _sync_folder(folder)
    _WRITTEN.append(path)


def _sync_folder(folder: str) -> None:
    """Make the rename itself durable (best effort; not every system can)."""
    with contextlib.suppress(OSError, AttributeError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write_bytes(path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically.

    Raises
    ------
    InputError
        If the folder does not exist, ``path`` is a folder, or the write
        fails (full disk, no permission); an existing file is then untouched.

    Examples
    --------
    >>> atomic_write_bytes("out.bin", b"...")   # doctest: +SKIP
    """
    with atomic_writer(path) as fh:
        fh.write(data)


def atomic_write_text(path, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    atomic_write_bytes(path, text.encode("utf-8"))


def mark() -> int:
    """A bookmark in the log of written files (see :func:`written_since`)."""
    return len(_WRITTEN)


def written_since(bookmark: int) -> list:
    """Paths written (completely) since ``bookmark``, in order."""
    return list(_WRITTEN[bookmark:])


_UNSAFE = re.compile(r"[^A-Za-z0-9._+-]+")


def safe_filename(text: str, default: str = "unnamed") -> str:
    """A file name made from free text (a spec or study name): letters,
    digits and ``._+-`` only, other runs replaced by ``-``; never empty, never
    hidden, never ``.`` or ``..``; at most 100 characters.

    Examples
    --------
    >>> safe_filename("river gauge, two levels")
    'river-gauge-two-levels'
    >>> safe_filename("../../etc/passwd")
    'etc-passwd'
    """
    name = _UNSAFE.sub("-", str(text)).strip("-.")[:100].strip("-.")
    return name or default


def path_inside(folder, name) -> str:
    """``folder/name`` for a file name the tool generated, refusing any name
    that is not a plain file name inside ``folder`` (no separators, no
    ``..``, not absolute, no NUL).

    Raises
    ------
    InputError
        Naming the generated name and the folder.

    Examples
    --------
    >>> path_inside("out", "point-3.json")
    'out/point-3.json'
    >>> path_inside("out", "../escape.json")
    Traceback (most recent call last):
    ...
    hierarchy.errors.InputError: ../escape.json: a generated file name would be written outside the output folder `out`
      fix: name things with letters, digits, '.', '_', '+' and '-' only
    """
    folder = os.fspath(folder)
    name = os.fspath(name)
    bad = (not name or name in (".", "..") or "\x00" in name or os.path.isabs(name)
           or os.sep in name or (os.altsep and os.altsep in name) or "/" in name)
    target = os.path.join(folder, name)
    if not bad:
        real_folder = os.path.realpath(folder)
        bad = os.path.commonpath([real_folder, os.path.realpath(target)]) != real_folder
    if bad:
        raise InputError(f"a generated file name would be written outside the output folder `{folder}`",
                         place=name or "(empty name)",
                         fix="name things with letters, digits, '.', '_', '+' and '-' only")
    return target
