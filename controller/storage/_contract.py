"""The exported run table's columns (the design page's contract), without pandas.

Kept apart from :mod:`._export` so the CLI can name the columns in ``--help`` without
loading pandas and pyarrow.
"""

from __future__ import annotations

from ._columns import Column, columns_of
from ._records import SampleRow

__all__ = ["EXPORT_COLS", "EXPORT_COLUMNS"]

#: Sample columns that are exported, in order (the run clock ``t_s`` stays internal).
EXPORT_COLS: tuple[Column, ...] = tuple(c for c in columns_of(SampleRow) if c.name != "t_s")
#: Column names of the exported run table, in order (the design page's contract).
EXPORT_COLUMNS: tuple[str, ...] = tuple(c.frame_name for c in EXPORT_COLS)
