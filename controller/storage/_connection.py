"""A read-only connection to one run log, without pandas: the base of every log reader.

Rules of this module
--------------------
- :class:`LogConnection` opens the log read-only with :func:`~._schema.open_log` (the
  application id, completeness and schema version are checked there), and gives the
  queries every reader needs: the run's metadata, how it ended, the newest sample's row id.
  :class:`~controller.storage.RunLogReader` (pandas frames, for analysis and export) and the
  views' log file (plain rows and numpy columns, for a fast first paint) build on it.
- In WAL mode a reader sees the last committed state and never blocks the writer; each
  query is one consistent snapshot.
- Any SQLite error is a :class:`~controller.errors.SquallError` naming the file. Using a
  closed connection is a programming error (``RuntimeError``). A connection may be used
  from one thread at a time.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Sequence
from pathlib import Path
from types import TracebackType
from typing import Any, Self

from controller.errors import SquallError

from ._records import RunEnd, RunMeta
from ._schema import open_log, read_end, read_meta

__all__ = ["LogConnection"]


class LogConnection:
    """Read-only connection to one run log.

    Parameters
    ----------
    path
        The log file.

    Raises
    ------
    SquallError
        Missing file, not a squall run log, incomplete, or a newer log schema.
    """

    def __init__(self, path: str | Path) -> None:
        self._path = Path(path)
        self._conn: sqlite3.Connection | None = None
        self._conn, self._version = open_log(self._path, readonly=True)

    @property
    def path(self) -> Path:
        """The log file."""
        return self._path

    @property
    def schema_version(self) -> int:
        """Log schema version of the file, dimensionless."""
        return self._version

    def close(self) -> None:
        """Close the connection (idempotent)."""
        if self._conn is not None:
            self._conn.close()
            self._conn = None

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def _connection(self) -> sqlite3.Connection:
        """The open connection (a closed one is a programming error)."""
        if self._conn is None:
            raise RuntimeError(f"run log {self._path} is closed")
        return self._conn

    def _fetch(self, sql: str, params: Sequence[Any] = ()) -> list[tuple[Any, ...]]:
        """Run one query, turning SQLite errors into SquallError naming the file."""
        try:
            return self._connection().execute(sql, tuple(params)).fetchall()
        except sqlite3.DatabaseError as exc:
            raise SquallError(f"cannot read run log: {exc}", file=self._path) from exc

    def meta(self) -> RunMeta:
        """The run's metadata (protocol and rig text, start, clock kind, chambers, version)."""
        return read_meta(self._connection(), self._path)

    def end(self) -> RunEnd | None:
        """How the run ended, or None while it has not (or was interrupted)."""
        return read_end(self._connection(), self._path)

    def last_rowid(self) -> int:
        """Row id of the newest committed sample, 0 when there is none."""
        return int(self._fetch("SELECT coalesce(max(seq), 0) FROM samples")[0][0])
