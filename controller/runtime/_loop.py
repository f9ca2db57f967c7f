"""The control loop: a fixed-period tick on the clock, supervised, failing safe.

Rules of this module
--------------------
- Supervision: one ``asyncio.TaskGroup`` runs the chamber I/O's background task, the logger
  task and the control task. If any of them fails, the group cancels the others; whatever
  happens (completion, error, cancellation), a shielded shutdown path then writes safe
  outputs to every chamber and closes the run log with how the run ended. ``CancelledError``
  is never swallowed: after the shutdown it propagates.
- Ticks: tick k is due at ``start + k·period`` on the clock, so lateness never accumulates
  into drift. A late tick runs at once and is counted; when whole periods were missed the
  loop skips to the latest due tick and counts the skipped ones, never running a backlog.
- One tick: read every chamber concurrently (every read bounded by the tick's read deadline,
  so one slow device does not hold up the others; what has not answered by then is stale),
  decide (:class:`~controller.runtime._decide.Decider`:
  interlocks, setpoints, PID, lamps, pumps), write every chamber concurrently, queue one log
  row per protocol chamber, then report progress. Log rows carry the readings as read (None
  when stale), the protocol's setpoints (what the experiment asks, not the rate-limited value
  the PID follows) and the outputs decided.
- Outputs start safe: before the first tick every chamber is sent its safe state (idle
  chambers: everything off), and the interlocks hold chambers safe until their first healthy
  tick.
"""

from __future__ import annotations

import asyncio
import logging
import math
from collections.abc import Callable, Coroutine, Mapping
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

from controller.clock import Clock
from controller.control import Outputs
from controller.errors import RuntimeFailure
from controller.protocol import CompiledProtocol
from controller.runtime._decide import OFF, Decider
from controller.runtime._io import ChamberIO, ChamberReadings, stale_readings
from controller.runtime._logsink import LogSink, alarm_record
from controller.runtime._setpoints import SetpointTable
from controller.runtime._settings import ControlPlan
from controller.storage import (
    EventKind,
    EventRecord,
    IncubationState,
    RunEnd,
    RunEndReason,
    RunLogWriter,
    SampleRow,
)

__all__ = ["ControlLoop", "RunSummary", "TickStats", "TickStatus"]

_log = logging.getLogger(__name__)

#: Width of a lateness histogram bin, s.
_BIN_S = 0.001
#: Bins of the lateness histogram (the last one collects everything beyond), dimensionless.
_BINS = 5000


@dataclass(frozen=True, kw_only=True)
class TickStats:
    """How punctual the ticks were.

    Attributes
    ----------
    ticks
        Ticks run, dimensionless.
    late
        Ticks that started more than the settings' lateness limit after they were due,
        dimensionless.
    missed
        Due ticks skipped because the loop was more than a period behind, dimensionless.
    max_lateness_s
        Largest start lateness, s.
    p99_lateness_s
        99th percentile of start lateness, s (to 1 ms, from a histogram).
    """

    ticks: int
    late: int
    missed: int
    max_lateness_s: float
    p99_lateness_s: float


class _TickCounter:
    """Accumulates tick lateness in a fixed histogram (memory does not grow with the run)."""

    def __init__(self, late_after_s: float) -> None:
        self.late_after_s = late_after_s
        self.ticks = 0
        self.late = 0
        self.missed = 0
        self.max_s = 0.0
        self.bins = [0] * _BINS

    def add(self, lateness_s: float) -> None:
        lateness_s = max(0.0, lateness_s)
        self.ticks += 1
        if lateness_s > self.late_after_s:
            self.late += 1
        self.max_s = max(self.max_s, lateness_s)
        self.bins[min(_BINS - 1, int(lateness_s / _BIN_S))] += 1

    def stats(self) -> TickStats:
        p99 = 0.0
        if self.ticks:
            need = math.ceil(0.99 * self.ticks)
            seen = 0
            for i, count in enumerate(self.bins):
                seen += count
                if seen >= need:
                    p99 = min(self.max_s, (i + 1) * _BIN_S) if count else 0.0
                    break
        return TickStats(
            ticks=self.ticks,
            late=self.late,
            missed=self.missed,
            max_lateness_s=self.max_s,
            p99_lateness_s=p99,
        )


@dataclass(frozen=True, kw_only=True)
class TickStatus:
    """What a progress display learns after each tick.

    Attributes
    ----------
    tick
        Tick number, dimensionless.
    ticks_total
        Ticks the protocol needs, dimensionless.
    elapsed_s
        Protocol time, s.
    duration_s
        Protocol length, s.
    phase
        Phase in force.
    utc
        Wall time of the tick, aware UTC.
    alarms
        Holding interlock condition code by chamber (chambers without one are absent).
    """

    tick: int
    ticks_total: int
    elapsed_s: float
    duration_s: float
    phase: str
    utc: datetime
    alarms: Mapping[str, str]


@dataclass(frozen=True, kw_only=True)
class RunSummary:
    """How a run went.

    Attributes
    ----------
    log_path
        The run log.
    end_reason
        completed, aborted or stopped.
    start_utc, end_utc
        Wall times of the run's start and end, aware UTC.
    run_s
        Clock time from start to end, s (simulated seconds on a virtual clock).
    ticks
        Tick punctuality.
    rows_written
        Sample rows written to the log, dimensionless.
    rows_lost
        Sample rows a failed log write dropped, dimensionless.
    alarms
        Every alarm raised, as (chamber, condition code), in order.
    detail
        Why the run ended when it did not complete (the error), else empty.
    """

    log_path: Path
    end_reason: RunEndReason
    start_utc: datetime
    end_utc: datetime
    run_s: float
    ticks: TickStats
    rows_written: int
    rows_lost: int
    alarms: tuple[tuple[str, str], ...] = field(default=())
    detail: str = ""


async def _shielded(coro: Coroutine[Any, Any, None]) -> None:
    """Run ``coro`` to its end even if the caller is cancelled meanwhile; then re-raise the
    cancellation."""
    task = asyncio.ensure_future(coro)
    interrupted = False
    while not task.done():
        try:
            await asyncio.wait({task})
        except asyncio.CancelledError:
            interrupted = True
    if interrupted:
        raise asyncio.CancelledError
    task.result()


def _leaf(error: BaseException) -> BaseException:
    """The single exception inside nested one-member exception groups, else ``error``."""
    while isinstance(error, BaseExceptionGroup) and len(error.exceptions) == 1:
        error = error.exceptions[0]
    return error


class ControlLoop:
    """One run of a protocol on a rack's chamber I/O.

    Parameters
    ----------
    io
        The chamber I/O (simulated or hardware); must serve every rig chamber of ``plan``.
    clock
        The run's clock.
    compiled
        The compiled protocol (its chambers are those of ``plan``).
    plan
        Control plan of the rig for this protocol.
    writer
        Open run-log writer; the loop finishes it.
    progress
        Called after every tick with a :class:`TickStatus`; must be quick.
    """

    def __init__(
        self,
        *,
        io: ChamberIO,
        clock: Clock,
        compiled: CompiledProtocol,
        plan: ControlPlan,
        writer: RunLogWriter,
        progress: Callable[[TickStatus], None] | None = None,
    ) -> None:
        self.io = io
        self.clock = clock
        self.compiled = compiled
        self.plan = plan
        self.decider = Decider(plan)
        self.sink = LogSink(writer)
        self.progress = progress
        settings = plan.settings
        self._chambers = tuple(plan.chambers)
        self._table = SetpointTable(compiled, self._chambers, settings.period_s)
        self._counter = _TickCounter(settings.lateness_limit_s)
        self._ticks_total = max(1, math.ceil(compiled.duration_s / settings.period_s - 1e-9))
        self._alarms: list[tuple[str, str]] = []
        self._holding: dict[str, str] = {}
        self._phase: str | None = None
        self._tasks: list[asyncio.Task[None]] = []
        self._failing: set[tuple[str, str]] = set()
        self._t0_s = 0.0
        self._utc0_s = 0.0

    # ------------------------------------------------------------------ supervision
    async def run(self) -> RunSummary:
        """Run the protocol to its end (or until an error or cancellation).

        Returns
        -------
        RunSummary
            How the run went (only on completion; otherwise the error propagates after the
            shutdown path has made every chamber safe and closed the log).
        """
        clock = self.clock
        self._t0_s = clock.now_s()
        self._utc0_s = clock.utc(self._t0_s).timestamp()
        reason, detail = RunEndReason.ABORTED, ""
        async with self.io:
            try:
                ready = asyncio.Event()
                async with asyncio.TaskGroup() as group:
                    self._tasks = [
                        group.create_task(self.io.run(ready), name="chamber-io"),
                        group.create_task(self.sink.run(), name="run-log"),
                    ]
                    group.create_task(self._control(ready), name="control")
                reason = RunEndReason.COMPLETED
            except asyncio.CancelledError:
                reason, detail = RunEndReason.STOPPED, "cancelled"
                raise
            except BaseExceptionGroup as group_error:
                leaf = _leaf(group_error)
                detail = f"{type(leaf).__name__}: {leaf}"
                if leaf is not group_error:
                    raise leaf from None
                raise
            except BaseException as error:
                detail = f"{type(error).__name__}: {error}"
                raise
            finally:
                await _shielded(self._shutdown(reason, detail))
        return self._summary(reason, detail)

    def _summary(self, reason: RunEndReason, detail: str) -> RunSummary:
        end_s = self.clock.now_s()
        return RunSummary(
            log_path=self.sink.writer.path,
            end_reason=reason,
            start_utc=self.clock.utc(self._t0_s),
            end_utc=self.clock.utc(end_s),
            run_s=end_s - self._t0_s,
            ticks=self._counter.stats(),
            rows_written=self.sink.rows_written,
            rows_lost=self.sink.rows_lost,
            alarms=tuple(self._alarms),
            detail=detail,
        )

    async def _shutdown(self, reason: RunEndReason, detail: str) -> None:
        """Write safe outputs everywhere (lowered by any active trip's own safe state), then
        record the end and close the log. Never raises."""
        safe = {c: OFF for c in self.io.chambers}
        for chamber in self.plan.chambers:
            safe[chamber] = self.decider.stop_outputs(chamber)
        try:
            results = await self._write_all(safe)
            failed = sorted(c for c, ok in results.items() if not ok)
        except Exception:  # the writes are guarded; this is a last resort
            _log.exception("shutdown: writing safe outputs failed")
            failed = sorted(safe)
        if failed:
            _log.error("shutdown: safe outputs not confirmed for %s", ", ".join(failed))
        sink, writer = self.sink, self.sink.writer
        try:
            sink.drain()
            t_s = self.clock.now_s()
            utc_s = self._utc0_s + (t_s - self._t0_s)
            kind = EventKind.RUN_STOP if reason is not RunEndReason.ABORTED else EventKind.ABORT
            note = f"safe outputs written; {reason.value}"
            if failed:
                note += f"; safe outputs not confirmed for {', '.join(failed)}"
            if detail:
                note += f"; {detail}"
            sink.put(
                EventRecord(
                    t_s=t_s,
                    utc_s=utc_s,
                    kind=kind,
                    elapsed_s=t_s - self._t0_s,
                    phase=self._phase,
                    detail=note,
                )
            )
            sink.drain()
            writer.finish(RunEnd(end_t_s=t_s, end_utc_s=utc_s, end_reason=reason))
        except Exception:
            _log.exception("shutdown: closing the run log failed")
            try:
                writer.close()
            except Exception:
                _log.exception("shutdown: the run log could not be closed")

    # ------------------------------------------------------------------ ticking
    async def _control(self, ready: asyncio.Event) -> None:
        settings = self.plan.settings
        clock = self.clock
        try:
            async with asyncio.timeout(settings.ready_timeout_s):
                await ready.wait()
        except TimeoutError:
            raise RuntimeFailure(
                f"the chamber devices were not ready within {settings.ready_timeout_s:g} s"
            ) from None
        start = {c: OFF for c in self.io.chambers}
        for chamber, cs in self.plan.chambers.items():
            start[chamber] = cs.interlocks.safe_outputs()
        await self._write_all(start)
        t0, period, total = self._t0_s, settings.period_s, self._ticks_total
        self.sink.put(
            EventRecord(
                t_s=clock.now_s(),
                utc_s=self._utc0_s + clock.now_s() - t0,
                kind=EventKind.RUN_START,
                elapsed_s=0.0,
                detail=f"{len(self._chambers)} chambers, tick {period:g} s",
            )
        )
        k = 0
        while k < total:
            due = t0 + k * period
            await clock.sleep_until(due)
            now = clock.now_s()
            if now - due >= period:  # whole periods missed: run the latest due tick only
                behind = math.floor((now - due) / period)
                if k + behind >= total:
                    self._counter.missed += total - k
                    break
                self._counter.missed += behind
                k += behind
                due = t0 + k * period
            self._counter.add(now - due)
            await self._tick(k, now)
            k += 1
        await clock.sleep_until(t0 + self.compiled.duration_s)
        for task in self._tasks:
            task.cancel()

    async def _read_all(self, now: float) -> dict[str, ChamberReadings]:
        """Read every chamber concurrently; whatever has not answered by the read timeout,
        or failed, is stale. One deadline bounds every read of the tick."""
        io = self.io
        found: dict[str, ChamberReadings] = {}

        async def one(chamber: str) -> None:
            try:
                found[chamber] = await io.read(chamber)
            except Exception as error:  # a driver bug or transport error: stale, never fatal
                self._failure(chamber, "read", error)

        try:
            async with asyncio.timeout(self.plan.settings.read_timeout_s):
                async with asyncio.TaskGroup() as group:
                    for chamber in self._chambers:
                        group.create_task(one(chamber))
        except TimeoutError:
            pass
        for chamber in self._chambers:
            if chamber not in found:
                self._failure(chamber, "read", None)
                found[chamber] = stale_readings(chamber, now)
            else:
                self._failure(chamber, "read", False)
        return found

    async def _write_all(self, outputs: Mapping[str, Outputs]) -> dict[str, bool]:
        """Write every chamber concurrently under one deadline; a timeout or error is a
        failed write."""
        io = self.io
        done: dict[str, bool] = {}

        async def one(chamber: str, value: Outputs) -> None:
            try:
                done[chamber] = bool(await io.write(chamber, value))
            except Exception as error:
                self._failure(chamber, "write", error)

        try:
            async with asyncio.timeout(self.plan.settings.write_timeout_s):
                async with asyncio.TaskGroup() as group:
                    for chamber, value in outputs.items():
                        group.create_task(one(chamber, value))
        except TimeoutError:
            pass
        for chamber in outputs:
            ok = done.setdefault(chamber, False)
            self._failure(chamber, "write", None if not ok else False)
        return done

    def _failure(self, chamber: str, what: str, error: BaseException | bool | None) -> None:
        """Log the first failure of a streak (and its end) once, not every tick.

        ``error`` is the exception, None for a timeout or refusal, False for success.
        """
        key = (chamber, what)
        failing = key in self._failing
        if error is False:
            if failing:
                self._failing.discard(key)
                _log.info("%s: %s works again", chamber, what)
            return
        if failing:
            return
        self._failing.add(key)
        if isinstance(error, BaseException):
            _log.error("%s: %s failed: %r", chamber, what, error, exc_info=error)
        else:
            _log.warning("%s: %s got no answer (timed out or refused)", chamber, what)

    async def _tick(self, k: int, now: float) -> None:
        elapsed = now - self._t0_s
        utc_s = self._utc0_s + elapsed
        phase, targets = self._table.at(k)
        readings = await self._read_all(now)
        decision = self.decider.decide(readings, targets, now)
        written = await self._write_all(decision.writes)
        for chamber, ok in written.items():
            self.decider.note_write(chamber, ok)
        sink = self.sink
        if phase != self._phase:
            sink.put(
                EventRecord(
                    t_s=now,
                    utc_s=utc_s,
                    kind=EventKind.PHASE_CHANGE,
                    elapsed_s=elapsed,
                    phase=phase,
                )
            )
            self._phase = phase
        for chamber, event in decision.events:
            record = alarm_record(chamber, event, utc_s + (event.t_s - now))
            if record is not None:
                sink.put(record)
                if record.action.value == "raise":
                    self._alarms.append((chamber, record.code))
        rows: list[SampleRow] = []
        holding = self._holding
        for chamber in self._chambers:
            reading, target, chosen = (
                readings[chamber],
                targets[chamber],
                decision.chambers[chamber],
            )
            out = chosen.outputs
            alarm = None if chosen.alarm is None else chosen.alarm.value
            if alarm is None:
                holding.pop(chamber, None)
            else:
                holding[chamber] = alarm
            rows.append(
                SampleRow(
                    t_s=now,
                    utc_s=utc_s,
                    elapsed_s=elapsed,
                    chamber=chamber,
                    phase=phase,
                    temperature_c=reading.temperature_c,
                    temperature_setpoint_c=target.temperature_c,
                    par=reading.par,
                    par_setpoint=target.par,
                    flow_cm_s=reading.flow_cm_s,
                    flow_setpoint_cm_s=target.flow_cm_s,
                    o2_umol_l=reading.o2_umol_l,
                    o2_sat_pct=reading.o2_sat_pct,
                    heater_pct=out.heater_pct,
                    chiller_pct=out.chiller_pct,
                    lamp_pct=out.lamp_pct,
                    pump_pct=out.pump_pct,
                    incubation=IncubationState.OPEN if out.pump_pct > 0 else IncubationState.CLOSED,
                    alarm=alarm,
                )
            )
        sink.put(rows)
        if self.progress is not None:
            self.progress(
                TickStatus(
                    tick=k,
                    ticks_total=self._ticks_total,
                    elapsed_s=elapsed,
                    duration_s=self.compiled.duration_s,
                    phase=phase,
                    utc=self.clock.utc(now),
                    alarms=dict(holding),
                )
            )
