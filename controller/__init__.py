"""squall: controller and experiment scheduler for laboratory incubation chambers.

The package is split into a pure core (``protocol``, ``control``, ``science``) that does no
I/O and reads no clock, and a thin imperative shell (``cli``, drivers, storage, UI) that wires
the core to files, devices and people.
"""

from __future__ import annotations

__all__ = ["__version__"]


def __getattr__(name: str) -> str:
    # The installed version is looked up on first use only: reading the package metadata
    # costs a noticeable part of a command's start-up (e.g. 'squall watch').
    if name != "__version__":
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    from importlib.metadata import PackageNotFoundError, version

    try:
        value = version("squall")
    except PackageNotFoundError:  # running from a source tree that was never installed
        value = "0.0.0+unknown"
    globals()["__version__"] = value
    return value
