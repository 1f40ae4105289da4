"""Lazy public names for the subpackages' ``__init__`` (the map stays light to import and free of cycles)."""

from __future__ import annotations

import importlib

__all__ = ["lazy_entries"]


def lazy_entries(package: str, entries: dict[str, str]):
    """``__getattr__`` and ``__dir__`` for a package whose public names live in its modules.

    Parameters
    ----------
    package : str
        The package's ``__name__``.
    entries : dict name -> module
        Public name -> the module of the package that defines it (``{"load_design": "spec"}``).

    Returns
    -------
    (callable, callable)
        Module-level ``__getattr__`` (imports the module on first use, PEP 562) and ``__dir__``.
    """

    def __getattr__(name: str):
        module = entries.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        return getattr(importlib.import_module(f"{package}.{module}"), name)

    def __dir__():
        return sorted(entries)

    return __getattr__, __dir__
