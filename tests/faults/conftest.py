"""Fixtures of the fault matrix: the book every scenario's record goes into.

When ``SQUALL_FAULT_RECORDS`` names a file, the records of the session are written there as
JSON when it ends; ``python -m tests.faults.table`` sets it and renders the README's table
from that file.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest

from ._harness import RecordBook

RECORDS_ENV = "SQUALL_FAULT_RECORDS"
"""Environment variable naming the JSON file the session's records are written to."""


@pytest.fixture(scope="session")
def records() -> Iterator[RecordBook]:
    """The session's fault records (written to ``$SQUALL_FAULT_RECORDS`` at the end)."""
    book = RecordBook()
    yield book
    target = os.environ.get(RECORDS_ENV)
    if target:
        book.write(Path(target))
