"""What a running command does on a signal, and how it keeps the terminal
safe: SIGTERM and SIGHUP stop it as Ctrl-C does, the message says what
was written, and names from a spec are printed with control characters
escaped."""

from __future__ import annotations

import contextlib
import sys

from hierarchy.cli.checks import _planned_outputs

__all__ = []

class _Stop:
    """While a command runs, SIGTERM and SIGHUP stop it as Ctrl-C does
    (finished study points kept, outputs whole or untouched, one message);
    the exit status is then 128 + the signal's number, as a shell reports.
    Later signals of the kind are ignored while the command cleans up."""

    def __init__(self):
        import signal

        self.name, self.number = "Ctrl-C", int(signal.SIGINT)
        self._saved = {}

    def __enter__(self):
        import signal
        import threading

        if threading.current_thread() is threading.main_thread():  # only there can Python handle signals
            for sig in (getattr(signal, n) for n in ("SIGTERM", "SIGHUP") if hasattr(signal, n)):
                self._saved[sig] = signal.signal(sig, self._handle)
        return self

    def _handle(self, signum, frame):
        import signal

        if self.number != int(signal.SIGINT):
            return  # already stopping
        self.name, self.number = signal.Signals(signum).name, int(signum)
        raise KeyboardInterrupt

    def __exit__(self, *exc):
        import signal

        for sig, handler in self._saved.items():
            signal.signal(sig, handler)
        return False


def _interrupted(args, written: list, cause="Ctrl-C") -> str:
    """Where things stand after Ctrl-C (or the signal ``cause``): what was
    written, what was not."""
    def listing(paths):
        return ", ".join(paths[:5]) + (f" and {len(paths) - 5} more" if len(paths) > 5 else "")

    done = set(written)
    pending = [p for p in _planned_outputs(args) if p not in done]
    text = f"interrupted ({cause}) during `{args.command}`: "
    text += f"wrote {listing(written)} before the interrupt" if written else "no file was written"
    if pending:
        text += f"; not written: {listing(pending)} (any earlier file there is untouched)"
    return text + ". No file is ever left half-written."


class _TerminalSafe:
    """A text stream that shows, rather than passes on, every character a
    terminal would obey (see :func:`hierarchy.errors.terminal_safe`): names
    in a spec reach every table and message, and must not recolour, move
    the cursor or retitle the user's terminal. ``keep`` lists the controls
    let through (line breaks; on stderr also ``\r`` for the progress bar)."""

    def __init__(self, stream, keep):
        self._stream = stream
        self._keep = keep

    def write(self, text):
        from hierarchy.errors import terminal_safe

        return self._stream.write(terminal_safe(text, self._keep))

    def __getattr__(self, name):  # flush, fileno, isatty, encoding, ...
        return getattr(self._stream, name)


@contextlib.contextmanager
def _terminal_safe_output():
    saved = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = _TerminalSafe(saved[0], "\n\t"), _TerminalSafe(saved[1], "\n\t\r")
    try:
        yield
    finally:
        sys.stdout, sys.stderr = saved


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """Python warnings (numerical ones from numpy or scipy) as one plain line."""
    print(f"warning: {category.__name__}: {' '.join(str(message).split())}", file=sys.stderr)
