"""Sphinx configuration of the API reference.

Build: ``python -m sphinx -W -b html docs docs/_build/html`` (warnings are
errors, as in CI).
"""

import os
import sys

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), ".."))
sys.path.insert(0, ROOT)  # document this checkout, not an installed copy

import hierarchy  # noqa: E402

project = "hierarchy"
author = "the hierarchy developers"
copyright = "the hierarchy developers, MIT licence"
release = version = hierarchy.__version__

extensions = [
    "sphinx.ext.autodoc",
    "numpydoc",
    "myst_parser",
]

# The API pages are the public names: those in the ``__all__`` of the
# package and its subpackages, and of the modules the api pages list.
autodoc_default_options = {"members": True, "show-inheritance": True}
autodoc_member_order = "bysource"
autodoc_typehints = "none"  # the docstrings' Parameters sections give the types
# Heavy imports are made inside functions; none need mocking.

# numpydoc: no autosummary tables of class members (autodoc lists them).
numpydoc_show_class_members = False
numpydoc_class_members_toctree = False

source_suffix = {".rst": "restructuredtext", ".md": "markdown"}
master_doc = "index"
exclude_patterns = ["_build"]
# The Markdown pages link to each other and to files of the repository by
# relative path (they are read on the forge too); headings get anchors for
# the `page.md#section` links.
myst_heading_anchors = 3

html_theme = "alabaster"
html_title = f"hierarchy {release}"
