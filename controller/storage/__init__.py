"""Run log: one SQLite file per run (WAL mode), crash-safe, readable while the run writes.

- :class:`RunLogWriter` creates a log (or resumes an interrupted one) and writes samples
  every tick, committing at most every ``commit_interval_s`` of the run's clock; alarms,
  events, closed incubation windows and operator actions are committed at once.
- :class:`LogConnection` is the pandas-free read-only base (metadata, end, newest row);
  :class:`RunLogReader` reads it into pandas frames, also while the writer is active:
  whole (:meth:`RunLogReader.samples`) or, for logs of any length in bounded memory, in
  chunks of consecutive rows (:meth:`RunLogReader.iter_samples`).
- :func:`export` writes the contract run table (``squall export``) to Parquet or CSV.

The row shapes in :mod:`._records` are the one source of truth for the tables, the frames
and the export.

Names are re-exported lazily (see :mod:`controller._lazy`): importing the package is
cheap, and a submodule loads the first time one of its names is used.
"""

from typing import TYPE_CHECKING

from controller._lazy import lazy_exports

if TYPE_CHECKING:
    from ._columns import Column, ValueKind, columns_of
    from ._connection import LogConnection
    from ._contract import EXPORT_COLUMNS
    from ._export import ExportFormat, export
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
    from ._schema import APPLICATION_ID, SCHEMA_VERSION, TABLES, open_log, read_end, read_meta
    from ._writer import RunLogWriter

_NAMES = {
    "APPLICATION_ID": "_schema",
    "AlarmAction": "_records",
    "AlarmLevel": "_records",
    "AlarmRecord": "_records",
    "AuditRecord": "_records",
    "ChamberRecord": "_records",
    "ClockKind": "_records",
    "Column": "_columns",
    "EXPORT_COLUMNS": "_contract",
    "EventKind": "_records",
    "EventRecord": "_records",
    "ExportFormat": "_export",
    "IncubationState": "_records",
    "LightState": "_records",
    "LogConnection": "_connection",
    "ResumePoint": "_records",
    "RunEnd": "_records",
    "RunEndReason": "_records",
    "RunLogInfo": "_records",
    "RunLogReader": "_reader",
    "RunLogWriter": "_writer",
    "RunMeta": "_records",
    "SCHEMA_VERSION": "_schema",
    "SampleRow": "_records",
    "SessionRecord": "_records",
    "TABLES": "_schema",
    "ValueKind": "_columns",
    "WindowEndReason": "_records",
    "WindowRecord": "_records",
    "columns_of": "_columns",
    "export": "_export",
    "frame_columns": "_reader",
    "frame_dtypes": "_reader",
    "open_log": "_schema",
    "read_end": "_schema",
    "read_meta": "_schema",
}

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)

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
    "LogConnection",
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
    "open_log",
    "read_end",
    "read_meta",
]
