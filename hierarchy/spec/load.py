"""Public entry points: parse a spec's text or load a spec file.
"""

from __future__ import annotations

import os
from pathlib import Path

from hierarchy.errors import SpecError
from hierarchy.spec.model import Spec
from hierarchy.spec.build import _parse_document
from hierarchy.spec.yamlfile import MAX_DOCUMENT, _read_yaml

__all__ = ['parse_spec', 'load_spec']


def parse_spec(text: str, path: str | None = None) -> Spec:
    """Parse the YAML text of a spec (version 1) into a checked :class:`Spec`.

    Parameters
    ----------
    text : str
        The YAML document.
    path : str, optional
        Where the text came from; used in messages and as the default name.

    Returns
    -------
    Spec
        The circuit, with every matrix expanded from its shorthand and every
        default filled in. Non-fatal findings are in ``spec.warnings``.

    Raises
    ------
    SpecError
        For anything malformed or ill-posed, with place, line and fix.

    Examples
    --------
    >>> spec = parse_spec('''
    ... spec: 1
    ... world: {states: {x: {dynamics: 0.9, noise: 1.0}}}
    ... sensors: {eye: {observes: {x: identity}, noise: 0.1}}
    ... areas: {v1: {tracks: x}}
    ... links: [{from: eye, to: v1, kind: residual}]
    ... ''')
    >>> spec.name, spec.areas[0].dim, spec.links[0].id
    ('unnamed', 1, 'eye->v1')
    """
    where = str(path) if path is not None else "<spec text>"
    return _parse_document(_read_yaml(text, where), path)


def load_spec(path) -> Spec:
    """Read a spec file (YAML, version 1) and parse it with :func:`parse_spec`.

    Parameters
    ----------
    path : str or os.PathLike
        The file to read (UTF-8).

    Returns
    -------
    Spec
        The checked circuit; its ``name`` defaults to the file's stem.

    Raises
    ------
    SpecError
        If the file cannot be read, or its content is not a valid spec.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "tiny.yaml"
    >>> _ = path.write_text('''
    ... spec: 1
    ... world: {states: {x: {dynamics: 0.5, noise: 1.0}}}
    ... sensors: {eye: {observes: {x: 1}}}
    ... areas: {v1: {tracks: x}}
    ... ''')
    >>> load_spec(path).name
    'tiny'
    >>> path.unlink(); path.parent.rmdir()
    """
    from hierarchy.io import ReadRefused, read_text

    raw = os.fspath(path)  # as given: Path() would drop a trailing '/'
    path = Path(path)
    try:
        text = read_text(raw, MAX_DOCUMENT)
    except ReadRefused as err:
        if err.reason == "missing":
            raise SpecError("the spec file does not exist", place=str(path),
                            fix="check the path and the current folder") from None
        if err.reason == "folder":
            raise SpecError("this is a folder, not a spec file", place=str(path),
                            fix="give the path of a .yaml file") from None
        if err.reason == "too large":
            raise SpecError(f"the file is too large (more than {MAX_DOCUMENT:,} "
                            f"bytes)", place=str(path),
                            fix="a spec should be a few kilobytes") from None
        if err.reason == "not regular":
            raise SpecError(f"the spec is not a regular file ({err})", place=str(path),
                            fix="save the spec to a file and give its path") from None
        raise SpecError(f"the file cannot be read ({err})",
                        place=str(path),
                        fix="check that the file exists and is readable") from None
    except UnicodeDecodeError:
        raise SpecError("the file is not UTF-8 text", place=str(path),
                        fix="save the spec as UTF-8 text") from None
    return parse_spec(text, path=str(path))
