"""The control loop: a fixed-period tick on the clock, supervised, failing safe.

Rules of this module
--------------------
- Supervision: one ``asyncio.TaskGroup`` runs the chamber I/O's background task, the logger
  task and the control task. If any of them fails, the group cancels the others; whatever
  happens (completion, abort, error, cancellation), a shielded shutdown path then writes
  safe outputs to every chamber, ends any closed incubation window and closes the run log
  with how the run ended. ``CancelledError`` is never swallowed: after the shutdown it
  propagates. (The one cancellation the loop takes back is its own: an operator's abort
  wakes the control task from its wait for the next tick.)
- Ticks: tick k is due at ``start + k·period`` on the clock, so lateness never accumulates
  into drift. A late tick runs at once and is counted; when whole periods were missed the
  loop skips to the latest due tick and counts the skipped ones, never running a backlog.
- Two times: clock time (when) and protocol time (where the run stands in the protocol,
  :class:`~controller.runtime._protocol_clock.ProtocolClock`). They advance together until
  an operator holds (protocol time stops, setpoints are kept), resumes or skips
  (:mod:`._operator`), or a resumed run starts at the protocol time the wall clock has
  reached. A tick's setpoints are those at the protocol time its due time maps to; the run
  ends when that reaches the protocol's duration.
- One tick: read every chamber concurrently (every read bounded by the tick's read deadline,
  so one slow device does not hold up the others; what has not answered by then is stale;
  I/O that can answer every chamber at once without waiting, :class:`ImmediateIO` such as
  the in-process simulation, is asked so first, with the same results and no task per
  chamber, after a turn of the event loop unless the virtual clock's loop has nothing else
  due at that instant),
  decide (:class:`~controller.runtime._decide.Decider`: interlocks, incubation cycles,
  setpoints, PID, lamps, pumps), write every chamber concurrently, queue one log row per
  protocol chamber, the alarms and the windows that ended, then report progress. Log rows
  carry the readings as read (None when stale), the protocol's setpoints (what the
  experiment asks, not the rate-limited value the PID follows), the outputs decided and the
  incubation status (chambers without a cycle: open while their pump runs).
- Outputs start safe: before the first tick every chamber is sent its safe state (idle
  chambers: everything off), and the interlocks hold chambers safe until their first healthy
  tick. A resumed run records the gap (event ``gap``) before its first tick.
"""

from __future__ import annotations

import asyncio
import logging
import math
from collections.abc import Callable, Coroutine, Mapping, Sequence
from typing import Any, Protocol, TypeVar, runtime_checkable

from controller.clock import Clock, VirtualTimeEventLoop
from controller.control import Outputs, WindowEnd
from controller.errors import RuntimeFailure
from controller.protocol import CompiledProtocol, format_duration
from controller.runtime._decide import OFF, Decider, Schedule
from controller.runtime._io import ChamberIO, ChamberReadings, stale_readings
from controller.runtime._logsink import LogSink, alarm_record, tick_values
from controller.runtime._operator import OperatorHooks, RunState
from controller.runtime._protocol_clock import ProtocolClock, StartPoint
from controller.runtime._setpoints import Lookahead, SetpointTable
from controller.runtime._settings import ControlPlan
from controller.runtime._summary import RunSummary, TickCounter, TickStats, TickStatus
from controller.storage import (
    EventKind,
    EventRecord,
    RunEnd,
    RunEndReason,
    RunLogWriter,
)

__all__ = ["ControlLoop", "ImmediateIO", "RunSummary", "TickStats", "TickStatus"]

_log = logging.getLogger(__name__)
_T = TypeVar("_T")


@runtime_checkable
class ImmediateIO(Protocol):
    """Chamber I/O that can serve a whole tick's reads or writes at once (in-process
    simulation): same results as its per-chamber calls in that order, no task per chamber.
    Either method returns None, having done nothing, when some device would make the caller
    wait; the loop then goes chamber by chamber."""

    def read_now(self, chambers: Sequence[str]) -> Mapping[str, ChamberReadings | Exception] | None:
        """Readings (or the read's exception) per chamber, or None."""
        ...

    def write_now(self, outputs: Mapping[str, Outputs]) -> Mapping[str, bool | Exception] | None:
        """Whether each command was taken (or the write's exception), or None."""
        ...


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


class ControlLoop(OperatorHooks):
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
        Control plan of the rig for this protocol (with its incubation cycles).
    writer
        Open run-log writer (new, or resumed); the loop finishes it.
    progress
        Called after every tick with a :class:`TickStatus`; must be quick.
    start
        Where protocol time starts (0 s and running for a new run; for a resumed run the
        protocol time the wall clock has reached, held if the run was held, and the gap).

    Notes
    -----
    Operators command a running loop with :meth:`hold`, :meth:`resume`, :meth:`skip_to`,
    :meth:`abort`, :meth:`ack`, :meth:`note` and read it with :meth:`status`
    (:class:`~controller.runtime._operator.OperatorHooks`).
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
        start: StartPoint | None = None,
    ) -> None:
        self.io = io
        self.clock = clock
        self.compiled = compiled
        self.plan = plan
        self.decider = Decider(plan)
        self.sink = LogSink(writer)
        self.progress = progress
        self.start = start or StartPoint()
        settings = plan.settings
        self._chambers = tuple(plan.chambers)
        self._chamber_set = frozenset(self._chambers)
        # every write of the last tick taken: the decider (told only by note_write) holds that
        # already, so a tick whose writes all go through again need not say it; a failure clears it
        self._writes_ok = False
        self._table = SetpointTable(compiled, self._chambers, settings.period_s)
        self._ahead = Lookahead(
            compiled,
            tuple(plan.incubation),
            {c: s.light_threshold_par for c, s in plan.incubation.items()},
        )
        self._counter = TickCounter(settings.lateness_limit_s)
        self._ticks_total = max(1, math.ceil(compiled.duration_s / settings.period_s - 1e-9))
        self._alarms: list[tuple[str, str]] = []
        self._holding: dict[str, str] = {}
        self._phase: str | None = None
        self._tasks: list[asyncio.Task[None]] = []
        self._failing: set[tuple[str, str]] = set()
        self._t0_s = 0.0
        self._utc0_s = 0.0
        self._pclock: ProtocolClock | None = None
        self._state = RunState.STARTING
        self._latest_values: Sequence[tuple[Any, ...]] = ()
        self._abort_by: str | None = None
        self._windows = 0
        self._sleeping = False
        self._control_task: asyncio.Task[None] | None = None
        self._now_io: ImmediateIO | None = io if isinstance(io, ImmediateIO) else None
        self._quiet: Callable[[], bool] | None = None  # the loop has nothing else due now
        self.done = asyncio.Event()
        """Set once the run has ended: outputs safe, log finished (or closed)."""

    # ------------------------------------------------------------------ supervision
    async def run(self) -> RunSummary:
        """Run the protocol to its end (or until an abort, an error or a cancellation).

        Returns
        -------
        RunSummary
            How the run went (on completion or abort; otherwise the error propagates after
            the shutdown path has made every chamber safe and closed the log).
        """
        clock = self.clock
        loop = asyncio.get_running_loop()
        self._quiet = loop.nothing_due_now if isinstance(loop, VirtualTimeEventLoop) else None
        self._t0_s = clock.now_s()
        self._utc0_s = clock.utc(self._t0_s).timestamp()
        self._pclock = ProtocolClock(
            self._t0_s, self.start.elapsed_at(self._utc0_s), held=self.start.held
        )
        reason, detail = RunEndReason.ABORTED, ""
        try:
            async with self.io:
                try:
                    ready = asyncio.Event()
                    async with asyncio.TaskGroup() as group:
                        self._tasks = [
                            group.create_task(self.io.run(ready), name="chamber-io"),
                            group.create_task(self.sink.run(), name="run-log"),
                        ]
                        self._control_task = group.create_task(self._control(ready), name="control")
                    if self._abort_by is None:
                        reason = RunEndReason.COMPLETED
                    else:
                        reason, detail = RunEndReason.ABORTED, f"aborted by {self._abort_by}"
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
                    self._state = RunState.STOPPING
                    await _shielded(self._shutdown(reason, detail))
        finally:
            self._state = RunState.FINISHED
            self.done.set()
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
            windows=self._windows,
        )

    async def _shutdown(self, reason: RunEndReason, detail: str) -> None:
        """Write safe outputs everywhere (lowered by any active trip's own safe state), end
        the closed windows, then record the end and close the log. Never raises."""
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
            utc_s = self._utc_of(t_s)
            why = WindowEnd.OPERATOR if self._abort_by is not None else WindowEnd.RUN_END
            self._record_windows(self.decider.end_windows(t_s, why, f"run {reason.value}"))
            kind = EventKind.RUN_STOP if reason is not RunEndReason.ABORTED else EventKind.ABORT
            note = f"safe outputs written; {reason.value}"
            if failed:
                note += f"; safe outputs not confirmed for {', '.join(failed)}"
            if detail:
                note += f"; {detail}"
            elapsed = None if self._pclock is None else self._pclock.elapsed(t_s)
            sink.put(
                EventRecord(
                    t_s=t_s,
                    utc_s=utc_s,
                    kind=kind,
                    elapsed_s=None if elapsed is None else min(elapsed, self.compiled.duration_s),
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
    async def _nap(self, t_s: float) -> bool:
        """Sleep until clock time ``t_s``; False when an abort came first (or meanwhile)."""
        if self._abort_by is not None:
            return False
        self._sleeping = True
        try:
            await self.clock.sleep_until(t_s)
        except asyncio.CancelledError:
            task = asyncio.current_task()
            # only the abort's own cancellation is taken back; any other one propagates
            if self._abort_by is None or task is None or task.uncancel() > 0:
                raise
        finally:
            self._sleeping = False
        return self._abort_by is None

    async def _begin(self, ready: asyncio.Event) -> None:
        """Wait for the devices, send every chamber its safe state, record the start."""
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
        now = clock.now_s()
        assert self._pclock is not None
        elapsed = self._pclock.elapsed(now)
        point = self.start
        if point.last_utc_s is None:
            self.sink.put(
                EventRecord(
                    t_s=now,
                    utc_s=self._utc_of(now),
                    kind=EventKind.RUN_START,
                    elapsed_s=elapsed,
                    detail=f"{len(self._chambers)} chambers, tick {settings.period_s:g} s",
                )
            )
        else:
            how = (
                "the run was held: protocol time kept"
                if point.held
                else "protocol time moved on with the wall clock"
            )
            gap_s = max(0.0, self._utc_of(now) - point.last_utc_s)
            self.sink.put(
                EventRecord(
                    t_s=now,
                    utc_s=self._utc_of(now),
                    kind=EventKind.GAP,
                    elapsed_s=elapsed,
                    duration_s=gap_s,
                    detail=f"no data for {format_duration(gap_s)} (controller down); {how}; "
                    f"resumed at +{format_duration(elapsed)}",
                )
            )
        self._state = RunState.HELD if point.held else RunState.RUNNING

    async def _control(self, ready: asyncio.Event) -> None:
        await self._begin(ready)
        clock = self.clock
        assert self._pclock is not None
        pclock = self._pclock
        t0, period = self._t0_s, self.plan.settings.period_s
        end_s = self.compiled.duration_s - 1e-9 * period
        k = 0
        while await self._nap(t0 + k * period):
            due = t0 + k * period
            now = clock.now_s()
            if now - due >= period:  # whole periods missed: run the latest due tick only
                behind = math.floor((now - due) / period)
                self._counter.missed += behind
                k += behind
                due = t0 + k * period
            elapsed_due = pclock.elapsed(due)
            if elapsed_due >= end_s:
                break
            self._counter.add(now - due)
            # protocol time at ``now``: that of the due time when the tick is on time
            elapsed = elapsed_due if now == due else pclock.elapsed(now)
            await self._tick(k, now, elapsed_due, elapsed)
            k += 1
        if self._abort_by is None:
            finish = pclock.clock_time_of(self.compiled.duration_s)
            if math.isfinite(finish):
                await self._nap(finish)
        for task in self._tasks:
            task.cancel()

    async def _read_all(self, now: float) -> Mapping[str, ChamberReadings]:
        """Read every chamber concurrently; whatever has not answered by the read timeout,
        or failed, is stale. One deadline bounds every read of the tick. I/O that can answer
        every read at once (:class:`ImmediateIO`) is asked so first."""
        if self._turn_first():
            await asyncio.sleep(0)
        now_io = self._now_io
        got = None if now_io is None else self._ask(now_io.read_now, self._chambers)
        if got is not None and not self._failing and got.keys() == self._chamber_set:
            if all(type(value) is ChamberReadings for value in got.values()):
                return got  # type: ignore[return-value]  # all read: nothing to note
        found: dict[str, ChamberReadings] = {}
        if got is not None:
            for chamber, value in got.items():
                if isinstance(value, ChamberReadings):
                    found[chamber] = value
                else:
                    self._failure(chamber, "read", value)
        else:
            io = self.io

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
        failing = self._failing
        for chamber in self._chambers:
            if chamber not in found:
                self._failure(chamber, "read", None)
                found[chamber] = stale_readings(chamber, now)
            elif failing:  # (a success only ends a streak)
                self._failure(chamber, "read", False)
        return found

    async def _write_all(self, outputs: Mapping[str, Outputs]) -> Mapping[str, bool]:
        """Write every chamber concurrently under one deadline; a timeout or error is a
        failed write. I/O that can take every write at once (:class:`ImmediateIO`) is
        given them so first."""
        if self._turn_first():
            await asyncio.sleep(0)
        now_io = self._now_io
        got = None if now_io is None else self._ask(now_io.write_now, outputs)
        if got is not None and not self._failing and got.keys() == outputs.keys():
            if all(value is True for value in got.values()):
                return got  # type: ignore[return-value]  # all taken: nothing to note
        done: dict[str, bool] = {}
        if got is not None:
            for chamber, value in got.items():
                if isinstance(value, bool):
                    done[chamber] = value
                else:
                    self._failure(chamber, "write", value)
        else:
            io = self.io

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
        failing = self._failing
        for chamber in outputs:
            if not done.setdefault(chamber, False):
                self._failure(chamber, "write", None)
            elif failing:  # (a success only ends a streak)
                self._failure(chamber, "write", False)
        return done

    def _turn_first(self) -> bool:
        """Whether to let the event loop turn once before asking the :class:`ImmediateIO`.

        Starting a task per chamber did, so what else falls due at this very instant (an
        operator's E-stop, a fault a test injects) still happens before the reads or writes;
        on the virtual clock's loop with nothing else due at this instant the turn would
        change nothing and is skipped. I/O that is not immediate goes chamber by chamber,
        whose tasks turn the loop anyway."""
        return self._now_io is not None and (self._quiet is None or not self._quiet())

    def _ask(
        self, method: Callable[[Any], Mapping[str, _T] | None], arg: Any
    ) -> Mapping[str, _T] | None:
        """What the :class:`ImmediateIO` answers for every chamber at once, or None to go
        chamber by chamber (it cannot, or it failed: then nothing was done, and a failure
        turns the fast path off for the rest of the run)."""
        try:
            return method(arg)
        except Exception:  # a bug in the fast path: the chamber-by-chamber path still works
            _log.exception("reading or writing every chamber at once failed")
            self._now_io = None
            return None

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

    def _schedule(self, phase: str, elapsed_s: float) -> Schedule | None:
        """What the incubation cycles learn about the protocol at protocol time ``elapsed_s``."""
        if not self.plan.incubation:
            return None
        ahead = self._ahead
        return Schedule(
            phase=phase,
            phase_ends_in_s=ahead.phase_ends_in_s(elapsed_s),
            light_change_in_s={
                c: ahead.light_change_in_s(c, elapsed_s) for c in self.plan.incubation
            },
        )

    async def _tick(self, k: int, now: float, elapsed_due: float, elapsed: float) -> None:
        """Tick ``k`` at clock time ``now`` (s), due at protocol time ``elapsed_due`` (s);
        ``elapsed`` is the protocol time at ``now`` (s)."""
        utc_s = self._utc_of(now)
        phase, targets = self._table.at_elapsed(elapsed_due)
        readings = await self._read_all(now)
        decision = self.decider.decide(readings, targets, now, self._schedule(phase, elapsed_due))
        written = await self._write_all(decision.writes)
        taken = all(written.values())
        if not (taken and self._writes_ok):
            note_write = self.decider.note_write
            for chamber, ok in written.items():
                note_write(chamber, ok)
        self._writes_ok = taken
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
        if decision.windows:
            self._record_windows(decision.windows)
        holding = self._holding
        rows = tick_values(
            (now, utc_s, elapsed, phase), self._chambers, readings, targets, decision, holding
        )
        self._latest_values = rows  # nobody changes a tick's rows once made (LogSink)
        sink.put_samples(rows)
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
