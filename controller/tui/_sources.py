"""Data sources: turn a run log (or a broker) into snapshots for the views.

Rules of this module
--------------------
- A source is the only thing in the UI that reads data. Widgets never see a reader, a frame
  or a driver; they get :class:`~._snapshot.Snapshot` objects from the app, which asks its
  source on a timer (``poll``) and posts the result as a message.
- ``open`` and ``poll`` are quick and bounded: ``open`` reads the log's metadata and the
  last few ticks only (so ``squall watch`` paints at once however long the run is), and one
  ``poll`` reads at most ``max_rows_per_poll`` sample rows. A source that falls further
  behind (a suspended laptop) skips ahead to the newest tick rather than replaying a backlog.
  Rows are read as plain tuples (:class:`~._logfile.LogFile`): no pandas, no frames.
- ``history`` may be slow (it reads hours of one chamber) and is meant for a worker thread:
  it opens its own file, so it never shares a connection with ``poll``.
- :class:`LogBacked` is what the live and the replay source share: the log, its metadata,
  the chambers, the protocol timeline and the run's operator tasks (derived, like the
  timeline, from the protocol and rig text the log keeps; slow, so in a background thread).
- Sources never write to the log and never stop a run. Closing the UI closes the reader only.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

from controller.storage import ClockKind, IncubationState, RunMeta

from ._fold import apply_alarms, fold_alarms, held_at
from ._logfile import LogFile, sample_columns
from ._snapshot import (
    STATE_FIELDS,
    AlarmEntry,
    ChamberState,
    RunMode,
    RunState,
    RunStatus,
    Snapshot,
    TaskEntry,
    Trace,
    chamber_state,
)
from ._timeline import Timeline, full_timeline, title_only

__all__ = [
    "TRACE_FIELDS",
    "DataSource",
    "LogBacked",
    "LogSource",
    "trace_from_rows",
]

#: Sample fields the detail charts need.
TRACE_FIELDS = (
    "utc_s",
    "temperature_c",
    "temperature_setpoint_c",
    "o2_umol_l",
    "o2_sat_pct",
    "incubation",
)

_READ_FIELDS = ("chamber", "elapsed_s", *STATE_FIELDS)


@runtime_checkable
class DataSource(Protocol):
    """What the app needs from a source of chamber data."""

    @property
    def mode(self) -> RunMode:
        """Live or replay."""
        ...

    @property
    def chambers(self) -> tuple[str, ...]:
        """The run's chambers, in rig order."""
        ...

    @property
    def timeline(self) -> Timeline:
        """The protocol's timeline as known so far."""
        ...

    def open(self) -> Snapshot:
        """Read what is needed for the first paint and return the first snapshot."""
        ...

    def poll(self) -> Snapshot | None:
        """Bounded work: read what is new; return a snapshot, or None if nothing changed."""
        ...

    def history(self, chamber: str, span_s: float) -> Trace:
        """One chamber's samples over the last ``span_s`` seconds (s); may block."""
        ...

    def refine_timeline(self) -> Timeline:
        """Compile the protocol to place events; may block; returns the new timeline."""
        ...

    def close(self) -> None:
        """Release files and connections (never affects the run)."""
        ...


def trace_from_rows(chamber: str, rows: list[tuple[Any, ...]]) -> Trace:
    """A chart trace from one chamber's sample rows with :data:`TRACE_FIELDS`.

    Parameters
    ----------
    chamber
        Chamber identifier.
    rows
        ``(seq, *TRACE_FIELDS)`` tuples in write order (:meth:`LogFile.chamber_since`).

    Returns
    -------
    Trace
        Arrays sorted by UTC time (a resumed run's rows stay in order).
    """
    import numpy as np

    cols = sample_columns(rows, TRACE_FIELDS)
    order = np.argsort(cols["utc_s"], kind="stable")
    return Trace(
        chamber=chamber,
        utc_s=cols["utc_s"][order],
        temperature_c=cols["temperature_c"][order],
        temperature_setpoint_c=cols["temperature_setpoint_c"][order],
        o2_umol_l=cols["o2_umol_l"][order],
        o2_sat_pct=cols["o2_sat_pct"][order],
        closed=(cols["incubation"] == IncubationState.CLOSED.value)[order].astype(bool),
    )


class LogBacked:
    """What a source reading one run log has: the file, its metadata, chambers, timeline.

    Parameters
    ----------
    path
        The run log.
    protocol_dir
        Folder the protocol's CSV series are relative to, for placing events; default the
        working folder.

    Raises
    ------
    SquallError
        The file is missing or not a readable run log.
    """

    def __init__(self, path: str | Path, *, protocol_dir: Path | None = None) -> None:
        self._path = Path(path)
        self._file = LogFile(self._path)
        try:
            self._meta: RunMeta = self._file.meta()
        except BaseException:
            self._file.close()
            raise
        self._chambers = tuple(c.chamber for c in self._meta.chambers)
        self._protocol_dir = protocol_dir
        self._timeline = title_only(self._meta.protocol_text)
        self._tasks: tuple[TaskEntry, ...] | None = None
        self.tasks_note = ""
        """Why the run has no task list, if its tasks could not be derived."""

    @property
    def path(self) -> Path:
        """The run log."""
        return self._path

    @property
    def meta(self) -> RunMeta:
        """The run's metadata."""
        return self._meta

    @property
    def chambers(self) -> tuple[str, ...]:
        """The run's chambers, in rig order."""
        return self._chambers

    @property
    def timeline(self) -> Timeline:
        """The protocol's timeline as known so far."""
        return self._timeline

    def refine_timeline(self) -> Timeline:
        """Compile the stored protocol to place events and sampling reminders (may block).

        Returns
        -------
        Timeline
            The complete timeline, or the quick one with a note if it does not compile.
        """
        self._timeline = full_timeline(
            self._meta.protocol_text, self._meta.start_utc_s, base_dir=self._protocol_dir
        )
        self._timeline_refined()
        return self._timeline

    def _timeline_refined(self) -> None:
        """Called once the timeline is complete (a subclass marks its next snapshot due)."""

    def tasks(self) -> tuple[TaskEntry, ...] | None:
        """The run's operator tasks by start time; None until :meth:`derive_tasks` ran."""
        return self._tasks

    def derive_tasks(self) -> tuple[TaskEntry, ...]:
        """Derive the run's operator tasks from the protocol and rig text in the log (may
        block: it validates both files; meant for a background thread).

        Returns
        -------
        tuple of TaskEntry
            By start time; empty, with :attr:`tasks_note` saying why, when the texts do
            not give any.
        """
        from datetime import UTC, datetime

        from controller.errors import SquallError
        from controller.files import parse_toml, validate_data
        from controller.protocol import Protocol
        from controller.rig import Rig
        from controller.schedule._tasks import tasks_for_run

        meta = self._meta
        try:
            protocol = validate_data(
                parse_toml(meta.protocol_text, file="protocol"),
                Protocol,
                text=meta.protocol_text,
                file="protocol",
            )
            rig = validate_data(
                parse_toml(meta.rig_text, file="rig"), Rig, text=meta.rig_text, file="rig"
            )
            found = tasks_for_run(protocol, rig, datetime.fromtimestamp(meta.start_utc_s, UTC))
        except SquallError as exc:
            self.tasks_note = f"no operator tasks: {exc.one_line()}"
            self._tasks = ()
            return self._tasks
        self._tasks = tuple(
            TaskEntry(
                uid=t.uid,
                kind=str(t.kind),
                title=t.title,
                start_utc_s=t.start_utc.timestamp(),
                minutes=t.minutes,
                chambers=t.chambers,
                detail=t.detail,
            )
            for t in found
        )
        return self._tasks

    def close(self) -> None:
        """Close the log (the run goes on)."""
        self._file.close()


class LogSource(LogBacked):
    """Follow a run log as its run writes it (or read a finished one as it ended).

    Parameters
    ----------
    path
        The run log.
    max_rows_per_poll
        Most sample rows one poll reads, dimensionless; default 8 ticks of every chamber.
    silent_after_s
        Real seconds without a new sample after which an unfinished run shows as silent, s.
    wall_clock
        Real UTC time as POSIX s (injected so tests are deterministic).
    real_clock
        Monotonic real time, s (injected so tests are deterministic).
    protocol_dir
        Folder the protocol's CSV series are relative to, for placing events; default the
        working folder.

    Raises
    ------
    SquallError
        The file is missing or not a readable run log.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        max_rows_per_poll: int | None = None,
        silent_after_s: float = 60.0,
        wall_clock: Callable[[], float] = time.time,
        real_clock: Callable[[], float] = time.monotonic,
        protocol_dir: Path | None = None,
    ) -> None:
        super().__init__(path, protocol_dir=protocol_dir)
        n = max(1, len(self._chambers))
        self._max_rows = int(max_rows_per_poll or 8 * n)
        self._silent_after_s = float(silent_after_s)
        self._wall_clock = wall_clock
        self._real_clock = real_clock
        self._latest: dict[str, ChamberState] = {c: ChamberState(chamber=c) for c in self._chambers}
        self._since = 0
        self._version = 0
        self._newest_row: tuple[float, float, str] | None = None  # (utc_s, elapsed_s, phase)
        self._arrival_s: float | None = None
        self._alarms: tuple[AlarmEntry, ...] = ()
        self._held = False
        self._end_reason = ""
        self._last: Snapshot | None = None
        self._timeline_changed = False

    @property
    def mode(self) -> RunMode:
        """Always live."""
        return RunMode.LIVE

    # -- reading --------------------------------------------------------------------------

    def open(self) -> Snapshot:
        """Read metadata and the last few ticks; return the first snapshot.

        Returns
        -------
        Snapshot
            The newest state of every chamber (chambers without samples are empty).
        """
        last = self._file.last_rowid()
        self._since = max(0, last - 2 * len(self._chambers))
        snapshot = self._read(force=True)
        assert snapshot is not None
        return snapshot

    def poll(self) -> Snapshot | None:
        """Read new rows (at most ``max_rows_per_poll``) and the rare tables.

        Returns
        -------
        Snapshot or None
            A new snapshot when anything changed (new samples, alarms, hold, end, or the run
            turning silent), else None.
        """
        return self._read(force=False)

    def _read(self, *, force: bool) -> Snapshot | None:
        log = self._file
        rows = log.tail(self._since, limit=self._max_rows, fields=_READ_FIELDS)
        if len(rows) == self._max_rows:
            newest = log.last_rowid()
            if newest - int(rows[-1][0]) > self._max_rows:  # far behind: skip ahead
                self._since = max(0, newest - 2 * len(self._chambers))
                rows = log.tail(self._since, limit=self._max_rows, fields=_READ_FIELDS)
        changed = force
        if rows:
            self._since = int(rows[-1][0])
            for row in rows:  # later rows of a chamber replace earlier ones
                chamber = str(row[1])
                self._latest[chamber] = chamber_state(chamber, row[3:])
            _, _, elapsed_s, utc_s, phase, *_ = rows[-1]
            self._newest_row = (float(utc_s), float(elapsed_s), str(phase))
            arrival = self._real_clock()
            if force and self._meta.clock_kind is ClockKind.REAL:
                # on opening, the newest row may be old: age it by the wall clock
                arrival -= max(0.0, self._wall_clock() - self._newest_row[0])
            self._arrival_s = arrival
            changed = True
        alarms = fold_alarms(log.alarm_rows())
        if alarms != self._alarms:
            self._alarms, changed = alarms, True
        held = held_at(log.event_rows())
        if held != self._held:
            self._held, changed = held, True
        if (force or not rows) and not self._end_reason:
            end = log.end()
            if end is not None:
                self._end_reason, changed = end.end_reason.value, True
        if self._timeline_changed:  # the duration became known: show it
            self._timeline_changed, changed = False, True
        run = self._run_state()
        if self._last is not None and run.status is not self._last.run.status:
            changed = True
        if not changed:
            return None
        self._version += 1
        states = tuple(apply_alarms(self._latest[c], self._alarms) for c in self._chambers)
        self._last = Snapshot(run=run, chambers=states, alarms=self._alarms, version=self._version)
        return self._last

    def _age_s(self) -> float | None:
        """Real seconds since the newest sample was logged (as far as this source saw)."""
        if self._arrival_s is None:
            return None
        return max(0.0, self._real_clock() - self._arrival_s)

    def _run_state(self) -> RunState:
        newest = self._newest_row
        age = self._age_s()
        if self._end_reason:
            status = RunStatus.FINISHED
        elif newest is None:
            status = RunStatus.WAITING
        elif self._held:
            status = RunStatus.HELD
        elif age is not None and age > self._silent_after_s:
            status = RunStatus.SILENT
        else:
            status = RunStatus.RUNNING
        return RunState(
            run_id=self._meta.run_id,
            title=self._timeline.title or self._meta.run_id,
            mode=RunMode.LIVE,
            status=status,
            phase=newest[2] if newest else "",
            elapsed_s=newest[1] if newest else 0.0,
            duration_s=self._timeline.duration_s,
            utc_s=newest[0] if newest else None,
            start_utc_s=self._meta.start_utc_s,
            end_reason=self._end_reason,
            age_s=age,
        )

    def history(self, chamber: str, span_s: float) -> Trace:
        """One chamber's samples over the ``span_s`` seconds before its newest sample.

        Opens its own file, so it may run in a worker thread while ``poll`` runs.

        Parameters
        ----------
        chamber
            Chamber identifier.
        span_s
            How far back, s.

        Returns
        -------
        Trace
            The samples, oldest first.
        """
        with LogFile(self._path) as log:
            newest = log.newest_utc_s(chamber)
            if newest is None:
                return Trace(chamber=chamber)
            rows = log.chamber_since(chamber, newest - span_s, TRACE_FIELDS)
        trace = trace_from_rows(chamber, rows)
        if len(trace):
            trace = trace.window(float(trace.utc_s[-1]), span_s)
        return trace

    def _timeline_refined(self) -> None:
        self._timeline_changed = True
