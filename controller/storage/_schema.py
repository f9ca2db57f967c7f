"""The run log's SQLite schema: tables derived from the records, version checks, opening.

Rules of this module
--------------------
- A run log is an SQLite file whose ``PRAGMA application_id`` is :data:`APPLICATION_ID` and
  whose ``PRAGMA user_version`` is the log schema version (:data:`SCHEMA_VERSION`). Both are
  set in the same transaction that creates the tables, so a file without them is not a log
  (or one whose creation was cut short).
- Every table but ``run`` starts with ``seq INTEGER PRIMARY KEY`` (the SQLite row id: the
  order rows were written in) followed by the columns of its record class. ``run`` holds one
  row (``id = 1``): the columns of :class:`RunMeta` then those of :class:`RunEnd`, which stay
  NULL until the run is marked finished.
- Schema changes only add (tables, nullable columns, enum values) and bump the version; a
  reader refuses files with a newer version than it knows.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

from controller.errors import SquallError

from ._columns import Column, ValueKind, columns_of, insert_sql
from ._records import (
    AlarmRecord,
    AuditRecord,
    ChamberRecord,
    EventRecord,
    RunEnd,
    RunMeta,
    SampleRow,
    SessionRecord,
    WindowRecord,
)

__all__ = [
    "APPLICATION_ID",
    "SCHEMA_VERSION",
    "TABLES",
    "create_schema",
    "open_log",
    "read_end",
    "read_meta",
    "run_columns",
]

#: Log schema version written to ``PRAGMA user_version``, dimensionless.
SCHEMA_VERSION = 1
#: ``PRAGMA application_id`` marking a squall run log (the bytes ``sqRL``), dimensionless.
APPLICATION_ID = int.from_bytes(b"sqRL", "big")

#: Table name → record class of every ``seq``-keyed table.
TABLES: dict[str, type] = {
    "chambers": ChamberRecord,
    "sessions": SessionRecord,
    "samples": SampleRow,
    "alarms": AlarmRecord,
    "events": EventRecord,
    "windows": WindowRecord,
    "audit": AuditRecord,
}


def run_columns() -> tuple[tuple[Column, ...], tuple[Column, ...]]:
    """Columns of table ``run``: (metadata columns, end-of-run columns)."""
    return columns_of(RunMeta), columns_of(RunEnd)


def _ddl() -> list[str]:
    """CREATE statements for every table."""
    meta_cols, end_cols = run_columns()
    run_defs = [c.sql_declaration() for c in meta_cols]
    run_defs += [c.sql_declaration(force_nullable=True) for c in end_cols]
    statements = [
        "CREATE TABLE run (id INTEGER PRIMARY KEY CHECK (id = 1), " + ", ".join(run_defs) + ")"
    ]
    for table, record in TABLES.items():
        defs = ", ".join(c.sql_declaration() for c in columns_of(record))
        extra = ", UNIQUE (chamber)" if record is ChamberRecord else ""
        statements.append(f"CREATE TABLE {table} (seq INTEGER PRIMARY KEY, {defs}{extra})")
    return statements


def create_schema(conn: sqlite3.Connection, meta: RunMeta) -> None:
    """Create every table and write the run's metadata, atomically.

    Parameters
    ----------
    conn
        A read-write connection in autocommit mode (``isolation_level=None``) to an empty
        database already switched to WAL.
    meta
        The run's metadata.
    """
    meta_cols, _ = run_columns()
    conn.execute("BEGIN IMMEDIATE")
    try:
        for statement in _ddl():
            conn.execute(statement)
        conn.execute(insert_sql("run", meta_cols), tuple(getattr(meta, c.name) for c in meta_cols))
        chamber_cols = columns_of(ChamberRecord)
        conn.executemany(
            insert_sql("chambers", chamber_cols),
            [tuple(getattr(ch, c.name) for c in chamber_cols) for ch in meta.chambers],
        )
        conn.execute(f"PRAGMA application_id = {APPLICATION_ID}")
        conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        conn.execute("COMMIT")
    except BaseException:
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        raise


def open_log(path: Path, *, readonly: bool) -> tuple[sqlite3.Connection, int]:
    """Open an existing run log and check that it is one this squall can read.

    Parameters
    ----------
    path
        The log file.
    readonly
        Open a read-only connection (readers) rather than a read-write one (resume).

    Returns
    -------
    connection, schema version
        Autocommit connection; log schema version of the file, dimensionless.

    Raises
    ------
    SquallError
        The file is missing, not an SQLite database, not a squall run log, incomplete, or
        written with a newer log schema than this squall knows.
    """
    if not path.exists():
        raise SquallError("no such run log", file=path)
    if path.is_dir():
        raise SquallError("is a directory, not a run log", file=path)
    uri = path.resolve().as_uri() + ("?mode=ro" if readonly else "?mode=rw")
    try:
        conn = sqlite3.connect(
            uri, uri=True, isolation_level=None, timeout=10.0, check_same_thread=False
        )
    except sqlite3.Error as exc:
        raise SquallError(f"cannot open run log: {exc}", file=path) from exc
    try:
        version = _check_header(conn, path)
    except BaseException:
        conn.close()
        raise
    return conn, version


def _check_header(conn: sqlite3.Connection, path: Path) -> int:
    """Check application id and schema version; return the version."""
    try:
        app_id = conn.execute("PRAGMA application_id").fetchone()[0]
        version = conn.execute("PRAGMA user_version").fetchone()[0]
    except sqlite3.DatabaseError as exc:
        raise SquallError(
            f"not a squall run log (not an SQLite database: {exc})", file=path
        ) from exc
    if app_id != APPLICATION_ID:
        raise SquallError(
            "not a squall run log (an SQLite database written by another program)", file=path
        )
    if version == 0:
        raise SquallError(
            "incomplete run log: its creation was cut short before any data was written",
            file=path,
        )
    if version > SCHEMA_VERSION:
        raise SquallError(
            f"run log written with log schema {version} by a newer squall; this squall reads "
            f"schema {SCHEMA_VERSION} and older: upgrade squall to read it",
            file=path,
        )
    return int(version)


def _scalar(column: Column, value: object, path: Path) -> object:
    """Convert one stored scalar back to its field type."""
    if value is None:
        return None
    if column.kind is ValueKind.ENUM and column.enum is not None:
        try:
            return column.enum(value)
        except ValueError as exc:
            raise SquallError(
                f"unknown {column.name} {value!r} in table run", file=path, field=column.name
            ) from exc
    if column.kind is ValueKind.BOOL:
        return bool(value)
    return value


def _run_row(conn: sqlite3.Connection, path: Path, cols: tuple[Column, ...]) -> tuple:
    """The stored values of ``cols`` from the single row of table ``run``."""
    try:
        row = conn.execute(f"SELECT {', '.join(c.name for c in cols)} FROM run").fetchone()
    except sqlite3.DatabaseError as exc:
        raise SquallError(f"damaged run log: cannot read table run: {exc}", file=path) from exc
    if row is None:
        raise SquallError("damaged run log: table run is empty", file=path)
    return tuple(_scalar(c, v, path) for c, v in zip(cols, row, strict=True))


def read_meta(conn: sqlite3.Connection, path: Path) -> RunMeta:
    """Read the run's metadata and chambers, checking the protocol text's SHA-256.

    Raises
    ------
    SquallError
        The run row is missing or the protocol text no longer matches its recorded hash.
    """
    meta_cols, _ = run_columns()
    values = dict(zip((c.name for c in meta_cols), _run_row(conn, path, meta_cols), strict=True))
    stored_hash = values.pop("protocol_sha256")
    chamber_cols = columns_of(ChamberRecord)
    try:
        rows = conn.execute(
            f"SELECT {', '.join(c.name for c in chamber_cols)} FROM chambers ORDER BY seq"
        ).fetchall()
    except sqlite3.DatabaseError as exc:
        raise SquallError(f"damaged run log: cannot read chambers: {exc}", file=path) from exc
    chambers = tuple(
        ChamberRecord(**dict(zip((c.name for c in chamber_cols), row, strict=True))) for row in rows
    )
    meta = RunMeta(chambers=chambers, **values)
    if meta.protocol_sha256 != stored_hash:
        raise SquallError(
            "the protocol text stored in the run log no longer matches its recorded SHA-256; "
            "the log was edited after the run",
            file=path,
            field="run.protocol_text",
        )
    return meta


def read_end(conn: sqlite3.Connection, path: Path) -> RunEnd | None:
    """How the run ended, or None when the log was never marked finished."""
    _, end_cols = run_columns()
    values = _run_row(conn, path, end_cols)
    if values[0] is None:
        return None
    data = dict(zip((c.name for c in end_cols), values, strict=True))
    return RunEnd(**data)
