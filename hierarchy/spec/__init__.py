"""Read a circuit spec (YAML, version 1) into the objects of :mod:`hierarchy.spec.model`.

One key table per section of the file lists its keys: whether each is required,
its type, its default and a one-line description. The parser checks the file
against these tables, and :func:`spec_schema` turns the same tables into a JSON
Schema, so the two cannot drift apart. Run ``python -m hierarchy.spec
--write-schema`` to refresh the shipped ``spec-v1.schema.json``.

Every problem is raised as :class:`hierarchy.errors.SpecError` with the place in
the file (``links[2] (low->high).noise``), the line where known, and a fix.
"""

from hierarchy.spec.yamlfile import MAX_DOCUMENT, MAX_NODES
from hierarchy.spec.kinds import SPEC_VERSION
from hierarchy.spec.keys import SCHEMA_PATH, spec_schema
from hierarchy.spec.load import parse_spec, load_spec

__all__ = ['MAX_DOCUMENT', 'MAX_NODES', 'SPEC_VERSION', 'SCHEMA_PATH', 'spec_schema', 'parse_spec', 'load_spec']
