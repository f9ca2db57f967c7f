"""The schedule's SQLite file: where it is, how it is opened, its tables, its transactions.

Rules of this module
--------------------
- A new file is created readable and writable by its owner only (0600; SQLite gives its -wal
  and -shm files the same mode), with its folder. Its tables carry a version
  (``PRAGMA user_version``) and an application id, so another SQLite file is refused instead
  of being written into, and so is a schedule written by another format version.
- WAL journal (readers never block the writer), ``synchronous = FULL`` (every commit is on
  disk when it returns: schedule changes are rare and precious; SQLite documentation,
  "PRAGMA synchronous"), and a busy timeout so writers in several processes wait for each
  other instead of failing.
- :func:`transaction` is ``BEGIN IMMEDIATE`` … ``COMMIT``, rolled back on any exception, so
  a refused change leaves the content exactly as it was.
- Instants are stored as fixed-width ISO 8601 UTC text, which sorts like the instants.
"""

from __future__ import annotations

import contextlib
import os
import sqlite3
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

from controller.errors import RuntimeFailure, SquallError

__all__ = [
    "COLUMNS",
    "DEFAULT_SCHEDULE",
    "SCHEMA_VERSION",
    "open_database",
    "stamp",
    "transaction",
    "unstamp",
]

DEFAULT_SCHEDULE = Path("runs") / "schedule.sqlite"
"""Store file used when ``--schedule`` is not given (beside the default run logs)."""
SCHEMA_VERSION = 1
"""Version of the store's tables (``PRAGMA user_version``)."""
_APPLICATION_ID = 0x5351_5343  # "SQSC": marks a squall schedule file

_SCHEMA = """
CREATE TABLE IF NOT EXISTS experiments (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    id TEXT NOT NULL UNIQUE,
    rig_path TEXT NOT NULL,
    rig_name TEXT NOT NULL,
    protocol_path TEXT NOT NULL,
    protocol_text TEXT NOT NULL,
    protocol_sha256 TEXT NOT NULL,
    title TEXT NOT NULL,
    chambers TEXT NOT NULL,
    start_utc TEXT NOT NULL,
    end_utc TEXT NOT NULL,
    owner TEXT NOT NULL,
    state TEXT NOT NULL,
    log_path TEXT,
    note TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS experiments_rig_start ON experiments (rig_path, start_utc);
CREATE TABLE IF NOT EXISTS history (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    experiment TEXT NOT NULL REFERENCES experiments (id),
    time_utc TEXT NOT NULL,
    from_state TEXT,
    to_state TEXT NOT NULL,
    by TEXT NOT NULL,
    reason TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS history_experiment ON history (experiment, seq);
"""

COLUMNS = (
    "id, rig_path, rig_name, protocol_path, protocol_text, protocol_sha256, title, chambers, "
    "start_utc, end_utc, owner, state, log_path, note"
)
"""Columns of ``experiments`` in the order :class:`~controller.schedule.Experiment` reads them."""


def stamp(moment: datetime) -> str:
    """Fixed-width UTC text of an aware instant (sorts like the instants)."""
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def unstamp(text: str) -> datetime:
    """The aware UTC instant of a :func:`stamp` text."""
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)


@contextlib.contextmanager
def transaction(conn: sqlite3.Connection) -> Iterator[None]:
    """``BEGIN IMMEDIATE`` … ``COMMIT``; ``ROLLBACK`` when the block raises anything.

    Parameters
    ----------
    conn
        A connection in autocommit mode (``isolation_level=None``) (no unit).
    """
    try:
        conn.execute("BEGIN IMMEDIATE")
    except sqlite3.OperationalError as exc:
        raise RuntimeFailure(
            f"the schedule stayed locked by another process ({exc}); try again"
        ) from exc
    try:
        yield
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


def _ensure_schema(conn: sqlite3.Connection, path: Path) -> None:
    app = conn.execute("PRAGMA application_id").fetchone()[0]
    version = conn.execute("PRAGMA user_version").fetchone()[0]
    tables = conn.execute("SELECT count(*) FROM sqlite_master").fetchone()[0]
    if app == 0 and version == 0 and tables == 0:
        for statement in _SCHEMA.split(";"):  # not executescript: it would COMMIT
            if statement.strip():
                conn.execute(statement)
        conn.execute(f"PRAGMA application_id = {_APPLICATION_ID}")
        conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        return
    if app != _APPLICATION_ID:
        raise SquallError(
            "is an SQLite file but not a squall schedule; name another --schedule file",
            file=path,
        )
    if version != SCHEMA_VERSION:
        raise SquallError(
            f"schedule format {version} is not the one this squall reads ({SCHEMA_VERSION}); "
            "use the squall version that wrote it",
            file=path,
        )


def open_database(path: Path, busy_timeout_s: float) -> sqlite3.Connection:
    """Open (creating when missing) a schedule file and check its tables.

    Parameters
    ----------
    path
        The store file (no unit).
    busy_timeout_s
        How long a writer waits for another process's transaction to finish, s.

    Returns
    -------
    sqlite3.Connection
        In autocommit mode; transactions through :func:`transaction` (no unit).

    Raises
    ------
    SquallError
        A folder, an unreadable file, or a file that is not a schedule of this format.
    """
    if path.is_dir():
        raise SquallError("is a folder, not a schedule file", file=path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        if not path.exists():
            with contextlib.suppress(FileExistsError):
                os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
        conn = sqlite3.connect(path, isolation_level=None, timeout=busy_timeout_s)
    except (OSError, sqlite3.Error) as exc:
        raise SquallError(f"cannot open the schedule: {exc}", file=path) from exc
    try:
        conn.execute(f"PRAGMA busy_timeout = {int(busy_timeout_s * 1000)}")
        mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if mode != "wal":
            raise RuntimeFailure(
                f"schedule {path}: the file system does not support SQLite's WAL mode "
                f"(got journal mode {mode!r}); keep the schedule on a local disk"
            )
        conn.execute("PRAGMA synchronous = FULL")
        conn.execute("PRAGMA foreign_keys = ON")
        with transaction(conn):
            _ensure_schema(conn, path)
    except sqlite3.DatabaseError as exc:
        conn.close()
        raise SquallError(f"is not a squall schedule (SQLite says: {exc})", file=path) from None
    except BaseException:
        conn.close()
        raise
    return conn
