"""Packages whose parts load on first use (PEP 562), so that importing one
part, or the package, does not import them all."""

from __future__ import annotations

import importlib
import sys

__all__ = ["lazy_parts"]


def lazy_parts(package: str, where: dict):
    """``(__getattr__, __dir__)`` for ``package``: each name of ``where``
    (name -> part module) is imported from its part when first asked for,
    then kept on the package.

    Examples
    --------
    >>> get, _ = lazy_parts("hierarchy.design", {"Options": "result"})
    >>> get("Options").__name__
    'Options'
    """
    def __getattr__(name):
        if name not in where:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(f"{package}.{where[name]}"), name)
        setattr(sys.modules[package], name, value)
        return value

    def __dir__():
        return sorted(set(vars(sys.modules[package])) | set(where))

    return __getattr__, __dir__
