"""Shared pytest configuration. Tests never sleep in real time and never need devices."""

from __future__ import annotations

from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture
def repo_root() -> Path:
    """The checkout's root folder."""
    return REPO
