"""YAML loading: safe, with line numbers; duplicate keys, aliases and bombs refused.
"""

from __future__ import annotations

import re

import yaml

from hierarchy.errors import SpecError
from hierarchy.spec.positions import _At, _join

__all__ = ['MAX_DOCUMENT', 'MAX_NODES']


#: Largest accepted document, in characters (bytes for a file).
MAX_DOCUMENT = 5_000_000
#: Largest number of YAML nodes after aliases are expanded (each use counts).
MAX_NODES = 1_000_000


class _LineDict(dict):
    """A YAML mapping that remembers its line and the line of each key."""


class _LineList(list):
    """A YAML sequence that remembers its line and the line of each item."""


class _SpecLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that builds line-aware containers.

    It also reads ``1e-3`` as a number (as YAML 1.2 and editors do); YAML 1.1
    would silently read it as text.
    """


def _node_line(node) -> int:
    return node.start_mark.line + 1


def _construct_mapping(loader, node):
    loader.flatten_mapping(node)  # YAML merge keys (`<<: *base`)
    data = _LineDict()
    data.line = _node_line(node)
    data.key_lines = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        data[key] = loader.construct_object(value_node, deep=True)
        data.key_lines[key] = _node_line(key_node)
    return data


def _construct_sequence(loader, node):
    data = _LineList(loader.construct_object(n, deep=True) for n in node.value)
    data.line = _node_line(node)
    data.item_lines = [_node_line(n) for n in node.value]
    return data


_SpecLoader.add_constructor("tag:yaml.org,2002:map", _construct_mapping)
_SpecLoader.add_constructor("tag:yaml.org,2002:seq", _construct_sequence)
_SpecLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?[0-9][0-9_]*(?:\.[0-9_]*)?[eE][-+]?[0-9]+$"),
    list("-+0123456789"),
)


def _check_keys(node, place: str, loader) -> None:
    """Refuse non-scalar keys and keys written twice in one mapping."""
    seen = {}
    for key_node, _ in node.value:
        if key_node.tag == "tag:yaml.org,2002:merge":
            continue
        if not isinstance(key_node, yaml.ScalarNode):
            raise SpecError(
                "a key must be a plain word, not a list or a mapping",
                place=place or "top level", line=_node_line(key_node),
                fix="write keys as simple words, e.g. `noise: 0.1`")
        key = loader.construct_object(key_node)
        if key in seen:
            raise SpecError(
                f"the key `{key}` is written twice in the same mapping "
                f"(first on line {seen[key]})",
                place=_join(place, key), line=_node_line(key_node),
                fix="keep only one of them")
        seen[key] = _node_line(key_node)


def _check_tree(root, loader) -> None:
    """Check the composed YAML graph before any Python object is built.

    Aliases share nodes, so a small file can stand for a huge tree (the
    "billion laughs" attack). Sizes are counted with aliases expanded but each
    shared node is visited once, so this check is fast even on a bomb.
    """
    sizes, open_nodes = {}, set()

    def size(node, place):
        if id(node) in sizes:
            return sizes[id(node)]
        if id(node) in open_nodes:
            raise SpecError("an alias refers to a node that contains it",
                            place=place or "top level", line=_node_line(node),
                            fix="remove the self-referencing alias (`*name` "
                                "inside the node marked `&name`)")
        open_nodes.add(id(node))
        total = 1
        if isinstance(node, yaml.MappingNode):
            _check_keys(node, place, loader)
            for key_node, value_node in node.value:
                total += size(value_node, _join(place, key_node.value)) + 1
        elif isinstance(node, yaml.SequenceNode):
            for i, item in enumerate(node.value):
                total += size(item, f"{place}[{i}]")
        if total > MAX_NODES:
            raise SpecError(
                f"the document is too large: with its aliases expanded it has "
                f"more than {MAX_NODES:,} YAML nodes",
                place=place or "top level", line=_node_line(node),
                fix="write the spec out without deeply nested aliases")
        open_nodes.discard(id(node))
        sizes[id(node)] = total
        return total

    size(root, "")


def _yaml_error(err: yaml.YAMLError, where: str) -> SpecError:
    if isinstance(err, yaml.reader.ReaderError):
        return SpecError(
            f"the file holds a character YAML does not allow (#x{err.character:04x}"
            f" at character {err.position + 1})" if isinstance(err.character, int) else
            "the file holds bytes that are not text", place=where,
            fix="save the spec as plain UTF-8 text, without control characters")
    mark = getattr(err, "problem_mark", None) or getattr(err, "context_mark", None)
    words = [getattr(err, "context", None), getattr(err, "problem", None)]
    words = " ".join(w for w in words if w) or str(err)
    words = " ".join(words.split())  # one line
    line = mark.line + 1 if mark else None
    at = f" (line {line}, column {mark.column + 1})" if mark else ""
    if isinstance(err, yaml.constructor.ConstructorError) and "merg" in words:
        fix = ("a merge key (`<<:`) takes an alias of a mapping (`<<: *base`) "
               "or a list of such aliases")
    elif isinstance(err, yaml.constructor.ConstructorError):
        fix = "use plain YAML values only: remove the `!` tag"
    elif isinstance(err, yaml.composer.ComposerError):
        fix = ("define each anchor (`&name`) before its aliases (`*name`), "
               "and keep one document per file (no second `---`)")
    else:
        fix = ("check the indentation and punctuation near that line "
               "(YAML indents with spaces, never tabs)")
    return SpecError(f"the file is not valid YAML: {words}{at}",
                     place=where, line=line, fix=fix)


def _read_yaml(text: str, where: str) -> _At:
    """Parse ``text`` safely into line-aware containers; return the root."""
    if len(text) > MAX_DOCUMENT:
        raise SpecError(
            f"the document is too large ({len(text):,} characters; the limit "
            f"is {MAX_DOCUMENT:,})", place=where,
            fix="a spec should be a few kilobytes; use matrix shorthand "
                "(`identity`, a number, a diagonal list) for big blocks")
    loader = None
    try:
        loader = _SpecLoader(text)  # refuses non-printable characters
        root = loader.get_single_node()
        if root is None or root.tag == "tag:yaml.org,2002:null":
            raise SpecError("the file is empty", place=where,
                            fix="start the file with `spec: 1`, then add "
                                "`world`, `sensors` and `areas`")
        if not isinstance(root, yaml.MappingNode):
            raise SpecError("the top level must be a mapping of keys "
                            "(`spec: 1`, `world: ...`)",
                            place=where, line=_node_line(root),
                            fix="start the file with `spec: 1`")
        _check_tree(root, loader)
        data = loader.construct_document(root)
        if not isinstance(data, _LineDict):  # a tagged mapping: `!!set {a, b}`
            raise SpecError("the top level must be a mapping of keys "
                            "(`spec: 1`, `world: ...`)",
                            place=where, line=_node_line(root),
                            fix="start the file with `spec: 1`")
    except yaml.YAMLError as err:
        raise _yaml_error(err, where) from None
    except SpecError:
        raise
    except ValueError as err:  # e.g. an integer of thousands of digits
        raise SpecError(f"a value cannot be read ({err})", place=where,
                        fix="write numbers with at most a few dozen digits "
                            "(1e12, not 1000000000000...)") from None
    except RecursionError:
        raise SpecError("the document is nested too deeply", place=where,
                        fix="flatten the structure; a spec is only a few "
                            "levels deep") from None
    finally:
        if loader is not None:
            loader.dispose()
    return _At(data, "", data.line)
