"""The schedule store: one SQLite file (WAL) beside the run logs, default ``runs/schedule.sqlite``.

Rules of this module
--------------------
- The file is created readable and writable by its owner only (0600; SQLite gives its -wal
  and -shm files the same mode). Its schema carries a version (``PRAGMA user_version``) and
  an application id, so another SQLite file is refused instead of being written into.
- Every change is one ``BEGIN IMMEDIATE`` transaction: read what is live, validate, check
  conflicts, write the row and its history entry, commit. A refusal raises
  :class:`ScheduleConflict` (a :class:`SquallError`, exit 2) after a rollback, so the store's
  content is exactly what it was. Reading the rig and protocol files and compiling happen
  before the transaction (they do not read the store), so the write lock is held briefly.
- Writers in several processes (two ``squall schedule add``, or ``squall serve`` beside an
  operator) serialize on SQLite's lock: a writer waits up to ``busy_timeout_s`` for another
  to commit, then sees its rows before checking its own conflicts.
- Ids are ``E`` plus at least four digits from an AUTOINCREMENT key, so an id is never
  reused, not even after a refusal (a rolled-back insert uses no number).
- Times are stored as ISO 8601 UTC text of fixed width (sorts as it reads); the store reads
  the clock only to stamp history entries (``now`` may be given, e.g. a simulated clock).
"""

from __future__ import annotations

import contextlib
import getpass
import hashlib
import json
import os
import re
import sqlite3
from collections.abc import Callable, Iterable, Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import TracebackType
from typing import TYPE_CHECKING, Any

from controller.errors import RuntimeFailure, SquallError
from controller.schedule._models import (
    LIVE_STATES,
    TRANSITIONS,
    Booking,
    Conflict,
    ConflictKind,
    Experiment,
    ExperimentState,
    HistoryEntry,
    ScheduleConflict,
    format_when,
)

if TYPE_CHECKING:
    from controller.cli.cmd_check import LoadedProtocol
    from controller.protocol import CompiledProtocol
    from controller.rig import Rig

__all__ = [
    "DEFAULT_SCHEDULE",
    "EARLIEST_START",
    "LATEST_START",
    "SCHEMA_VERSION",
    "ScheduleStore",
    "booking_of",
    "check_start",
    "check_text_field",
    "compile_experiment",
    "loaded_from_text",
    "normalize_id",
]

DEFAULT_SCHEDULE = Path("runs") / "schedule.sqlite"
"""Store file used when ``--schedule`` is not given (beside the default run logs)."""
SCHEMA_VERSION = 1
"""Version of the store's tables (``PRAGMA user_version``)."""
_APPLICATION_ID = 0x5351_5343  # "SQSC": marks a squall schedule file
EARLIEST_START = datetime(2000, 1, 1, tzinfo=UTC)
"""Earliest start the store accepts (catches typing slips in the year)."""
LATEST_START = datetime(2200, 1, 1, tzinfo=UTC)
"""Starts must lie before this instant."""

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

_COLUMNS = (
    "id, rig_path, rig_name, protocol_path, protocol_text, protocol_sha256, title, chambers, "
    "start_utc, end_utc, owner, state, log_path, note"
)


def _stamp(moment: datetime) -> str:
    """Fixed-width UTC text of an instant (sorts like the instants)."""
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _unstamp(text: str) -> datetime:
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)


def check_text_field(value: str, field: str, *, max_len: int, allow_empty: bool = False) -> str:
    """A one-line free-text field (owner, note, reason), trimmed; refuse control characters.

    Parameters
    ----------
    value
        As given.
    field
        Its name for messages (``--owner``).
    max_len
        Longest accepted length, characters.
    allow_empty
        Whether an empty value is fine.

    Returns
    -------
    str
        The trimmed value.
    """
    text = value.strip()
    if not text and not allow_empty:
        raise SquallError("must not be empty", field=field)
    if len(text) > max_len:
        raise SquallError(f"is {len(text)} characters long; at most {max_len}", field=field)
    bad = next((c for c in text if not c.isprintable()), None)
    if bad is not None:
        raise SquallError(
            f"contains the control or unprintable character {bad!r}; write one plain line",
            field=field,
        )
    return text


def check_start(start_utc: datetime, field: str) -> datetime:
    """A start the store accepts: aware, within the accepted years; returned in UTC.

    Parameters
    ----------
    start_utc
        The start (any zone).
    field
        Its name for messages (``--start``).

    Returns
    -------
    datetime
        The same instant in UTC.
    """
    if start_utc.tzinfo is None or start_utc.utcoffset() is None:
        raise SquallError("a start time needs a zone (e.g. +02:00 or Z)", field=field)
    start = start_utc.astimezone(UTC)
    if not EARLIEST_START <= start < LATEST_START:
        raise SquallError(
            f"{start.isoformat()} is outside the years the schedule accepts "
            f"({EARLIEST_START.year}–{LATEST_START.year - 1})",
            field=field,
        )
    return start


def loaded_from_text(path: Path, text: str) -> LoadedProtocol:
    """Validate a protocol snapshot as if read from ``path`` (problems located there).

    Parameters
    ----------
    path
        The file the snapshot was taken from (CSV files it names are relative to it).
    text
        The snapshot.

    Returns
    -------
    LoadedProtocol
        The validated protocol.
    """
    from controller.cli.cmd_check import LoadedProtocol
    from controller.files import parse_toml, validate_data
    from controller.protocol import Protocol

    data = parse_toml(text, file=path)
    return LoadedProtocol(path, text, validate_data(data, Protocol, text=text, file=path), data)


def compile_experiment(
    experiment: Experiment, start_utc: datetime | None = None
) -> CompiledProtocol:
    """Compile an experiment's protocol snapshot (elapsed 0 = its start, or ``start_utc``).

    Parameters
    ----------
    experiment
        A stored experiment.
    start_utc
        Another start to compile for (aware), e.g. for a move; default its own.

    Returns
    -------
    CompiledProtocol
        The compiled setpoint channels.
    """
    from controller.cli.cmd_check import compile_loaded

    loaded = loaded_from_text(experiment.protocol_path, experiment.protocol_text)
    return compile_loaded(loaded, start_utc or experiment.start_utc)


def booking_of(experiment: Experiment, compiled: CompiledProtocol | None = None) -> Booking:
    """The conflict checks' view of a stored experiment.

    Parameters
    ----------
    experiment
        A stored experiment.
    compiled
        Its compiled protocol when resource checks need it.

    Returns
    -------
    Booking
        Labelled ``E0002 'title' (owner)``.
    """
    return Booking(
        label=f"{experiment.id} {experiment.title!r} ({experiment.owner})",
        experiment_id=experiment.id,
        chambers=experiment.chambers,
        start_utc=experiment.start_utc,
        end_utc=experiment.end_utc,
        compiled=compiled,
    )


def normalize_id(text: str) -> str:
    """``E0007`` from ``E0007``, ``e7`` or ``7``; other text is returned trimmed, as typed.

    Parameters
    ----------
    text
        An experiment id as typed (no unit).

    Returns
    -------
    str
        The id as stored, when the text can be one.
    """
    match = re.fullmatch(r"[Ee]?0*(\d{1,12})", text.strip())
    return f"E{int(match.group(1)):04d}" if match else text.strip()


def _default_by() -> str:
    try:
        return getpass.getuser() or "unknown"
    except (KeyError, OSError):  # no user name in the environment or passwd database
        return "unknown"


class ScheduleStore:
    """The schedule in one SQLite file; a context manager (closes on exit).

    Parameters
    ----------
    path
        Store file; created (mode 0600, with its folder) with the schema when missing.
    now
        Clock for history stamps, returning aware UTC; default the system clock.
    busy_timeout_s
        How long a writer waits for another process's transaction to finish, s.
    """

    def __init__(
        self,
        path: Path,
        *,
        now: Callable[[], datetime] | None = None,
        busy_timeout_s: float = 30.0,
    ) -> None:
        self.path = Path(path)
        self._now = now or (lambda: datetime.now(UTC))
        self._conn = self._open(busy_timeout_s)

    # -- opening -------------------------------------------------------------------------

    def _open(self, busy_timeout_s: float) -> sqlite3.Connection:
        path = self.path
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
            # Changes are rare and precious: fsync every commit (SQLite, "PRAGMA synchronous").
            conn.execute("PRAGMA synchronous = FULL")
            conn.execute("PRAGMA foreign_keys = ON")
            with self._transaction(conn):
                self._ensure_schema(conn)
        except sqlite3.DatabaseError as exc:
            conn.close()
            raise SquallError(f"is not a squall schedule (SQLite says: {exc})", file=path) from None
        except BaseException:
            conn.close()
            raise
        return conn

    def _ensure_schema(self, conn: sqlite3.Connection) -> None:
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
                file=self.path,
            )
        if version != SCHEMA_VERSION:
            raise SquallError(
                f"schedule format {version} is not the one this squall reads "
                f"({SCHEMA_VERSION}); use the squall version that wrote it",
                file=self.path,
            )

    @staticmethod
    @contextlib.contextmanager
    def _transaction(conn: sqlite3.Connection) -> Iterator[None]:
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

    def close(self) -> None:
        """Close the store's connection (safe to call twice)."""
        conn, self._conn = self._conn, None  # type: ignore[assignment]
        if conn is not None:
            conn.close()

    def __enter__(self) -> ScheduleStore:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- reading -------------------------------------------------------------------------

    def _row(self, row: tuple[Any, ...]) -> Experiment:
        return Experiment(
            id=row[0],
            rig_path=Path(row[1]),
            rig_name=row[2],
            protocol_path=Path(row[3]),
            protocol_text=row[4],
            protocol_sha256=row[5],
            title=row[6],
            chambers=tuple(json.loads(row[7])),
            start_utc=_unstamp(row[8]),
            end_utc=_unstamp(row[9]),
            owner=row[10],
            state=ExperimentState(row[11]),
            log_path=Path(row[12]) if row[12] is not None else None,
            note=row[13],
        )

    def get(self, exp_id: str) -> Experiment:
        """The experiment with this id (case-insensitive).

        Parameters
        ----------
        exp_id
            ``E0001``.

        Returns
        -------
        Experiment
            As stored.

        Raises
        ------
        SquallError
            No experiment has this id.
        """
        key = normalize_id(exp_id)
        row = self._conn.execute(
            f"SELECT {_COLUMNS} FROM experiments WHERE id = ?", (key,)
        ).fetchone()
        if row is None:
            raise SquallError(
                f"no experiment {exp_id!r} in this schedule (ids look like E0001; "
                "'squall schedule list --all' shows them all)",
                file=self.path,
            )
        return self._row(row)

    def experiments(
        self,
        *,
        rig_path: Path | None = None,
        states: Iterable[ExperimentState] | None = None,
    ) -> list[Experiment]:
        """Stored experiments, ordered by start (then id).

        Parameters
        ----------
        rig_path
            Only this rig's (resolved before comparing); ``None`` = every rig.
        states
            Only these states; ``None`` = all.

        Returns
        -------
        list of Experiment
            Matching experiments.
        """
        sql = f"SELECT {_COLUMNS} FROM experiments"
        where: list[str] = []
        args: list[str] = []
        if rig_path is not None:
            where.append("rig_path = ?")
            args.append(str(Path(rig_path).resolve()))
        if states is not None:
            wanted = sorted({ExperimentState(s).value for s in states})
            where.append(f"state IN ({', '.join('?' * len(wanted))})" if wanted else "0")
            args += wanted
        if where:
            sql += " WHERE " + " AND ".join(where)
        rows = self._conn.execute(sql + " ORDER BY start_utc, seq", args).fetchall()
        return [self._row(row) for row in rows]

    def history(self, exp_id: str) -> list[HistoryEntry]:
        """Every state change of an experiment, oldest first.

        Parameters
        ----------
        exp_id
            ``E0001``.

        Returns
        -------
        list of HistoryEntry
            From the add onwards.
        """
        experiment = self.get(exp_id)
        rows = self._conn.execute(
            "SELECT time_utc, from_state, to_state, by, reason FROM history "
            "WHERE experiment = ? ORDER BY seq",
            (experiment.id,),
        ).fetchall()
        return [
            HistoryEntry(
                time_utc=_unstamp(r[0]),
                from_state=ExperimentState(r[1]) if r[1] is not None else None,
                to_state=ExperimentState(r[2]),
                by=r[3],
                reason=r[4],
            )
            for r in rows
        ]

    def due(self, rig_path: Path, now_utc: datetime) -> Experiment | None:
        """The earliest planned experiment of a rig whose start has come.

        Parameters
        ----------
        rig_path
            Rig file.
        now_utc
            The present, aware.

        Returns
        -------
        Experiment or None
            Earliest PLANNED experiment with ``start_utc <= now_utc``.
        """
        for experiment in self.experiments(rig_path=rig_path, states=[ExperimentState.PLANNED]):
            if experiment.start_utc <= now_utc:
                return experiment
            break
        return None

    def next_start(self, rig_path: Path) -> datetime | None:
        """Start of the earliest planned experiment of a rig, aware UTC, or ``None``."""
        planned = self.experiments(rig_path=rig_path, states=[ExperimentState.PLANNED])
        return planned[0].start_utc if planned else None

    def live_bookings(self, rig_path: Path, *, exclude: str | None = None) -> list[Booking]:
        """Live experiments of a rig as the conflict checks see them (not compiled).

        Parameters
        ----------
        rig_path
            Rig file.
        exclude
            Id to leave out (the experiment being moved).

        Returns
        -------
        list of Booking
            In start order.
        """
        return [
            booking_of(e)
            for e in self.experiments(rig_path=rig_path, states=LIVE_STATES)
            if e.id != exclude
        ]

    # -- writing -------------------------------------------------------------------------

    def _record(
        self,
        exp_id: str,
        from_state: ExperimentState | None,
        to_state: ExperimentState,
        by: str,
        reason: str,
    ) -> None:
        self._conn.execute(
            "INSERT INTO history (experiment, time_utc, from_state, to_state, by, reason) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            (
                exp_id,
                _stamp(self._now()),
                from_state.value if from_state else None,
                to_state.value,
                by,
                reason,
            ),
        )

    def _refuse_conflicts(
        self,
        candidate: Booking,
        rig: Rig,
        rig_path: Path,
        loaded: LoadedProtocol,
        exclude: str | None,
    ) -> None:
        """Run every check against what is live now; raise ScheduleConflict on any conflict."""
        from controller.files import locate
        from controller.schedule._conflicts import find_conflicts

        others = self.live_bookings(rig_path, exclude=exclude)
        conflicts, _ = find_conflicts(candidate, others, rig)
        if not conflicts:
            return
        line = None
        if conflicts[0].field is not None:
            located = locate(
                SquallError("", field=conflicts[0].field), text=loaded.text, file=loaded.path
            )
            line = located.line
        raise ScheduleConflict(conflicts, file=loaded.path, line=line)

    def add(
        self,
        *,
        rig_path: Path,
        protocol_path: Path,
        start_utc: datetime,
        owner: str,
        note: str = "",
        by: str | None = None,
    ) -> Experiment:
        """Check an experiment against the rig and the schedule and store it as planned.

        Parameters
        ----------
        rig_path
            Rig file.
        protocol_path
            Protocol file; its text is kept as the experiment's snapshot.
        start_utc
            Planned start, aware (any zone; stored as UTC).
        owner
            Who is responsible, one line.
        note
            Free text, one line.
        by
            Who adds it, for the history; default ``owner``.

        Returns
        -------
        Experiment
            The stored experiment (state planned).

        Raises
        ------
        SquallError
            Problems in the rig or protocol file (located there) or in the arguments.
        ScheduleConflict
            Any conflict; the store is unchanged.
        """
        from controller.cli.cmd_check import compile_loaded, load_protocol, load_rig

        start = check_start(start_utc, "start")
        owner = check_text_field(owner, "owner", max_len=80)
        note = check_text_field(note, "note", max_len=500, allow_empty=True)
        by = check_text_field(by, "by", max_len=80) if by is not None else owner
        rig_path, protocol_path = Path(rig_path).resolve(), Path(protocol_path).resolve()
        rig = load_rig(rig_path)
        loaded = load_protocol(protocol_path)
        compiled = compile_loaded(loaded, start)
        end = start + timedelta(seconds=compiled.duration_s)
        candidate = Booking("this experiment", None, compiled.chambers, start, end, compiled)
        with self._transaction(self._conn):
            self._refuse_conflicts(candidate, rig, rig_path, loaded, None)
            cursor = self._conn.execute(
                "INSERT INTO experiments (id, rig_path, rig_name, protocol_path, protocol_text, "
                "protocol_sha256, title, chambers, start_utc, end_utc, owner, state, log_path, "
                "note) VALUES ('', ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, NULL, ?)",
                (
                    str(rig_path),
                    rig.name,
                    str(protocol_path),
                    loaded.text,
                    hashlib.sha256(loaded.text.encode("utf-8")).hexdigest(),
                    loaded.protocol.title,
                    json.dumps(list(compiled.chambers)),
                    _stamp(start),
                    _stamp(end),
                    owner,
                    ExperimentState.PLANNED.value,
                    note,
                ),
            )
            exp_id = f"E{cursor.lastrowid:04d}"
            self._conn.execute(
                "UPDATE experiments SET id = ? WHERE seq = ?", (exp_id, cursor.lastrowid)
            )
            self._record(exp_id, None, ExperimentState.PLANNED, by, "added")
        return self.get(exp_id)

    def _refuse_state(
        self, experiment: Experiment, action: str, allowed: Iterable[ExperimentState]
    ) -> None:
        names = ", ".join(sorted(s.value for s in allowed))
        raise ScheduleConflict(
            [
                Conflict(
                    ConflictKind.STATE,
                    f"{experiment.id} is {experiment.state.value}; only an experiment that is "
                    f"{names} can be {action}",
                    experiments=(experiment.id,),
                )
            ]
        )

    def move(self, exp_id: str, start_utc: datetime, *, by: str | None = None) -> Experiment:
        """Give a planned (or refused) experiment a new start, after every check.

        Parameters
        ----------
        exp_id
            ``E0001``.
        start_utc
            New start, aware.
        by
            Who moves it, for the history; default the user name.

        Returns
        -------
        Experiment
            The experiment as stored now (a refused one is planned again).
        """
        start = check_start(start_utc, "start")
        by = check_text_field(by, "by", max_len=80) if by is not None else _default_by()
        movable = (ExperimentState.PLANNED, ExperimentState.REFUSED)
        before = self.get(exp_id)
        if before.state not in movable:
            self._refuse_state(before, "moved", movable)
        from controller.cli.cmd_check import load_rig

        rig = load_rig(before.rig_path)
        loaded = loaded_from_text(before.protocol_path, before.protocol_text)
        compiled = compile_experiment(before, start)
        end = start + timedelta(seconds=compiled.duration_s)
        candidate = Booking(
            f"{before.id} {before.title!r} ({before.owner})", None, before.chambers, start, end,
            compiled,
        )  # fmt: skip
        with self._transaction(self._conn):
            current = self.get(exp_id)
            if current.state not in movable:
                self._refuse_state(current, "moved", movable)
            self._refuse_conflicts(candidate, rig, current.rig_path, loaded, current.id)
            self._conn.execute(
                "UPDATE experiments SET start_utc = ?, end_utc = ?, state = ? WHERE id = ?",
                (_stamp(start), _stamp(end), ExperimentState.PLANNED.value, current.id),
            )
            zone = rig.maintenance.timezone
            reason = (
                f"moved from {format_when(current.start_utc, zone)} to {format_when(start, zone)}"
            )
            self._record(current.id, current.state, ExperimentState.PLANNED, by, reason)
        return self.get(exp_id)

    def cancel(self, exp_id: str, *, reason: str, by: str | None = None) -> Experiment:
        """Take an experiment that has not started out of the schedule.

        Parameters
        ----------
        exp_id
            ``E0001``.
        reason
            Why, one line (kept in the history).
        by
            Who cancels it; default the user name.

        Returns
        -------
        Experiment
            The experiment, now cancelled.
        """
        reason = check_text_field(reason, "reason", max_len=500)
        by = check_text_field(by, "by", max_len=80) if by is not None else _default_by()
        cancellable = (ExperimentState.PLANNED, ExperimentState.PREFLIGHT)
        with self._transaction(self._conn):
            current = self.get(exp_id)
            if current.state in (ExperimentState.RUNNING, ExperimentState.HELD):
                raise ScheduleConflict(
                    [
                        Conflict(
                            ConflictKind.STATE,
                            f"{current.id} is {current.state.value}: stop the run through its "
                            "controller (squall ctl … abort); serve then records it as aborted",
                            experiments=(current.id,),
                        )
                    ]
                )
            if current.state not in cancellable:
                self._refuse_state(current, "cancelled", cancellable)
            self._set_state(current, ExperimentState.CANCELLED, by, reason, None)
        return self.get(exp_id)

    def _set_state(
        self,
        current: Experiment,
        to: ExperimentState,
        by: str,
        reason: str,
        log_path: Path | None,
    ) -> None:
        if log_path is not None:
            self._conn.execute(
                "UPDATE experiments SET state = ?, log_path = ? WHERE id = ?",
                (to.value, str(log_path), current.id),
            )
        else:
            self._conn.execute(
                "UPDATE experiments SET state = ? WHERE id = ?", (to.value, current.id)
            )
        self._record(current.id, current.state, to, by, reason)

    def transition(
        self,
        exp_id: str,
        to: ExperimentState,
        *,
        reason: str,
        by: str,
        log_path: Path | None = None,
    ) -> Experiment:
        """Change an experiment's state (serve's preflight, start, hold, end).

        Parameters
        ----------
        exp_id
            ``E0001``.
        to
            New state; must be allowed from the current one by :data:`TRANSITIONS`
            (refused → planned goes through :meth:`move`, which checks conflicts again).
        reason
            Why, one line.
        by
            Who or what changes it (``serve``).
        log_path
            The run log, when the run starts (kept).

        Returns
        -------
        Experiment
            The experiment as stored now.
        """
        to = ExperimentState(to)
        reason = check_text_field(reason, "reason", max_len=500)
        by = check_text_field(by, "by", max_len=80)
        with self._transaction(self._conn):
            current = self.get(exp_id)
            allowed = TRANSITIONS[current.state]
            if current.state is ExperimentState.REFUSED:
                allowed = frozenset()  # planning again re-checks conflicts: use move()
            if to not in allowed:
                raise ScheduleConflict(
                    [
                        Conflict(
                            ConflictKind.STATE,
                            f"{current.id} cannot go from {current.state.value} to {to.value} "
                            f"(from {current.state.value}: "
                            f"{', '.join(sorted(s.value for s in allowed)) or 'nothing'})",
                            experiments=(current.id,),
                        )
                    ]
                )
            self._set_state(current, to, by, reason, log_path)
        return self.get(exp_id)
