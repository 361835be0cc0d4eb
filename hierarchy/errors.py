"""One family of exceptions for everything a user can get wrong.

Each error carries the *place* in the spec (``links[2].noise``,
``areas.high.lag``), the line in the YAML file where known, and a *fix*: what
to change. The CLI prints ``str(err)`` and exits with status 2; no traceback.
"""

from __future__ import annotations

import re

__all__ = ['HierarchyError', 'printable', 'terminal_safe', 'SpecError', 'GainsError', 'UnstableError', 'InputError']


class HierarchyError(Exception):
    """Base class of every error the tool reports to a user.

    Parameters
    ----------
    message : str
        What is wrong, in one sentence.
    place : str, optional
        Where in the spec (or which file / option) the problem is.
    fix : str, optional
        What the user should change.
    line : int, optional
        1-based line in the YAML file, when known.
    """

    def __init__(self, message, place=None, fix=None, line=None):
        super().__init__(message)
        self.message = message
        self.place = place
        self.fix = fix
        self.line = line

    def __str__(self):
        where = ""
        if self.place:
            where = printable(self.place)
            if self.line is not None:
                where += f" (line {self.line})"
            where += ": "
        text = f"{where}{printable(self.message)}"
        if self.fix:
            text += f"\n  fix: {printable(self.fix)}"
        return text


def printable(text) -> str:
    """``text`` with control characters and line breaks written as escapes
    (``\\r``, ``\\x85``): a message quotes names and keys from the user's
    files, and must stay one line on any terminal."""
    text = str(text)
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


#: Characters a terminal may obey rather than show: C0 and C1 controls
#: (ESC starts colour, cursor and title sequences), DEL, and the invisible
#: format characters that reorder or hide text (bidirectional overrides,
#: zero-width marks). Line breaks and tabs are kept by :func:`terminal_safe`.
_OBEYED = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u200b-\u200f\u2028-\u202e\u2060-\u2069\ufeff]")


def terminal_safe(text: str, keep: str = "\n\t") -> str:
    r"""``text`` with every character a terminal would obey (escape sequences,
    cursor moves, bidirectional overrides) written as a visible escape,
    except those in ``keep``.

    Examples
    --------
    >>> print(terminal_safe("area \x1b[31mred\x1b[0m"))
    area \x1b[31mred\x1b[0m
    """
    return _OBEYED.sub(lambda m: m.group() if m.group() in keep else repr(m.group())[1:-1], text)


class SpecError(HierarchyError, ValueError):
    """The spec file is malformed or describes an ill-posed circuit."""


class GainsError(HierarchyError, ValueError):
    """A gains (design) file does not fit the circuit it is applied to."""


class UnstableError(HierarchyError, ValueError):
    """The closed loop (or the world) has no stationary regime."""


class InputError(HierarchyError, ValueError):
    """A command-line argument or file path is unusable."""
