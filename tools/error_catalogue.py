"""Developer tool: the error catalogue (docs/errors.md) checked against the code.

    python tools/error_catalogue.py [CATALOGUE]
"""

from __future__ import annotations

__all__ = ['CATALOGUED', 'message_templates', 'canonical', 'catalogue_entries', 'main']


#: The exception classes whose messages the catalogue lists.
CATALOGUED = ("SpecError", "GainsError", "InputError", "UnstableError", "HierarchyError")
#: How a placeholder (a part of a message filled in at run time) is written
#: in the catalogue: ``‹what›``.
_HOLE = "‹›"


def message_templates(folder=None) -> dict:
    """Every message template raised with a catalogued error in the package.

    A template is the message with each part filled in at run time replaced
    by ``‹›``, e.g. ``the key `‹›` is written twice in the same mapping
    (first on line ‹›)``. Messages passed through small helper functions
    (``def bad(place, message, fix): raise InputError(message, ...)``) are
    followed to their callers.

    Returns
    -------
    dict
        ``{template: [(path inside the package, line), ...]}``.
    """
    import ast
    from pathlib import Path

    folder = Path(folder) if folder is not None else Path(__file__).resolve().parents[1] / "hierarchy"
    # Keyed by the path inside the package: file names repeat across
    # subpackages (every __init__.py, spec/checks.py and cli/checks.py).
    sources = {p.relative_to(folder).as_posix(): ast.parse(p.read_text(encoding="utf-8"))
               for p in sorted(folder.rglob("*.py"))}

    def called(node):
        f = node.func
        return f.id if isinstance(f, ast.Name) else f.attr if isinstance(f, ast.Attribute) else None

    # Helpers: functions that raise a catalogued error with one of their
    # own parameters as the message, e.g. ``_At.fail(self, message, fix)``.
    helpers = {}
    for tree in sources.values():
        for fn in ast.walk(tree):
            if not isinstance(fn, ast.FunctionDef):
                continue
            params = [a.arg for a in fn.args.args]
            if params and params[0] == "self":
                params = params[1:]
            for node in ast.walk(fn):
                if isinstance(node, ast.Call) and called(node) in CATALOGUED and node.args \
                        and isinstance(node.args[0], ast.Name) and node.args[0].id in params:
                    helpers[fn.name] = params.index(node.args[0].id)

    def templates(node):
        if isinstance(node, ast.Constant) and isinstance(node.value, str):
            return [node.value]
        if isinstance(node, ast.JoinedStr):
            parts = [""]
            for value in node.values:
                if isinstance(value, ast.Constant):
                    parts = [p + str(value.value) for p in parts]
                else:
                    parts = [p + _HOLE for p in parts]
            return parts
        if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Add):
            return [a + b for a in templates(node.left) for b in templates(node.right)]
        if isinstance(node, ast.IfExp):
            return templates(node.body) + templates(node.orelse)
        return [_HOLE]

    found = {}
    for name, tree in sources.items():
        for node in ast.walk(tree):
            if not isinstance(node, ast.Call):
                continue
            fname = called(node)
            if fname in CATALOGUED:
                index = 0
            elif fname in helpers:
                index = helpers[fname]
            else:
                continue
            message = node.args[index] if len(node.args) > index else next(
                (k.value for k in node.keywords if k.arg == "message"), None)
            if message is None or (isinstance(message, ast.Name) and fname in CATALOGUED):
                continue  # a helper passing its parameter on: counted at its callers
            for template in templates(message):
                found.setdefault(canonical(template), []).append((name, node.lineno))
    return found


def canonical(message: str) -> str:
    """A message with every placeholder (``‹anything›``) written ``‹›``, its
    runs of spaces collapsed."""
    import re

    return " ".join(re.sub(r"‹[^›]*›", _HOLE, message).split())


def catalogue_entries(text: str) -> list:
    """The messages listed in the catalogue: every heading of the form
    ``### ``message`` `` (a double-backtick code span)."""
    import re

    return [canonical(m) for m in re.findall(r"^#{2,4} ``(.+?)``\s*$", text, flags=re.MULTILINE)]


def main(argv=None) -> int:
    """``python tools/error_catalogue.py [CATALOGUE]``:
    list message templates in
    the code that the catalogue (default ``docs/errors.md``) lacks, and
    catalogue entries no code raises. Exit status 1 if there are any."""
    import sys
    from pathlib import Path

    argv = sys.argv[1:] if argv is None else argv
    path = Path(argv[0]) if argv else Path(__file__).parents[1] / "docs" / "errors.md"
    listed = set(catalogue_entries(path.read_text(encoding="utf-8"))) if path.exists() else set()
    found = message_templates()
    missing = sorted(t for t in found if t not in listed)
    stale = sorted(t for t in listed if t not in found)
    for t in missing:
        where = ", ".join(f"{f}:{n}" for f, n in found[t])
        pad = " " if t.startswith("`") or t.endswith("`") else ""
        print(f"missing from {path.name}: ### ``{pad}{t}{pad}``   ({where})")
    for t in stale:
        print(f"in {path.name} but raised nowhere: {t}")
    return 1 if missing or stale else 0


if __name__ == "__main__":
    import sys

    sys.exit(main())
