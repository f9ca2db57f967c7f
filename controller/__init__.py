"""squall: controller and experiment scheduler for laboratory incubation chambers.

The package is split into a pure core (``protocol``, ``control``, ``science``) that does no
I/O and reads no clock, and a thin imperative shell (``cli``, drivers, storage, UI) that wires
the core to files, devices and people.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("squall")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
