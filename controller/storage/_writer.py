"""Crash-safe writer of one run log: batched commits driven by the caller's clock time.

Rules of this module
--------------------
- The writer never reads a clock. Every record carries the run's clock time (``t_s``); the
  writer commits when the clock time of the data it is given is at least
  ``commit_interval_s`` past that of the last commit, so a crash loses at most that much.
- Alarms, events, closed windows and operator actions are rare and precious: they are
  committed at once, together with any samples still pending.
- Sample rows given as value tuples (:meth:`RunLogWriter.append_sample_values`, the control
  loop's rows) are held in memory until their commit and then inserted in one
  ``executemany``, in the order they came: one SQLite call per commit instead of one per
  tick. What a crash loses and what a reader sees do not change (both only ever concern
  committed rows), nor does what a failed write drops (every row not yet committed); the
  rows' ``seq`` and order are those of inserting them one batch at a time. Rows given as
  records (:meth:`RunLogWriter.append_samples`) go to SQLite at once, after any held rows.
- A failed write (disk full, I/O error) rolls back what was not yet committed and raises
  :class:`RuntimeFailure`; committed data is never touched (SQLite transactions are atomic,
  and in WAL mode an unfinished commit is ignored on recovery). The writer stays usable, so
  the caller can keep controlling chambers and retry.
- Durability follows the clock unless the caller chooses: a run on the real clock fsyncs
  every commit (a power cut then loses at most the commit interval plus the commit being
  written); a run on a virtual clock does not (a crash of the process still loses nothing
  committed, and a simulated week is not held up by a thousand fsyncs).
- One writer per log: a second one (another controller, another process) is refused through
  an advisory lock on ``<log>.lock``, which the kernel releases if the writer's process dies.
- A run is *finished* only by :meth:`RunLogWriter.finish`. A log without that mark is
  interrupted (or still being written) and may be continued by :meth:`RunLogWriter.resume`.
- Not thread-safe: use a writer from one thread at a time (any one thread).
"""

from __future__ import annotations

import contextlib
import math
import sqlite3
from collections.abc import Iterator, Sequence
from pathlib import Path
from types import TracebackType
from typing import Any, NoReturn, Self

from controller import __version__
from controller.errors import RuntimeFailure, SquallError

from ._columns import columns_of, insert_sql, row_getter
from ._opening import WriterLock, configure, create_log, refuse_existing, resume_point
from ._records import (
    SAMPLE_FIELDS,
    AlarmRecord,
    AuditRecord,
    ClockKind,
    EventRecord,
    ResumePoint,
    RunEnd,
    RunMeta,
    SampleRow,
    SessionRecord,
    WindowRecord,
)
from ._schema import SCHEMA_VERSION, open_log, read_end, read_meta, run_columns

__all__ = ["RunLogWriter"]

_SAMPLE_COLS = columns_of(SampleRow)
_SAMPLE_SQL = insert_sql("samples", _SAMPLE_COLS)
_SAMPLE_ROW = row_getter(_SAMPLE_COLS)
if tuple(c.name for c in _SAMPLE_COLS) != SAMPLE_FIELDS:  # append_sample_values relies on it
    raise TypeError("every SampleRow field must be a samples column, in field order")
_T_S, _UTC_S = SAMPLE_FIELDS.index("t_s"), SAMPLE_FIELDS.index("utc_s")

_RARE_TABLES: dict[type, str] = {
    AlarmRecord: "alarms",
    EventRecord: "events",
    WindowRecord: "windows",
    AuditRecord: "audit",
    SessionRecord: "sessions",
}
_RARE_SQL = {rec: insert_sql(table, columns_of(rec)) for rec, table in _RARE_TABLES.items()}
_RARE_ROW = {rec: row_getter(columns_of(rec)) for rec in _RARE_TABLES}


class RunLogWriter:
    """Write one run's log: samples every tick, alarms, events, windows and audit records.

    Parameters
    ----------
    path
        The log file to create. It must not exist yet (or be empty): an existing log, finished
        or not, is never overwritten (see :meth:`resume`).
    meta
        The run's metadata, stored once.
    commit_interval_s
        Commit when the data's clock time is at least this far past the last commit, s
        (0 commits every call). This bounds what a crash can lose.
    durable
        fsync every commit (SQLite ``synchronous=FULL``) so a power cut, not only a process
        crash, loses at most ``commit_interval_s`` of data; None (default): durable when
        ``meta.clock_kind`` is real time.

    Raises
    ------
    SquallError
        ``path`` holds a log or another file, another process writes it, or it cannot be
        created there.
    RuntimeFailure
        The log could not be written (disk full, I/O error, no WAL support).
    """

    def __init__(
        self,
        path: str | Path,
        *,
        meta: RunMeta,
        commit_interval_s: float = 1.0,
        durable: bool | None = None,
    ) -> None:
        path = Path(path)
        durable = _durable_for(meta, durable)
        _check_interval(commit_interval_s)
        refuse_existing(path, probe_lock=True)
        lock = WriterLock(path)
        try:
            # again, under the lock: another process may have created it meanwhile
            refuse_existing(path, probe_lock=False)
            conn = create_log(path, meta, durable=durable)
        except BaseException:
            lock.release()
            raise
        self._setup(path, conn, lock, meta, commit_interval_s, resume_point=None)
        first = SessionRecord(software_version=__version__, first_sample_seq=1, resumed=False)
        self._insert_or_discard(first, "record the session")

    @classmethod
    def resume(
        cls, path: str | Path, *, commit_interval_s: float = 1.0, durable: bool | None = None
    ) -> Self:
        """Continue an interrupted run's log, appending after its last committed rows.

        The new session is recorded in table ``sessions``; the caller records the gap as an
        :class:`EventRecord` of kind ``gap`` once it knows the time (the writer reads no
        clock). Samples not later (in UTC) than the last logged one are refused, so nothing
        is logged twice.

        Parameters
        ----------
        path
            An interrupted run log.
        commit_interval_s
            As for the constructor, s.
        durable
            As for the constructor (None: durable when the run's clock is real time).

        Raises
        ------
        SquallError
            Not a log, a newer or older schema, already finished, or being written.
        """
        path = Path(path)
        _check_interval(commit_interval_s)
        probe, _ = open_log(path, readonly=True)  # a clear error before creating a lock file
        probe.close()
        lock = WriterLock(path)
        conn: sqlite3.Connection | None = None
        try:
            conn, version = open_log(path, readonly=False)
            if version != SCHEMA_VERSION:
                raise SquallError(
                    f"run log uses log schema {version}; resume it with the squall version "
                    "that started it",
                    file=path,
                )
            meta = read_meta(conn, path)
            end = read_end(conn, path)
            if end is not None:
                raise SquallError(
                    f"run already finished ({end.end_reason.value}); there is nothing to "
                    "resume: start a new run with another log file",
                    file=path,
                )
            configure(conn, durable=_durable_for(meta, durable))
            session = conn.execute("SELECT count(*) FROM sessions").fetchone()[0] + 1
            point = resume_point(conn, session, len(meta.chambers))
        except sqlite3.Error as exc:
            if conn is not None:
                conn.close()
            lock.release()
            raise SquallError(f"cannot resume run log: {exc}", file=path) from exc
        except BaseException:
            if conn is not None:
                conn.close()
            lock.release()
            raise
        writer = cls.__new__(cls)
        writer._setup(path, conn, lock, meta, commit_interval_s, resume_point=point)
        writer._insert_or_discard(
            SessionRecord(
                software_version=__version__, first_sample_seq=point.last_seq + 1, resumed=True
            ),
            "record the resumed session",
        )
        return writer

    def _setup(
        self,
        path: Path,
        conn: sqlite3.Connection,
        lock: WriterLock,
        meta: RunMeta,
        commit_interval_s: float,
        *,
        resume_point: ResumePoint | None,
    ) -> None:
        self._path = path
        self._conn: sqlite3.Connection | None = conn
        self._lock = lock
        self._meta = meta
        self._interval_s = float(commit_interval_s)
        self._resume_point = resume_point
        self._not_after_utc_s = resume_point.last_utc_s if resume_point else None
        self._pending = 0
        # sample value tuples handed in and not yet inserted, in order; all uncommitted
        self._held: list[tuple[Any, ...]] = []
        self._last_commit_t_s: float | None = None
        self._last_t_s: float | None = None

    # -- properties -------------------------------------------------------------------------

    @property
    def path(self) -> Path:
        """The log file."""
        return self._path

    @property
    def meta(self) -> RunMeta:
        """The run's metadata (read back from the log when resuming)."""
        return self._meta

    @property
    def resume_point(self) -> ResumePoint | None:
        """Where the interrupted run stopped; None for a new log."""
        return self._resume_point

    @property
    def pending_rows(self) -> int:
        """Rows written since the last commit (lost if the process died now), dimensionless."""
        return self._pending

    @property
    def last_commit_t_s(self) -> float | None:
        """Clock time of the newest committed data, s; None before the first commit."""
        return self._last_commit_t_s

    @property
    def closed(self) -> bool:
        """Whether :meth:`close` or :meth:`finish` was called."""
        return self._conn is None

    # -- writing ----------------------------------------------------------------------------

    def append_samples(self, rows: Sequence[SampleRow]) -> None:
        """Append one tick's sample rows (or several ticks'); commit if the interval passed.

        Parameters
        ----------
        rows
            Sample rows in time order; the commit decision uses the last row's ``t_s`` (s).

        Raises
        ------
        RuntimeFailure
            The rows could not be written; uncommitted rows were dropped.
        ValueError
            After a resume: a row is not later (UTC) than the log's last sample.
        """
        if rows:
            self._check_after_resume(rows[0].utc_s)
            conn = self._open_conn()
            n = len(rows)
            try:  # as self._io, without a context manager
                if not conn.in_transaction:
                    conn.execute("BEGIN")
                if self._held:
                    self._insert_held(conn)
                conn.executemany(_SAMPLE_SQL, map(_SAMPLE_ROW, rows))
            except sqlite3.Error as exc:
                self._fail(exc, f"append {n} sample row(s)", n)
            self._pending += n
            self._after_write(rows[-1].t_s)

    def append_sample_values(self, rows: Sequence[tuple[Any, ...]]) -> None:
        """As :meth:`append_samples`, each row given as the tuple of its values in
        :class:`SampleRow` field order (:meth:`SampleRow.values`): the control loop's rows,
        written without building an object per row.

        Parameters
        ----------
        rows
            Sample rows in time order, each a tuple of every field's value in declaration
            order (``t_s`` in s, ``utc_s`` in POSIX s, …; units as the fields name them);
            ``incubation`` may be the state's text value (SQLite binds a plain ``str``
            faster than an enum member).

        Raises
        ------
        RuntimeFailure
            The rows (or the rows held with them) could not be written when their commit
            came; every row not yet committed was dropped.
        ValueError
            After a resume: a row is not later (UTC) than the log's last sample.

        Notes
        -----
        The rows are held until the commit that writes them (see the module's rules); the
        tuples must not be changed afterwards. A malformed row (a bug) raises at that commit.
        """
        if not rows:
            return
        if self._not_after_utc_s is not None:
            self._check_after_resume(rows[0][_UTC_S])
        conn = self._conn
        if conn is None:
            conn = self._open_conn()  # raises: the writer is closed
        n = len(rows)
        self._held.extend(rows)
        self._pending += n
        t_s = rows[-1][_T_S]
        self._last_t_s = t_s
        if self.commit_due(t_s):
            try:  # as self._io, without a context manager
                if not conn.in_transaction:
                    conn.execute("BEGIN")
                self._insert_held(conn)
            except sqlite3.Error as exc:
                self._fail(exc, f"append {n} sample row(s)", 0)
            self.flush()

    def commit_due(self, t_s: float) -> bool:
        """Whether sample rows up to clock time ``t_s`` would be committed when handed in now:
        a session's first rows, ``commit_interval_s`` past the last commit, or a clock that
        went back.

        Parameters
        ----------
        t_s
            Clock time of the latest row, s.

        Returns
        -------
        bool
            True when :meth:`append_samples` would commit them at once, dimensionless.
        """
        if self._last_commit_t_s is None:
            return True
        dt_s = t_s - self._last_commit_t_s
        return dt_s >= self._interval_s or dt_s < 0

    def _check_after_resume(self, first_utc_s: float) -> None:
        """After a resume, refuse rows not later (UTC) than the log's last sample (until
        the first rows are taken)."""
        if self._not_after_utc_s is not None:
            if not first_utc_s > self._not_after_utc_s:
                raise ValueError(
                    f"sample at UTC {first_utc_s} s is not after the last logged sample "
                    f"({self._not_after_utc_s} s): it would log that time twice"
                )
            self._not_after_utc_s = None

    def _insert_held(self, conn: sqlite3.Connection) -> None:
        """Insert the held sample rows into the open transaction (raises sqlite3.Error;
        the caller turns it into a failure, which drops them with the transaction)."""
        held = self._held
        conn.executemany(_SAMPLE_SQL, held)
        held.clear()

    def record_alarm(self, alarm: AlarmRecord) -> None:
        """Write an alarm raise, clear or acknowledgement and commit at once.

        Parameters
        ----------
        alarm
            The alarm record (times in s; see :class:`AlarmRecord` for each field's unit).

        Raises
        ------
        RuntimeFailure
            The record could not be written; uncommitted rows were dropped.
        """
        self._insert_now(alarm, alarm.t_s, f"record alarm {alarm.code!r}")

    def record_event(self, event: EventRecord) -> None:
        """Write a run event (start, stop, gap, phase change, hold…) and commit at once.

        Parameters
        ----------
        event
            The event record (times in s; see :class:`EventRecord` for each field's unit).

        Raises
        ------
        RuntimeFailure
            The record could not be written; uncommitted rows were dropped.
        """
        self._insert_now(event, event.t_s, f"record event {event.kind.value!r}")

    def record_window(self, window: WindowRecord) -> None:
        """Write a closed incubation window, once it has ended, and commit at once.

        Parameters
        ----------
        window
            The window record (times in s; see :class:`WindowRecord` for each field's unit).

        Raises
        ------
        RuntimeFailure
            The record could not be written; uncommitted rows were dropped.
        """
        self._insert_now(window, window.end_t_s, f"record a window of {window.chamber!r}")

    def record_audit(self, entry: AuditRecord) -> None:
        """Write an operator command or note to the audit trail and commit at once.

        Parameters
        ----------
        entry
            The audit record (times in s; see :class:`AuditRecord` for each field's unit).

        Raises
        ------
        RuntimeFailure
            The record could not be written; uncommitted rows were dropped.
        """
        self._insert_now(entry, entry.t_s, f"record operator command {entry.command!r}")

    def flush(self) -> None:
        """Commit everything written so far.

        Raises
        ------
        RuntimeFailure
            The commit failed; uncommitted rows were dropped.
        """
        conn = self._open_conn()
        if self._held:
            with self._io("commit", 0):
                if not conn.in_transaction:
                    conn.execute("BEGIN")
                self._insert_held(conn)
        if conn.in_transaction:
            with self._io("commit", 0):
                conn.execute("COMMIT")
        self._pending = 0
        if self._last_t_s is not None:
            self._last_commit_t_s = self._last_t_s

    def finish(self, end: RunEnd) -> None:
        """Mark the run finished (no resume possible), commit and close.

        Parameters
        ----------
        end
            When (clock time in s, UTC in POSIX s) and why the run ended.

        Raises
        ------
        RuntimeFailure
            The mark could not be written; the run stays resumable.
        """
        conn = self._open_conn()
        _, end_cols = run_columns()
        assignments = ", ".join(f"{c.name} = ?" for c in end_cols)
        with self._io("mark the run finished", 0):
            if not conn.in_transaction:
                conn.execute("BEGIN")
            conn.execute(
                f"UPDATE run SET {assignments} WHERE id = 1",
                tuple(getattr(end, c.name) for c in end_cols),
            )
        self._see(end.end_t_s)
        self.close()

    def close(self) -> None:
        """Commit what is pending and close; the run stays resumable (not finished)."""
        if self._conn is None:
            return
        try:
            self.flush()
        finally:
            self._conn.close()
            self._conn = None
            self._lock.release()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- internals --------------------------------------------------------------------------

    def _open_conn(self) -> sqlite3.Connection:
        if self._conn is None:
            raise RuntimeError(f"run log writer for {self._path} is closed")
        return self._conn

    def _insert_or_discard(self, session: SessionRecord, what: str) -> None:
        """Record the session; if that fails, close without committing and re-raise."""
        try:
            self._insert_now(session, None, what)
        except BaseException:
            if self._conn is not None:
                self._conn.close()
                self._conn = None
            self._lock.release()
            raise

    def _insert_now(self, record: Any, t_s: float | None, what: str) -> None:
        """Insert one rare record and commit together with pending samples."""
        conn = self._open_conn()
        kind = type(record)
        with self._io(what, 1):
            if not conn.in_transaction:
                conn.execute("BEGIN")
            if self._held:
                self._insert_held(conn)
            conn.execute(_RARE_SQL[kind], _RARE_ROW[kind](record))
        if t_s is not None:
            self._see(t_s)
        self.flush()

    def _see(self, t_s: float) -> None:
        """Remember the clock time of the latest data handed in, s."""
        self._last_t_s = t_s

    def _after_write(self, t_s: float) -> None:
        """Commit a session's first rows at once, then whenever the clock time moved
        ``commit_interval_s`` past the last commit."""
        self._see(t_s)
        # The first rows of a session (a start or a resume) go to disk at once: waiting for
        # the next batch would put a whole tick at risk when the tick is longer than the
        # interval. A clock that went back (a bug or a new clock) commits rather than waits.
        if self.commit_due(t_s):
            self.flush()

    @contextlib.contextmanager
    def _io(self, what: str, batch: int) -> Iterator[None]:
        """Turn SQLite failures into RuntimeFailure after rolling back uncommitted rows."""
        try:
            yield
        except sqlite3.Error as exc:
            self._fail(exc, what, batch)

    def _fail(self, exc: sqlite3.Error, what: str, batch: int) -> NoReturn:
        """Roll back uncommitted rows, then raise: a malformed record is a bug (re-raised
        unchanged), anything else a :class:`RuntimeFailure` saying what was lost."""
        if isinstance(
            exc, sqlite3.IntegrityError | sqlite3.ProgrammingError | sqlite3.InterfaceError
        ):
            self._abandon()
            raise exc
        lost = self._pending + batch
        self._abandon()
        upto = (
            f" (up to clock time {self._last_commit_t_s:g} s)"
            if self._last_commit_t_s is not None
            else ""
        )
        raise RuntimeFailure(
            f"run log {self._path}: could not {what}: {exc}. The {lost} row(s) not yet "
            f"committed were dropped; everything committed earlier{upto} is intact."
        ) from exc

    def _abandon(self) -> None:
        """Roll back the open transaction, if SQLite has not already done so."""
        conn = self._conn
        if conn is not None and conn.in_transaction:
            with contextlib.suppress(sqlite3.Error):
                conn.execute("ROLLBACK")
        self._held.clear()
        self._pending = 0


def _durable_for(meta: RunMeta, durable: bool | None) -> bool:
    """The caller's choice, else fsync every commit of a run on the real clock."""
    return meta.clock_kind is ClockKind.REAL if durable is None else durable


def _check_interval(commit_interval_s: float) -> None:
    """Refuse a negative or non-finite commit interval (a programming error)."""
    if not (math.isfinite(commit_interval_s) and commit_interval_s >= 0):
        raise ValueError(f"commit_interval_s must be >= 0 s, got {commit_interval_s!r}")
