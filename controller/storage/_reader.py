"""Read a run log into pandas, also while its run is still writing it.

Rules of this module
--------------------
- Readers open the log read-only. In WAL mode a reader sees the last committed state and
  never blocks the writer (nor is blocked by it); each call is one consistent snapshot.
- Frame columns and dtypes come from the record classes (:mod:`._records`) through
  :mod:`._columns`: floats are ``float64`` (NaN where NULL), UTC times are tz-aware
  ``datetime64[ns, UTC]`` rounded to the microsecond, enums and few-valued text are
  categories, other text is the ``string`` dtype. Every frame is indexed by ``seq``, the row
  id (write order), which live watchers pass back to :meth:`RunLogReader.tail`.
- Logs of a month at 1 Hz hold tens of millions of rows: :meth:`RunLogReader.iter_samples`
  reads them in chunks of a bounded number of rows (keyset pagination on ``seq``), so memory
  depends on the chunk size, not on the log. :meth:`RunLogReader.samples` is the whole
  result at once, for small logs and narrow filters.
- Anything wrong with the file (missing, not a log, newer schema, damaged) is a
  :class:`SquallError` naming the file.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np
import pandas as pd

from controller.errors import SquallError

from ._columns import Column, ValueKind, columns_of
from ._connection import LogConnection
from ._records import (
    AlarmRecord,
    AuditRecord,
    ChamberRecord,
    EventRecord,
    RunLogInfo,
    SampleRow,
    SessionRecord,
    WindowRecord,
)

__all__ = ["RunLogReader", "frame_columns", "frame_dtypes"]

_SAMPLE_COLS = columns_of(SampleRow)
_SAMPLE_BY_FRAME_NAME = {c.frame_name: c for c in _SAMPLE_COLS}


def _dtype(column: Column) -> Any:
    """pandas dtype of a column in frames."""
    kind = column.kind
    if kind is ValueKind.FLOAT:
        return np.dtype("float64")
    if kind is ValueKind.UTC:
        return pd.DatetimeTZDtype(unit="ns", tz="UTC")
    if kind is ValueKind.INT:
        return pd.Int64Dtype() if column.nullable else np.dtype("int64")
    if kind is ValueKind.BOOL:
        return pd.BooleanDtype() if column.nullable else np.dtype("bool")
    if kind is ValueKind.ENUM and column.enum is not None:
        return pd.CategoricalDtype([m.value for m in column.enum])
    if column.category:
        return pd.CategoricalDtype()
    return pd.StringDtype()


def frame_columns(record: type) -> list[str]:
    """Frame column names of a record class, in order (``utc_s`` shown as ``time``).

    Parameters
    ----------
    record
        A record class such as :class:`SampleRow`.
    """
    return [c.frame_name for c in columns_of(record)]


def frame_dtypes(record: type) -> dict[str, Any]:
    """pandas dtypes of a record class's frame columns (categories of free text are open).

    Parameters
    ----------
    record
        A record class such as :class:`SampleRow`.
    """
    return {c.frame_name: _dtype(c) for c in columns_of(record)}


def _series_values(column: Column, values: np.ndarray) -> Any:
    """Convert one column's stored values (a 1-D object array) to the frame dtype."""
    kind = column.kind
    if kind is ValueKind.FLOAT:
        return values.astype("float64")  # None becomes NaN
    if kind is ValueKind.UTC:
        seconds = values.astype("float64")
        times = pd.DatetimeIndex(pd.to_datetime(seconds, unit="s", utc=True)).round("us")
        # pandas picks a coarser unit when every value is a whole second; pin the documented
        # one so that all frames (and all chunks of one read) share one dtype
        return times.as_unit("ns")
    if kind is ValueKind.ENUM or column.category:
        return pd.Categorical(values, dtype=_dtype(column))
    if kind is ValueKind.BOOL and not column.nullable:
        return values.astype("bool")
    if kind is ValueKind.INT and not column.nullable:
        return values.astype("int64")
    return pd.array(values, dtype=_dtype(column))


def _frame(rows: list[tuple[Any, ...]], columns: Sequence[Column]) -> pd.DataFrame:
    """Build a frame from ``(seq, value, value, …)`` rows; ``seq`` becomes the index."""
    # One 2-D object array is the cheapest way from SQLite's row tuples to columns (about
    # 4x faster than transposing with zip and converting each tuple).
    table = np.empty((len(rows), len(columns) + 1), dtype=object)
    if rows:
        table[:] = rows
    index = pd.Index(table[:, 0].astype("int64"), name="seq")
    data = {c.frame_name: _series_values(c, table[:, i + 1]) for i, c in enumerate(columns)}
    frame = pd.DataFrame(data, index=index)
    if frame.columns.size == 0:  # no columns: keep the (empty) shape explicit
        frame = pd.DataFrame(index=index)
    return frame


def _sample_filter(
    chamber: str | Sequence[str] | None, t_from: float | None, t_to: float | None
) -> tuple[list[str], list[Any]]:
    """SQL conditions and their parameters selecting samples by chamber and clock time."""
    where: list[str] = []
    params: list[Any] = []
    if chamber is not None:
        ids = [chamber] if isinstance(chamber, str) else list(chamber)
        where.append(f"chamber IN ({', '.join('?' for _ in ids)})")
        params += ids
    if t_from is not None:
        where.append("t_s >= ?")
        params.append(float(t_from))
    if t_to is not None:
        where.append("t_s < ?")
        params.append(float(t_to))
    return where, params


class RunLogReader(LogConnection):
    """Read-only view of one run log.

    Parameters
    ----------
    path
        The log file.

    Raises
    ------
    SquallError
        Missing file, not a squall run log, incomplete, or a newer log schema.
    """

    def info(self) -> RunLogInfo:
        """Metadata plus whether and how the run ended, sessions and sample count."""
        meta = self.meta()
        end = self.end()
        sessions = self._fetch("SELECT count(*) FROM sessions")[0][0]
        # rows are never deleted, so the largest row id is the number of samples
        samples = self._fetch("SELECT coalesce(max(seq), 0) FROM samples")[0][0]
        return RunLogInfo(
            meta=meta,
            end=end,
            schema_version=self._version,
            sessions=int(sessions),
            samples=int(samples),
        )

    def chambers(self) -> tuple[ChamberRecord, ...]:
        """The rig's chambers as they were at the start of the run, in rig order."""
        return self.meta().chambers

    # -- samples ----------------------------------------------------------------------------

    def samples(
        self,
        chamber: str | Sequence[str] | None = None,
        columns: Sequence[str] | None = None,
        t_from: float | None = None,
        t_to: float | None = None,
    ) -> pd.DataFrame:
        """Sample rows as a frame indexed by ``seq``, in write order.

        Parameters
        ----------
        chamber
            One chamber id or several; None for all.
        columns
            Frame column names to return (see :func:`frame_columns`); None for all.
        t_from
            Only rows with clock time ``t_s >= t_from``, s.
        t_to
            Only rows with clock time ``t_s < t_to``, s.

        Returns
        -------
        pandas.DataFrame
            One row per chamber per logged tick; ``time`` is tz-aware UTC.

        Raises
        ------
        SquallError
            An unknown column name.

        See Also
        --------
        iter_samples : the same rows in chunks of bounded size, for big logs.
        """
        cols = self._sample_columns(columns)
        where, params = _sample_filter(chamber, t_from, t_to)
        return self._sample_frame(cols, where, params, limit=None)

    def iter_samples(
        self,
        columns: str | Sequence[str] | None = None,
        *,
        chamber: str | Sequence[str] | None = None,
        t_from: float | None = None,
        t_to: float | None = None,
        chunk_rows: int = 200_000,
        last_seq: int | None = None,
    ) -> Iterator[pd.DataFrame]:
        """Sample rows in chunks of consecutive matching rows, in write order.

        The rows, columns and dtypes are those of :meth:`samples` with the same arguments;
        only they come ``chunk_rows`` at a time, so memory stays bounded however long the
        log. Each chunk is one query (one consistent snapshot) and holds no lock between
        chunks, so a run writing the log is never held up by a slow consumer.

        Parameters
        ----------
        columns
            Frame column names to return (see :func:`frame_columns`); None for all.
        chamber
            One chamber id or several; None for all.
        t_from
            Only rows with clock time ``t_s >= t_from``, s.
        t_to
            Only rows with clock time ``t_s < t_to``, s.
        chunk_rows
            Rows per chunk, dimensionless, at least 1; every chunk but the last has exactly
            this many rows.
        last_seq
            Read only rows with ``seq <= last_seq`` (row id, dimensionless); None for the
            rows committed when this method is called. Rows committed later are left for the
            next call (or :meth:`tail`), so one iteration never grows while it runs.

        Returns
        -------
        Iterator[pandas.DataFrame]
            Chunks indexed by ``seq``, none of them empty (no chunk at all when no row
            matches). Categories of free-text columns such as ``chamber`` and ``phase`` are
            the values present in the chunk, so concatenated chunks hold those columns as
            text (``object``).

        Raises
        ------
        SquallError
            An unknown column name, at the call (before any row is read), naming it.
        ValueError
            ``chunk_rows`` below 1.
        RuntimeError
            The reader is closed before the iteration ends.
        """
        cols = self._sample_columns(columns)
        if int(chunk_rows) < 1:
            raise ValueError(f"chunk_rows must be at least 1, not {chunk_rows!r}")
        where, params = _sample_filter(chamber, t_from, t_to)
        end = self.last_rowid() if last_seq is None else int(last_seq)
        return self._chunks(cols, where, params, end, int(chunk_rows))

    def _chunks(
        self,
        cols: Sequence[Column],
        where: list[str],
        params: list[Any],
        end: int,
        chunk_rows: int,
    ) -> Iterator[pd.DataFrame]:
        """Consecutive frames of matching rows with ``seq <= end`` (keyset pagination)."""
        after = 0
        while after < end:
            frame = self._sample_frame(
                cols, ["seq > ?", "seq <= ?", *where], [after, end, *params], limit=chunk_rows
            )
            if frame.empty:
                return
            yield frame
            if len(frame) < chunk_rows:
                return
            after = int(frame.index[-1])

    def tail(self, since_rowid: int, limit: int | None = None) -> pd.DataFrame:
        """Samples written after row ``since_rowid``, for live watchers.

        Parameters
        ----------
        since_rowid
            Row id already seen (0 for everything); pass back ``frame.index[-1]``.
        limit
            At most this many rows (the oldest first), dimensionless; None for all.

        Returns
        -------
        pandas.DataFrame
            Same columns as :meth:`samples`, indexed by ``seq``.
        """
        return self._sample_frame(_SAMPLE_COLS, ["seq > ?"], [int(since_rowid)], limit=limit)

    def _sample_columns(self, columns: Sequence[str] | None) -> tuple[Column, ...]:
        if columns is None:
            return _SAMPLE_COLS
        if isinstance(columns, str):
            columns = [columns]
        picked: list[Column] = []
        for name in columns:
            col = _SAMPLE_BY_FRAME_NAME.get(name)
            if col is None:
                close = difflib.get_close_matches(name, list(_SAMPLE_BY_FRAME_NAME), n=1)
                hint = f"; did you mean {close[0]!r}?" if close else ""
                raise SquallError(
                    f"unknown sample column {name!r}{hint} (known: "
                    f"{', '.join(_SAMPLE_BY_FRAME_NAME)})",
                    field="columns",
                )
            picked.append(col)
        return tuple(picked)

    def _sample_frame(
        self,
        cols: Sequence[Column],
        where: list[str],
        params: list[Any],
        *,
        limit: int | None,
    ) -> pd.DataFrame:
        select = ", ".join(["seq", *(c.name for c in cols)])
        sql = f"SELECT {select} FROM samples"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY seq"
        if limit is not None:
            sql += " LIMIT ?"
            params = [*params, int(limit)]
        return _frame(self._fetch(sql, params), cols)

    # -- rare tables ------------------------------------------------------------------------

    def _table(self, table: str, record: type) -> pd.DataFrame:
        cols = columns_of(record)
        select = ", ".join(["seq", *(c.name for c in cols)])
        return _frame(self._fetch(f"SELECT {select} FROM {table} ORDER BY seq"), cols)

    def alarms(self) -> pd.DataFrame:
        """Alarm raises, clears and acknowledgements (columns of :class:`AlarmRecord`)."""
        return self._table("alarms", AlarmRecord)

    def events(self) -> pd.DataFrame:
        """Run events: start, stop, gaps, phase changes, holds (:class:`EventRecord`)."""
        return self._table("events", EventRecord)

    def windows(self) -> pd.DataFrame:
        """Closed incubation windows (columns of :class:`WindowRecord`)."""
        return self._table("windows", WindowRecord)

    def audit(self) -> pd.DataFrame:
        """Operator commands and notes (columns of :class:`AuditRecord`)."""
        return self._table("audit", AuditRecord)

    def sessions(self) -> pd.DataFrame:
        """Writer sessions: the start and every resume (columns of :class:`SessionRecord`)."""
        return self._table("sessions", SessionRecord)
