"""Export a run log's samples as the contract run table (Parquet or CSV).

Rule: the exported columns are those of :class:`SampleRow` in field order, without the clock
time ``t_s``, with ``utc_s`` shown as ``time``: exactly the (contract) run table of the
design page. They are derived, not listed, and a test pins them to the contract. Text
columns never hold missing values in the export (``alarm`` is empty when no alarm is
active); missing measurements stay missing (null in Parquet, an empty field in CSV).

The output is written to a temporary file beside the target and renamed over it at the end,
so a failed export never leaves a half-written file under the requested name. Rows are read
and written in chunks, so logs larger than memory export fine; rows committed after the
export started are left out (the export is a consistent prefix of the log).
"""

from __future__ import annotations

import contextlib
import errno
import os
from collections.abc import Callable
from enum import StrEnum
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from controller.errors import RuntimeFailure, SquallError

from ._columns import Column, ValueKind
from ._contract import EXPORT_COLS, EXPORT_COLUMNS
from ._reader import RunLogReader

__all__ = ["EXPORT_COLUMNS", "ExportFormat", "export"]

_EXPORT_COLS = EXPORT_COLS

#: ISO 8601 UTC with microseconds, as written to CSV.
_CSV_TIME_FORMAT = "%Y-%m-%dT%H:%M:%S.%fZ"


class ExportFormat(StrEnum):
    """File formats ``export`` writes, chosen by the output file's extension."""

    PARQUET = "parquet"
    CSV = "csv"


def _format_of(out_path: Path) -> ExportFormat:
    """The export format named by the output file's extension."""
    suffix = out_path.suffix.lower().lstrip(".")
    try:
        return ExportFormat(suffix)
    except ValueError:
        raise SquallError(
            f"cannot export to '.{suffix}' files: name the output FILE.parquet or FILE.csv",
            file=out_path,
        ) from None


def _arrow_type(column: Column) -> pa.DataType:
    """Arrow type of an exported column."""
    if column.kind is ValueKind.UTC:
        return pa.timestamp("us", tz="UTC")
    if column.kind is ValueKind.FLOAT:
        return pa.float64()
    return pa.string()


_ARROW_SCHEMA = pa.schema([pa.field(c.frame_name, _arrow_type(c)) for c in _EXPORT_COLS])


def _contract_frame(samples: pd.DataFrame) -> pd.DataFrame:
    """Reduce a samples frame (all columns) to the contract table."""
    data: dict[str, object] = {}
    for column in _EXPORT_COLS:
        series = samples[column.frame_name]
        if column.kind in (ValueKind.TEXT, ValueKind.ENUM):
            series = series.astype("string").fillna("")
        data[column.frame_name] = series.to_numpy() if column.kind is ValueKind.FLOAT else series
    return pd.DataFrame(data).reset_index(drop=True)


class _Sink:
    """Appends contract frames to one Parquet or CSV file."""

    def __init__(self, fmt: ExportFormat, path: Path) -> None:
        self._fmt = fmt
        self._path = path
        self._parquet: pq.ParquetWriter | None = None
        self._csv_started = False
        if fmt is ExportFormat.PARQUET:
            self._parquet = pq.ParquetWriter(path, _ARROW_SCHEMA, compression="zstd")

    def write(self, frame: pd.DataFrame) -> None:
        if self._parquet is not None:
            table = pa.Table.from_pandas(frame, schema=_ARROW_SCHEMA, preserve_index=False)
            self._parquet.write_table(table)
            return
        frame.to_csv(
            self._path,
            mode="a" if self._csv_started else "w",
            header=not self._csv_started,
            index=False,
            date_format=_CSV_TIME_FORMAT,
            lineterminator="\n",
        )
        self._csv_started = True

    def close(self) -> None:
        if self._parquet is not None:
            self._parquet.close()
            self._parquet = None


def export(
    log_path: str | Path,
    out_path: str | Path,
    *,
    chunk_rows: int = 200_000,
    progress: Callable[[int, int], None] | None = None,
) -> int:
    """Write the run table of a log to ``.parquet`` or ``.csv``.

    Parameters
    ----------
    log_path
        The run log (may still be being written).
    out_path
        Output file; its extension chooses the format. Replaced if it exists.
    chunk_rows
        Rows read and written per chunk, dimensionless.
    progress
        Called after each chunk with (rows written, rows to write), dimensionless.

    Returns
    -------
    int
        Number of rows written, dimensionless.

    Raises
    ------
    SquallError
        Unknown extension, missing output folder, unreadable or invalid log, output not
        writable.
    RuntimeFailure
        The disk filled up while writing.
    """
    log_path, out_path = Path(log_path), Path(out_path)
    fmt = _format_of(out_path)
    if chunk_rows < 1:
        raise ValueError(f"chunk_rows must be >= 1, got {chunk_rows}")
    if not out_path.parent.is_dir():
        raise SquallError("the output's folder does not exist", file=out_path)
    if out_path.is_dir():
        raise SquallError("the output is a folder; name a file", file=out_path)
    tmp = out_path.with_name(f".{out_path.name}.{os.getpid()}.tmp")
    written = 0
    with RunLogReader(log_path) as reader:
        last = reader.last_rowid()  # export a consistent prefix: rows up to this id
        try:
            sink = _Sink(fmt, tmp)
            try:
                since = 0
                while since < last:
                    chunk = reader.tail(since, limit=min(chunk_rows, last - since))
                    if chunk.empty:
                        break
                    sink.write(_contract_frame(chunk))
                    written += len(chunk)
                    since = int(chunk.index[-1])
                    if progress is not None:
                        progress(written, last)
                if written == 0:
                    sink.write(_contract_frame(reader.tail(0, limit=0)))
            finally:
                sink.close()
            os.replace(tmp, out_path)
        except OSError as exc:
            with contextlib.suppress(OSError):
                tmp.unlink()
            if exc.errno in (errno.ENOSPC, errno.EDQUOT, errno.EIO):
                raise RuntimeFailure(f"export to {out_path} failed: {exc}") from exc
            raise SquallError(f"cannot write the export: {exc}", file=out_path) from exc
        except BaseException:
            with contextlib.suppress(OSError):
                tmp.unlink()
            raise
    return written
