"""The CLI starts quickly: building the parser must not load the heavy numeric stack.

Loading scipy (through pvlib), matplotlib, textual or pymodbus costs seconds on a small lab
computer; commands import them inside their handlers. This test fails if a command module
or a package ``__init__`` starts importing them at module level again.
"""

from __future__ import annotations

import subprocess
import sys

HEAVY = ("pandas", "scipy", "pvlib", "matplotlib", "textual", "pymodbus")


def test_building_the_parser_leaves_heavy_libraries_unloaded() -> None:
    code = (
        "import sys, controller.cli as c; c.build_parser(); "
        f"print(','.join(m for m in {HEAVY!r} if m in sys.modules))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120
    )
    assert out.stdout.strip() == "", f"loaded at start-up: {out.stdout.strip()}"
