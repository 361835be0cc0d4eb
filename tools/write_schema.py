"""Writer of the shipped JSON Schema.
"""

from __future__ import annotations

import argparse
import json
import sys

from hierarchy.io import atomic_write_text
from hierarchy.spec.keys import SCHEMA_PATH, spec_schema
from hierarchy.spec.kinds import SPEC_VERSION

__all__ = ['main']


def main(argv=None) -> int:
    """Print the spec JSON Schema, or write it to ``spec-v1.schema.json``.

    This is what ``python tools/write_schema.py [--write-schema]`` runs.

    Parameters
    ----------
    argv : list of str, optional
        Command-line arguments (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        The exit status, 0.

    Examples
    --------
    >>> main([])  # doctest: +ELLIPSIS
    {
      "$schema": "https://json-schema.org/draft/2020-12/schema",
    ...
    0
    """
    parser = argparse.ArgumentParser(
        prog="python tools/write_schema.py",
        description="Print the JSON Schema of spec files (version "
                    f"{SPEC_VERSION}).")
    parser.add_argument("--write-schema", action="store_true",
                        help=f"write it to {SCHEMA_PATH} instead")
    args = parser.parse_args(argv)
    text = json.dumps(spec_schema(), indent=2, ensure_ascii=False) + "\n"
    if args.write_schema:
        atomic_write_text(SCHEMA_PATH, text)
        print(f"wrote {SCHEMA_PATH}")
    else:
        sys.stdout.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
