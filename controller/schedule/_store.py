"""The schedule store: one SQLite file (WAL) beside the run logs, default ``runs/schedule.sqlite``.

Rules of this module
--------------------
- The file, its tables and transactions are :mod:`controller.schedule._database`'s: 0600,
  WAL, a schema version, ``BEGIN IMMEDIATE`` transactions rolled back on any exception.
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
- The store reads the clock only to stamp history entries (``now`` may be given, e.g. a
  simulated clock).
"""

from __future__ import annotations

import getpass
import hashlib
import json
from collections.abc import Callable, Iterable
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import TracebackType
from typing import TYPE_CHECKING, Any

from controller.errors import SquallError
from controller.schedule._database import (
    COLUMNS,
    open_database,
    stamp,
    transaction,
    unstamp,
)
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
    booking_of,
    check_start,
    check_text_field,
    format_when,
    normalize_id,
)
from controller.schedule._suggest import loaded_from_text

if TYPE_CHECKING:
    from controller.cli.cmd_check import LoadedProtocol
    from controller.rig import Rig

__all__ = ["ScheduleStore"]


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
        Store file; created (mode 0600, with its folder) with the schema when missing (no unit).
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
        self._conn = open_database(self.path, busy_timeout_s)

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
            start_utc=unstamp(row[8]),
            end_utc=unstamp(row[9]),
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
            ``E0001`` (no unit).

        Returns
        -------
        Experiment
            As stored (no unit).

        Raises
        ------
        SquallError
            No experiment has this id.
        """
        key = normalize_id(exp_id)
        row = self._conn.execute(
            f"SELECT {COLUMNS} FROM experiments WHERE id = ?", (key,)
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
            Only these states; ``None`` = all (no unit).

        Returns
        -------
        list of Experiment
            Matching experiments (no unit).
        """
        sql = f"SELECT {COLUMNS} FROM experiments"
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
            ``E0001`` (no unit).

        Returns
        -------
        list of HistoryEntry
            From the add onwards (no unit).
        """
        experiment = self.get(exp_id)
        rows = self._conn.execute(
            "SELECT time_utc, from_state, to_state, by, reason FROM history "
            "WHERE experiment = ? ORDER BY seq",
            (experiment.id,),
        ).fetchall()
        return [
            HistoryEntry(
                time_utc=unstamp(r[0]),
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
            Rig file (no unit).
        now_utc
            The present, aware.

        Returns
        -------
        Experiment or None
            Earliest PLANNED experiment with ``start_utc <= now_utc`` (no unit).
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
            Rig file (no unit).
        exclude
            Id to leave out (the experiment being moved) (no unit).

        Returns
        -------
        list of Booking
            In start order (no unit).
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
                stamp(self._now()),
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
            Rig file (no unit).
        protocol_path
            Protocol file; its text is kept as the experiment's snapshot.
        start_utc
            Planned start, aware (any zone; stored as UTC).
        owner
            Who is responsible, one line (no unit).
        note
            Free text, one line (no unit).
        by
            Who adds it, for the history; default ``owner`` (no unit).

        Returns
        -------
        Experiment
            The stored experiment (state planned) (no unit).

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
        with transaction(self._conn):
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
                    stamp(start),
                    stamp(end),
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
            ``E0001`` (no unit).
        start_utc
            New start, aware.
        by
            Who moves it, for the history; default the user name (no unit).

        Returns
        -------
        Experiment
            The experiment as stored now (a refused one is planned again) (no unit).
        """
        start = check_start(start_utc, "start")
        by = check_text_field(by, "by", max_len=80) if by is not None else _default_by()
        movable = (ExperimentState.PLANNED, ExperimentState.REFUSED)
        before = self.get(exp_id)
        if before.state not in movable:
            self._refuse_state(before, "moved", movable)
        from controller.cli.cmd_check import compile_loaded, load_rig

        rig = load_rig(before.rig_path)
        loaded = loaded_from_text(before.protocol_path, before.protocol_text)
        compiled = compile_loaded(loaded, start)
        end = start + timedelta(seconds=compiled.duration_s)
        candidate = Booking(
            f"{before.id} {before.title!r} ({before.owner})", None, before.chambers, start, end,
            compiled,
        )  # fmt: skip
        with transaction(self._conn):
            current = self.get(exp_id)
            if current.state not in movable:
                self._refuse_state(current, "moved", movable)
            self._refuse_conflicts(candidate, rig, current.rig_path, loaded, current.id)
            self._conn.execute(
                "UPDATE experiments SET start_utc = ?, end_utc = ?, state = ? WHERE id = ?",
                (stamp(start), stamp(end), ExperimentState.PLANNED.value, current.id),
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
            ``E0001`` (no unit).
        reason
            Why, one line (kept in the history) (no unit).
        by
            Who cancels it; default the user name (no unit).

        Returns
        -------
        Experiment
            The experiment, now cancelled (no unit).
        """
        reason = check_text_field(reason, "reason", max_len=500)
        by = check_text_field(by, "by", max_len=80) if by is not None else _default_by()
        cancellable = (ExperimentState.PLANNED, ExperimentState.PREFLIGHT)
        with transaction(self._conn):
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
            ``E0001`` (no unit).
        to
            New state; must be allowed from the current one by :data:`TRANSITIONS`
            (refused → planned goes through :meth:`move`, which checks conflicts again) (no unit).
        reason
            Why, one line (no unit).
        by
            Who or what changes it (``serve``) (no unit).
        log_path
            The run log, when the run starts (kept) (no unit).

        Returns
        -------
        Experiment
            The experiment as stored now (no unit).
        """
        to = ExperimentState(to)
        reason = check_text_field(reason, "reason", max_len=500)
        by = check_text_field(by, "by", max_len=80)
        with transaction(self._conn):
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
