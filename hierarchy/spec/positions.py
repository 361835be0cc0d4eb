"""Places in a spec file: a value with its dotted place and line, and the
wording helpers of every message that names a place.
"""

from __future__ import annotations

from dataclasses import dataclass

from hierarchy.errors import SpecError

__all__ = []


@dataclass(frozen=True)
class _At:
    """A value read from the file, with its place in the spec and its line."""

    value: object
    place: str
    line: int | None = None

    def fail(self, message: str, fix: str):
        raise SpecError(message, place=self.place, fix=fix, line=self.line)


def _join(place: str, key) -> str:
    return f"{place}.{key}" if place else str(key)


def _child(at: _At, key) -> _At:
    """The value under ``key`` of the mapping at ``at``; its line is the key's."""
    lines = getattr(at.value, "key_lines", {})
    return _At(at.value[key], _join(at.place, key), lines.get(key, at.line))


def _items(at: _At) -> list[_At]:
    lines = getattr(at.value, "item_lines", ())
    return [
        _At(v, f"{at.place}[{i}]", lines[i] if i < len(lines) else at.line)
        for i, v in enumerate(at.value)
    ]


def _describe(value) -> str:
    """Say in words what a YAML value is, for error messages."""
    if value is None:
        return "nothing"
    if isinstance(value, bool):
        return f"the boolean {str(value).lower()}"
    if isinstance(value, (int, float)):
        return f"the number {value}"
    if isinstance(value, str):
        return f"the text '{value}'"
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    return f"a {type(value).__name__}"


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"
