"""Lazy re-exports for package ``__init__`` modules (PEP 562).

Rule: a package whose submodules pull in heavy libraries (pandas, scipy, pvlib) re-exports
their names lazily, so ``squall --help`` and the light commands start fast; the submodule is
imported the first time one of its names is used.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping
from typing import Any

__all__ = ["lazy_exports"]


def lazy_exports(
    package: str, names: Mapping[str, str]
) -> tuple[Callable[[str], Any], Callable[[], list[str]]]:
    """Return ``(__getattr__, __dir__)`` for a package that re-exports ``names`` lazily.

    Parameters
    ----------
    package
        The package's ``__name__``.
    names
        Exported name → submodule (relative to ``package``, e.g. ``"_writer"``) that defines it.
    """

    def __getattr__(name: str) -> Any:
        module_name = names.get(name)
        if module_name is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(f"{package}.{module_name}"), name)
        globals_ = importlib.import_module(package).__dict__
        globals_[name] = value  # cache: later look-ups skip __getattr__
        return value

    def __dir__() -> list[str]:
        return sorted(names)

    return __getattr__, __dir__
