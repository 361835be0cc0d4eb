"""One family of exceptions for everything a user can get wrong.

Each error carries the *place* in the spec (``links[2].noise``,
``areas.high.lag``), the line in the YAML file where known, and a *fix*: what
to change. The CLI prints ``str(err)`` and exits with status 2; no traceback.
"""

from __future__ import annotations


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
            where = self.place
            if self.line is not None:
                where += f" (line {self.line})"
            where += ": "
        text = f"{where}{self.message}"
        if self.fix:
            text += f"\n  fix: {self.fix}"
        return text


class SpecError(HierarchyError, ValueError):
    """The spec file is malformed or describes an ill-posed circuit."""


class GainsError(HierarchyError, ValueError):
    """A gains (design) file does not fit the circuit it is applied to."""


class UnstableError(HierarchyError, ValueError):
    """The closed loop (or the world) has no stationary regime."""


class InputError(HierarchyError, ValueError):
    """A command-line argument or file path is unusable."""
