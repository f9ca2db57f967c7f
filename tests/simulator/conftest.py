"""Simulator tests.

``tests/`` is on ``sys.path`` (pytest puts the top conftest's folder there), so without help
this folder would shadow the editable-installed ``simulator`` package as a namespace package.
Putting the checkout root first makes ``import simulator`` find the real package, as
``python -m pytest`` would.
"""

from __future__ import annotations

import sys
from pathlib import Path

_ROOT = str(Path(__file__).resolve().parents[2])
if _ROOT not in sys.path:
    sys.path.insert(0, _ROOT)
_stale = sys.modules.get("simulator")
if _stale is not None and getattr(_stale, "__file__", None) is None:
    del sys.modules["simulator"]
