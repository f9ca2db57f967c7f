"""A run log read for the views: plain rows and numpy columns, no pandas.

Rules of this module
--------------------
- The views read a log often and in small bites (a live poll reads a few ticks; a replay
  loads chunks of a few thousand rows). :class:`LogFile` does that straight from SQLite
  with the storage package's own schema (its ``open_log`` checks, ``read_meta``,
  ``read_end`` and the record columns of :func:`~controller.storage.columns_of`), so the
  first paint of ``squall watch`` needs neither pandas nor a data frame per poll.
- Rows come back as tuples in write order (``seq``) with the columns asked for; alarm and
  event rows as the folding rows of :mod:`._fold`. :func:`sample_columns` turns a list of
  sample tuples into one numpy array per column (UTC time as POSIX s).
- Any SQLite error is a :class:`~controller.errors.SquallError` naming the file. A
  ``LogFile`` never writes; its connection may be used from one thread at a time.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    EventKind,
    EventRecord,
    LogConnection,
    SampleRow,
    columns_of,
)

from ._fold import AlarmRow, EventRow

if TYPE_CHECKING:
    import numpy as np

__all__ = ["SAMPLE_FIELDS", "LogFile", "sample_columns"]

SAMPLE_FIELDS: tuple[str, ...] = tuple(c.name for c in columns_of(SampleRow))
"""Every column of the samples table, in record order (``utc_s`` in POSIX s)."""
_FLOAT_FIELDS = frozenset(c.name for c in columns_of(SampleRow) if c.kind.value in ("float", "utc"))
_ALARM_FIELDS = ("utc_s", "action", "level", "code", "reason", "chamber", "user")
_EVENT_FIELDS = ("utc_s", "kind", "phase", "detail")


def _check_fields(fields: Sequence[str], known: Sequence[str]) -> None:
    unknown = [f for f in fields if f not in known]
    if unknown:  # a programming error, never user input
        raise ValueError(f"not columns of the table: {', '.join(unknown)}")


# the folding rows rely on these record columns: a change in storage shows at import
_check_fields(_ALARM_FIELDS, [c.name for c in columns_of(AlarmRecord)])
_check_fields(_EVENT_FIELDS, [c.name for c in columns_of(EventRecord)])


class LogFile(LogConnection):
    """Read-only rows of one run log.

    Parameters
    ----------
    path
        The log file.

    Raises
    ------
    SquallError
        Missing, not a squall run log, incomplete, or a newer log schema.
    """

    # -- samples ----------------------------------------------------------------------------

    def tail(
        self,
        since_rowid: int,
        limit: int | None = None,
        fields: Sequence[str] = SAMPLE_FIELDS,
    ) -> list[tuple[Any, ...]]:
        """Sample rows written after row ``since_rowid``, oldest first.

        Parameters
        ----------
        since_rowid
            Row id already seen (0 for everything).
        limit
            At most this many rows, dimensionless; None for all.
        fields
            Columns to return (names of :class:`~controller.storage.SampleRow` fields).

        Returns
        -------
        list of tuple
            ``(seq, *fields)`` per row; NULL is None.
        """
        _check_fields(fields, SAMPLE_FIELDS)
        sql = f"SELECT seq, {', '.join(fields)} FROM samples WHERE seq > ? ORDER BY seq"
        params: list[Any] = [int(since_rowid)]
        if limit is not None:
            sql += " LIMIT ?"
            params.append(int(limit))
        return self._fetch(sql, params)

    def newest_utc_s(self, chamber: str) -> float | None:
        """UTC time of a chamber's newest sample, POSIX s; None without samples.

        Parameters
        ----------
        chamber
            Chamber id.
        """
        rows = self._fetch(
            "SELECT utc_s FROM samples WHERE chamber = ? ORDER BY seq DESC LIMIT 1", [chamber]
        )
        return float(rows[0][0]) if rows else None

    def first_seq_from(self, utc_s: float) -> int:
        """Row id of the first sample at or after a UTC time (one past the last if none).

        Samples are written in time order (a resumed run goes on later), so this is a binary
        search over row ids: a few indexed lookups however long the log is.

        Parameters
        ----------
        utc_s
            UTC wall time, POSIX s.
        """
        lo, hi = 1, self.last_rowid() + 1
        while lo < hi:
            mid = (lo + hi) // 2
            rows = self._fetch(
                "SELECT utc_s FROM samples WHERE seq >= ? ORDER BY seq LIMIT 1", [mid]
            )
            if not rows or float(rows[0][0]) >= utc_s:
                hi = mid
            else:
                lo = mid + 1
        return lo

    def chamber_since(
        self, chamber: str, utc_from_s: float, fields: Sequence[str]
    ) -> list[tuple[Any, ...]]:
        """One chamber's sample rows from a UTC time on, in write order.

        Parameters
        ----------
        chamber
            Chamber id.
        utc_from_s
            Earliest UTC wall time, POSIX s.
        fields
            Columns to return.

        Returns
        -------
        list of tuple
            ``(seq, *fields)`` per row; only the rows from :meth:`first_seq_from` on are
            scanned.
        """
        _check_fields(fields, SAMPLE_FIELDS)
        first = self.first_seq_from(utc_from_s)
        sql = (
            f"SELECT seq, {', '.join(fields)} FROM samples "
            "WHERE seq >= ? AND chamber = ? ORDER BY seq"
        )
        return self._fetch(sql, [first, chamber])

    # -- rare tables ------------------------------------------------------------------------

    def alarm_rows(self) -> list[AlarmRow]:
        """Every alarm record, in write order, as folding rows (times in POSIX s)."""
        rows = self._fetch(f"SELECT {', '.join(_ALARM_FIELDS)} FROM alarms ORDER BY seq")
        return [
            AlarmRow(
                utc_s=float(t),
                action=AlarmAction(action),
                level=AlarmLevel(level),
                code=str(code),
                reason=str(reason),
                chamber=chamber,
                user=user,
            )
            for t, action, level, code, reason, chamber, user in rows
        ]

    def event_rows(self) -> list[EventRow]:
        """Every run event, in write order, as folding rows (times in POSIX s)."""
        rows = self._fetch(f"SELECT {', '.join(_EVENT_FIELDS)} FROM events ORDER BY seq")
        return [
            EventRow(utc_s=float(t), kind=EventKind(kind), phase=phase, detail=str(detail or ""))
            for t, kind, phase, detail in rows
        ]


def sample_columns(rows: list[tuple[Any, ...]], fields: Sequence[str]) -> dict[str, np.ndarray]:
    """One numpy array per column of rows from :meth:`LogFile.tail` (``seq`` included).

    Parameters
    ----------
    rows
        ``(seq, *fields)`` tuples.
    fields
        The fields the rows carry, in order.

    Returns
    -------
    dict
        ``seq`` as int64, float columns (measurements, setpoints, outputs, ``utc_s`` in POSIX
        s) as float64 with NaN for NULL, others as object arrays.
    """
    import numpy as np

    table = np.empty((len(rows), len(fields) + 1), dtype=object)
    if rows:
        table[:] = rows
    out: dict[str, np.ndarray] = {"seq": table[:, 0].astype("int64")}
    for i, name in enumerate(fields, start=1):
        column = table[:, i]
        if name in _FLOAT_FIELDS:
            out[name] = column.astype("float64")  # None becomes NaN
        else:
            out[name] = column
    return out
