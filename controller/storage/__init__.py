"""Run log: one SQLite file per run (WAL mode), crash-safe, readable while the run writes.

- :class:`RunLogWriter` creates a log (or resumes an interrupted one) and writes samples
  every tick, committing at most every ``commit_interval_s`` of the run's clock; alarms,
  events, closed incubation windows and operator actions are committed at once.
- :class:`RunLogReader` reads it into pandas frames, also while the writer is active.
- :func:`export` writes the contract run table (``squall export``) to Parquet or CSV.

The row shapes in :mod:`._records` are the one source of truth for the tables, the frames
and the export.
"""

from ._columns import Column, ValueKind, columns_of
from ._export import EXPORT_COLUMNS, ExportFormat, export
from ._reader import RunLogReader, frame_columns, frame_dtypes
from ._records import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    AuditRecord,
    ChamberRecord,
    ClockKind,
    EventKind,
    EventRecord,
    IncubationState,
    LightState,
    ResumePoint,
    RunEnd,
    RunEndReason,
    RunLogInfo,
    RunMeta,
    SampleRow,
    SessionRecord,
    WindowEndReason,
    WindowRecord,
)
from ._schema import APPLICATION_ID, SCHEMA_VERSION, TABLES
from ._writer import RunLogWriter

__all__ = [
    "APPLICATION_ID",
    "EXPORT_COLUMNS",
    "SCHEMA_VERSION",
    "TABLES",
    "AlarmAction",
    "AlarmLevel",
    "AlarmRecord",
    "AuditRecord",
    "ChamberRecord",
    "ClockKind",
    "Column",
    "EventKind",
    "EventRecord",
    "ExportFormat",
    "IncubationState",
    "LightState",
    "ResumePoint",
    "RunEnd",
    "RunEndReason",
    "RunLogInfo",
    "RunLogReader",
    "RunLogWriter",
    "RunMeta",
    "SampleRow",
    "SessionRecord",
    "ValueKind",
    "WindowEndReason",
    "WindowRecord",
    "columns_of",
    "export",
    "frame_columns",
    "frame_dtypes",
]
