"""Operator commands on a running control loop: hold, resume, skip, abort, ack, note, status.

Rules of this module
--------------------
- :class:`OperatorHooks` is the part of :class:`~controller.runtime.ControlLoop` that
  operators reach (through the local control socket, the UI's command channel, tests). Every
  hook is a plain method called from the loop's own thread (the socket server is a task in
  the same event loop), between two awaits of the loop, so it never races a tick.
- Every command, carried out or refused, is written to the audit trail (time, user, command,
  text, result); hold, resume, skip and abort also write a run event, and an acknowledgement
  writes an alarm record naming the user. A refused command raises :class:`OperatorError`
  with a one-line reason and changes nothing else.
- Protocol time is the :class:`~controller.runtime._protocol_clock.ProtocolClock`: a hold
  freezes it (setpoints kept), a resume lets it run on, a skip moves it forward to the start
  of a later phase (never back: protocol time in the log only grows). A skip or an abort ends
  every closed incubation window with reason ``operator``.
- Abort is asynchronous: the hook records the request and wakes the loop, which then drives
  every output safe and finishes the log with end reason ``aborted``; ``await loop.done``
  waits for that.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable, Sequence
from dataclasses import replace
from enum import StrEnum
from typing import Any

from controller.clock import Clock
from controller.control import ClosedWindow, Condition, IllegalInterlockEvent, WindowEnd
from controller.errors import SquallError
from controller.protocol import CompiledProtocol, format_duration
from controller.runtime._decide import Decider
from controller.runtime._logsink import LogSink, alarm_record
from controller.runtime._protocol_clock import ProtocolClock
from controller.runtime._settings import ControlPlan
from controller.storage import (
    AlarmRecord,
    AuditRecord,
    EventKind,
    EventRecord,
    LightState,
    SampleRow,
    WindowEndReason,
    WindowRecord,
)

__all__ = ["OperatorError", "OperatorHooks", "RunState", "window_record"]


class RunState(StrEnum):
    """Where a control loop stands, as :meth:`OperatorHooks.status` reports it."""

    STARTING = "starting"
    """Created or waiting for the devices; no tick yet."""
    RUNNING = "running"
    HELD = "held"
    """Protocol clock frozen, setpoints kept, control going on."""
    STOPPING = "stopping"
    """Abort requested or the protocol's end reached; outputs are being made safe."""
    FINISHED = "finished"


class OperatorError(SquallError):
    """An operator command that cannot be carried out now; nothing was changed.

    Parameters
    ----------
    command
        The command refused (``hold``, ``resume``, ``skip-to``, ``abort``, ``ack``, ``note``).
    message
        Why, in one line.
    """

    def __init__(self, command: str, message: str) -> None:
        super().__init__(message, field=command)
        self.command = command


def window_record(
    chamber: str, window: ClosedWindow, utc_of: Callable[[float], float]
) -> WindowRecord:
    """The run-log record of a closed window that ended.

    Parameters
    ----------
    chamber
        Chamber id (no unit).
    window
        The window (clock times in s).
    utc_of
        Turns a clock time (s) into UTC wall time (POSIX s).

    Returns
    -------
    WindowRecord
        Light or dark, start and end (clock s and UTC POSIX s), reason and detail.
    """
    return WindowRecord(
        chamber=chamber,
        light=LightState.LIGHT if window.light else LightState.DARK,
        start_t_s=window.start_t_s,
        start_utc_s=utc_of(window.start_t_s),
        end_t_s=window.end_t_s,
        end_utc_s=utc_of(window.end_t_s),
        end_reason=WindowEndReason(window.reason.value),
        detail=window.detail,
    )


class OperatorHooks:
    """Operator commands of a control loop (mixed into :class:`ControlLoop`)."""

    clock: Clock
    compiled: CompiledProtocol
    plan: ControlPlan
    decider: Decider
    sink: LogSink
    _pclock: ProtocolClock | None
    _t0_s: float
    _utc0_s: float
    _state: RunState
    _phase: str | None
    _latest_values: Sequence[tuple[Any, ...]]  # the latest tick's rows, SampleRow field order
    _abort_by: str | None
    _windows: int
    _sleeping: bool
    _control_task: asyncio.Task[None] | None

    @property
    def _latest(self) -> dict[str, SampleRow]:
        """Each protocol chamber's row of the latest tick (built when asked: status)."""
        rows = map(SampleRow.from_values, self._latest_values)
        return {row.chamber: row for row in rows}

    # ------------------------------------------------------------------ shared helpers
    def _utc_of(self, t_s: float) -> float:
        """UTC wall time of a clock time of this session, POSIX s."""
        return self._utc0_s + (t_s - self._t0_s)

    def _record_windows(self, windows: tuple[tuple[str, ClosedWindow], ...]) -> None:
        """Queue the run-log records of windows that ended."""
        for chamber, window in windows:
            self.sink.put(window_record(chamber, window, self._utc_of))
            self._windows += 1

    def _audit(self, t_s: float, user: str, command: str, text: str, result: str) -> None:
        self.sink.put(
            AuditRecord(
                t_s=t_s,
                utc_s=self._utc_of(t_s),
                user=user,
                command=command,
                text=text,
                result=result,
            )
        )

    def _event(self, t_s: float, kind: EventKind, detail: str, phase: str | None) -> None:
        assert self._pclock is not None
        self.sink.put(
            EventRecord(
                t_s=t_s,
                utc_s=self._utc_of(t_s),
                kind=kind,
                elapsed_s=self._pclock.elapsed(t_s),
                phase=phase,
                detail=detail,
            )
        )

    def _start(self, command: str, user: str, text: str = "") -> tuple[float, ProtocolClock]:
        """Clock time of a command and the protocol clock; refuse when no run is going on."""
        if self._state is RunState.FINISHED:
            raise OperatorError(command, "the run has ended")
        t_s = self.clock.now_s()
        if self._pclock is None or self._state is RunState.STARTING:
            raise self._refuse(t_s, command, user, text, "the run has not started yet")
        if self._state is RunState.STOPPING:
            raise self._refuse(t_s, command, user, text, "the run is stopping")
        return t_s, self._pclock

    def _refuse(self, t_s: float, command: str, user: str, text: str, why: str) -> OperatorError:
        """Audit a refused command; return the error to raise."""
        if self._pclock is not None:
            self._audit(t_s, user, command, text, f"refused: {why}")
        return OperatorError(command, why)

    # ------------------------------------------------------------------ commands
    def hold(self, user: str) -> None:
        """Freeze the protocol clock; control goes on with the setpoints kept.

        Parameters
        ----------
        user
            Operating-system user who asked (no unit).

        Raises
        ------
        OperatorError
            The run is held already, has not started, is stopping or has ended.
        """
        t_s, pclock = self._start("hold", user)
        if pclock.held:
            raise self._refuse(t_s, "hold", user, "", "the run is held already")
        elapsed = pclock.hold(t_s)
        self._state = RunState.HELD
        detail = f"held by {user} at +{format_duration(elapsed)}"
        self._event(t_s, EventKind.HOLD, detail, self._phase)
        self._audit(t_s, user, "hold", "", "ok")

    def resume(self, user: str) -> None:
        """Let the protocol clock run again from where the hold froze it.

        Parameters
        ----------
        user
            Operating-system user who asked (no unit).

        Raises
        ------
        OperatorError
            The run is not held (or has not started, is stopping, has ended).
        """
        t_s, pclock = self._start("resume", user)
        if not pclock.held:
            raise self._refuse(t_s, "resume", user, "", "the run is not held")
        elapsed = pclock.resume(t_s)
        self._state = RunState.RUNNING
        detail = f"resumed by {user} at +{format_duration(elapsed)}"
        self._event(t_s, EventKind.HOLD_END, detail, self._phase)
        self._audit(t_s, user, "resume", "", "ok")

    def skip_to(self, phase: str, user: str) -> None:
        """Move the protocol clock forward to the start of a later phase.

        Parameters
        ----------
        phase
            Name of the phase (no unit); it must start after the current protocol time.
        user
            Operating-system user who asked (no unit).

        Raises
        ------
        OperatorError
            No such phase, a phase that has begun already, or no run going on.
        """
        t_s, pclock = self._start("skip-to", user, phase)
        spans = {p.name: p.t0_s for p in self.compiled.phases}
        if phase not in spans:
            why = f"no phase {phase!r}; the phases are {', '.join(spans)}"
            raise self._refuse(t_s, "skip-to", user, phase, why)
        now = pclock.elapsed(t_s)
        if spans[phase] <= now:
            why = (
                f"phase {phase!r} began already (at +{format_duration(spans[phase])}; now "
                f"+{format_duration(now)}); skip-to only moves forward"
            )
            raise self._refuse(t_s, "skip-to", user, phase, why)
        pclock.jump(t_s, spans[phase])
        self._record_windows(
            self.decider.end_windows(t_s, WindowEnd.OPERATOR, f"{user} skipped to {phase!r}")
        )
        detail = f"skipped by {user} from +{format_duration(now)}"
        self._event(t_s, EventKind.SKIP, detail, phase)
        self._audit(t_s, user, "skip-to", phase, "ok")

    def abort(self, user: str) -> None:
        """End the run now: every output safe, the log finished with end reason ``aborted``.

        Parameters
        ----------
        user
            Operating-system user who asked (no unit).

        Raises
        ------
        OperatorError
            The run is stopping already, has not started or has ended.

        Notes
        -----
        The loop carries the abort out at once if it is between ticks, else right after the
        tick in progress; ``await loop.done`` returns once the log is finished.
        """
        t_s, _ = self._start("abort", user)
        self._abort_by = user
        self._state = RunState.STOPPING
        self._audit(t_s, user, "abort", "", "ok")
        task = self._control_task
        if self._sleeping and task is not None:  # between ticks: wake the loop now
            task.cancel("abort")

    def ack(self, alarm_code: str, chamber: str | None, user: str) -> None:
        """Acknowledge an alarm: a latched interlock condition may then clear.

        Parameters
        ----------
        alarm_code
            The alarm's code as logged (e.g. ``over-temperature``; no unit).
        chamber
            The chamber, or None for every chamber where the alarm can be acknowledged.
        user
            Operating-system user who asked (no unit).

        Raises
        ------
        OperatorError
            Unknown code or chamber, or nothing to acknowledge.
        """
        text = f"{alarm_code} {chamber or '*'}"
        t_s, _ = self._start("ack", user, text)
        try:
            condition = Condition(alarm_code)
        except ValueError:
            codes = ", ".join(c.value for c in Condition)
            why = f"no alarm code {alarm_code!r}; the codes are {codes}"
            raise self._refuse(t_s, "ack", user, text, why) from None
        if chamber is not None and chamber not in self.plan.chambers:
            why = f"no chamber {chamber!r} in this run; it runs {', '.join(self.plan.chambers)}"
            raise self._refuse(t_s, "ack", user, text, why)
        records: list[AlarmRecord] = []
        for c in (chamber,) if chamber is not None else tuple(self.plan.chambers):
            try:
                events = self.decider.acknowledge(c, condition, t_s)
            except IllegalInterlockEvent:
                continue
            for event in events:
                record = alarm_record(c, event, self._utc_of(event.t_s))
                if record is not None:
                    records.append(replace(record, user=user))
        if not records:
            where = f"on {chamber}" if chamber is not None else "on any chamber"
            why = f"nothing to acknowledge: {alarm_code} is not active or latched {where}"
            raise self._refuse(t_s, "ack", user, text, why)
        for record in records:
            self.sink.put(record)
        self._audit(t_s, user, "ack", text, "ok")

    def note(self, text: str, user: str) -> None:
        """Write a note to the audit trail (e.g. "sampled A1–A4 for nutrients").

        Parameters
        ----------
        text
            The note (no unit); must not be empty.
        user
            Operating-system user who wrote it (no unit).

        Raises
        ------
        OperatorError
            An empty note, or no run going on.
        """
        t_s, _ = self._start("note", user, text)
        if not text.strip():
            raise self._refuse(t_s, "note", user, text, "the note is empty")
        self._audit(t_s, user, "note", text.strip(), "ok")

    def status(self) -> dict[str, Any]:
        """The run as an operator sees it, JSON-serialisable.

        Returns
        -------
        dict
            ``state`` (starting, running, held, stopping, finished), ``phase``, ``elapsed_s``
            and ``duration_s`` (protocol time, s), ``held``, ``utc`` (ISO 8601), ``log`` (path)
            and ``chambers``: per chamber ``temperature_c``, ``temperature_setpoint_c`` (°C),
            ``o2_umol_l`` (µmol L⁻¹), ``o2_sat_pct`` (% air saturation), ``incubation``
            (open/closed) and ``alarm`` (code or None), from the latest tick (None before it).
        """
        now = self.clock.now_s()
        pclock = self._pclock
        elapsed = 0.0 if pclock is None else pclock.elapsed(now)
        chambers: dict[str, dict[str, Any]] = {}
        for chamber in self.plan.chambers:
            row = self._latest.get(chamber)
            chambers[chamber] = {
                "temperature_c": _number(None if row is None else row.temperature_c),
                "temperature_setpoint_c": _number(
                    None if row is None else row.temperature_setpoint_c
                ),
                "o2_umol_l": _number(None if row is None else row.o2_umol_l),
                "o2_sat_pct": _number(None if row is None else row.o2_sat_pct),
                "incubation": None if row is None else row.incubation.value,
                "alarm": None if row is None else row.alarm,
            }
        return {
            "state": self._state.value,
            "phase": self._phase,
            "elapsed_s": min(elapsed, self.compiled.duration_s),
            "duration_s": self.compiled.duration_s,
            "held": bool(pclock is not None and pclock.held),
            "utc": self.clock.utc(now).isoformat(),
            "log": str(self.sink.writer.path),
            "chambers": chambers,
        }


def _number(value: float | None) -> float | None:
    """A float for JSON: None for missing or non-finite values."""
    return value if value is not None and math.isfinite(value) else None
