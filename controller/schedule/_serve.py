"""``squall serve``: run a rig's schedule unattended, one experiment after another.

Rules of this module
--------------------
- One serve per rig: serve holds the rig's lock (:class:`~controller.runtime.RigLock`,
  ``<rig file>.lock``) from start to end, with or without ``--sim``; a second serve (or a
  ``squall run`` on the rig's devices) is refused with one line. A rehearsal
  (``--sim`` on a copy of the schedule, :mod:`._rehearsal`) drives no device and writes no
  shared schedule, so it does not take the lock (``hold_rig=False``) and can run beside the
  rig's real serve.
- Everything waits on one clock. Without ``--sim`` that is the real clock and the runs drive
  the rig's devices; with ``--sim`` it is one :class:`~controller.clock.VirtualClock` for the
  whole serve (autojump, or ``speed`` times real time) starting at the present (or an
  injected start), so a week of schedule passes in seconds with the same code. Every
  simulated run gets a fresh simulated rack at its start, as ``squall run --sim`` does.
- The loop: wait for the rig's earliest planned experiment whose start has come
  (:meth:`ScheduleStore.due`), move it to *preflight*, check it
  (:func:`~controller.schedule._preflight.preflight`), then either *refuse* it — findings
  in its history, an alarm in serve's log and output — or move it to *running* with its run
  log, run the protocol snapshot the store keeps (never the file as it is now) to its end,
  and record *done*, or *aborted* after an operator abort (``squall ctl``) or a run-time
  failure. A hold through ``squall ctl`` shows as *held* in the store until resumed. A
  start that has passed (serve was down, or the previous run overran) is not skipped: the
  experiment starts as soon as serve gets to it, with the delay in its history.
- Telemetry: a run publishes over MQTT as ``squall run`` does when the rig file has a
  ``[telemetry]`` table (samples, alarms, events, status and the experiment's operator
  tasks; remote commands where enabled), for as long as it runs. A simulated serve as fast
  as possible does not publish (its clock jumps over the broker's answers) and says so.
- Run logs: ``<id>-<protocol stem>.sqlite`` in the schedule file's folder (default
  ``runs/``), never overwritten (``-2``, ``-3``… when taken); each has its control socket
  for ``squall ctl``.
- Latched trips: the rig's previous run log (latest experiment of the rig that has one) is
  read by the preflight; an unacknowledged latching trip on a chamber of the experiment
  refuses it. Moving a refused experiment of the rig back into the schedule (``squall
  schedule move``, after that run ended) is the operator's acknowledgment: from then on that
  log's latches no longer count.
- When serve starts, experiments of the rig left behind by a serve that stopped are settled:
  *preflight* goes back to *planned*; *running*/*held* becomes *done* or *aborted* from its
  log's end, or *aborted* when the log is unfinished (``squall run --resume LOG`` can
  continue it outside the schedule).
- ``until``: no experiment starts at or after it; a run in progress then still runs to its
  end. With ``--sim`` and no ``until`` serve ends when no planned experiment of the rig is
  left; without ``--sim`` it polls the store every ``poll_s`` for new experiments until
  stopped (Ctrl-C makes the running run's outputs safe and records it *aborted*).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING

from controller.errors import SquallError
from controller.schedule import ExperimentState, format_when
from controller.schedule._serve_jobs import Job, prepare_job, run_telemetry

if TYPE_CHECKING:
    from controller.clock import Clock
    from controller.rig import Rig
    from controller.runtime import (
        ControlLoop,
        RigLock,
        RunSettings,
        RunSummary,
        TickStatus,
    )
    from controller.schedule import Experiment, ScheduleStore
    from controller.storage import RunLogWriter

__all__ = ["ServeConfig", "ServeResult", "serve"]

_log = logging.getLogger(__name__)

_S = ExperimentState
_REASON_MAX = 500
"""Longest reason the store keeps, characters."""


@dataclass(frozen=True, kw_only=True)
class ServeConfig:
    """What ``squall serve`` was asked to do.

    Attributes
    ----------
    rig_path
        The rig file (no unit).
    schedule_path
        The schedule store (must exist) (no unit).
    sim
        Simulate the rig's chambers on a virtual clock instead of driving its devices.
    speed
        With ``sim``: None for as fast as possible, else simulated s per real s.
    until_utc
        Start nothing at or after this instant, aware; None for no limit.
    for_s
        Alternatively, serve for this long from the clock's start, s.
    start_utc
        With ``sim``: the virtual clock's start, aware; default the present (whole seconds).
    settings
        Control settings of every run (tick period…); default :class:`RunSettings` (no unit).
    seed
        With ``sim``: sensor-noise seed, dimensionless; default the rig's.
    poll_s
        Without ``sim``: how often the store is looked at for new experiments, s.
    by
        Name serve signs the history with (no unit).
    hold_rig
        Hold the rig's lock; only a simulated serve may leave it (a rehearsal on a copy of
        the schedule).
    """

    rig_path: Path
    schedule_path: Path
    sim: bool = False
    speed: float | None = None
    until_utc: datetime | None = None
    for_s: float | None = None
    start_utc: datetime | None = None
    settings: RunSettings | None = None
    seed: int | None = None
    poll_s: float = 60.0
    by: str = "serve"
    hold_rig: bool = True


@dataclass(frozen=True)
class ServeResult:
    """What a serve did.

    Attributes
    ----------
    started_utc, stopped_utc
        When serve started and stopped, on its clock, aware UTC.
    outcomes
        ``(experiment id, final state)`` of every experiment it took up, in order (no unit).
    """

    started_utc: datetime
    stopped_utc: datetime
    outcomes: tuple[tuple[str, ExperimentState], ...] = field(default=())


def _clip(text: str) -> str:
    text = " ".join(text.split())
    return text if len(text) <= _REASON_MAX else text[: _REASON_MAX - 1] + "…"


class _Server:
    """The serve loop on one clock, over one store."""

    def __init__(
        self,
        config: ServeConfig,
        rig: Rig,
        store: ScheduleStore,
        clock: Clock,
        until: datetime | None,
        notify: Callable[[str], None],
    ) -> None:
        from controller.runtime import RunSettings

        self.config = config
        self.rig_path = config.rig_path.resolve()
        self.rig = rig
        self.zone = rig.maintenance.timezone
        self.store = store
        self.clock = clock
        self.until = until
        self.notify = notify
        self.settings = config.settings or RunSettings()
        self.outcomes: list[tuple[str, ExperimentState]] = []

    # ------------------------------------------------------------------ helpers
    def _say(self, text: str) -> None:
        stamp = format_when(self.clock.utc(), self.zone)
        self.notify(f"{stamp} {text}")

    def _alarm(self, text: str) -> None:
        _log.error("ALARM %s: %s", self.rig.name, text)
        self._say(f"ALARM: {text}")

    def _move(
        self, exp: Experiment, to: ExperimentState, reason: str, log_path: Path | None = None
    ) -> Experiment:
        return self.store.transition(
            exp.id, to, reason=_clip(reason), by=self.config.by, log_path=log_path
        )

    def _try_move(
        self, exp: Experiment, to: ExperimentState, reason: str, log_path: Path | None = None
    ) -> Experiment | None:
        """Move an experiment serve is about to take up; None when someone changed it
        meanwhile (e.g. cancelled it in another process), which serve then leaves alone."""
        from controller.schedule import ScheduleConflict

        try:
            return self._move(exp, to, reason, log_path)
        except ScheduleConflict:
            now = self.store.get(exp.id).state
            self._say(f"{exp.id} was changed meanwhile (now {now.value}); not taken up")
            return None

    def _refuse(self, exp: Experiment, reason: str) -> None:
        """Refuse an experiment in preflight with an alarm (unless it was changed meanwhile)."""
        if self._try_move(exp, _S.REFUSED, reason) is None:
            return
        self._alarm(f"{exp.id} '{exp.title}' refused: {_clip(reason)}")
        self.outcomes.append((exp.id, _S.REFUSED))

    def _finish(self, exp: Experiment, to: ExperimentState, reason: str) -> None:
        self._move(exp, to, reason)
        self.outcomes.append((exp.id, to))
        self._say(f"{exp.id} {to.value}: {_clip(reason)}")

    async def _sleep_until(self, when: datetime) -> None:
        ahead_s = (when - self.clock.utc()).total_seconds()
        if ahead_s > 0:
            await self.clock.sleep_until(self.clock.now_s() + ahead_s)

    # ------------------------------------------------------------------ the loop
    async def run(self) -> None:
        """Serve until ``until`` (or, simulated, until nothing is planned any more)."""
        self._settle_leftovers()
        store, rig_path = self.store, self.rig_path
        while True:
            now = self.clock.utc()
            if self.until is not None and now >= self.until:
                return
            exp = store.due(rig_path, now)
            if exp is not None:
                await self._take(exp)
                continue
            wake = store.next_start(rig_path)
            if wake is None and self.config.sim and self.until is None:
                return
            if not self.config.sim:
                poll = now + timedelta(seconds=self.config.poll_s)
                wake = poll if wake is None else min(wake, poll)
            if self.until is not None:
                wake = self.until if wake is None else min(wake, self.until)
            assert wake is not None
            await self._sleep_until(wake)

    def _settle_leftovers(self) -> None:
        """Experiments a stopped serve left in preflight, running or held."""
        from controller.storage import RunEndReason, RunLogReader

        left = self.store.experiments(
            rig_path=self.rig_path, states=[_S.PREFLIGHT, _S.RUNNING, _S.HELD]
        )
        for exp in left:
            if exp.state is _S.PREFLIGHT:
                self._move(exp, _S.PLANNED, "serve stopped before the preflight decided")
                continue
            end = None
            if exp.log_path is not None and exp.log_path.exists():
                try:
                    with RunLogReader(exp.log_path) as reader:
                        end = reader.info().end
                except SquallError:
                    end = None
            if end is not None and end.end_reason is RunEndReason.COMPLETED:
                self._finish(exp, _S.DONE, "the run's log says it completed")
            elif end is not None:
                self._finish(exp, _S.ABORTED, f"the run's log says it {end.end_reason.value}")
            else:
                self._finish(
                    exp,
                    _S.ABORTED,
                    f"serve stopped while it ran; its log {exp.log_path} is unfinished "
                    "('squall run --resume LOG' continues it outside the schedule)",
                )

    # ------------------------------------------------------------------ one experiment
    async def _take(self, exp: Experiment) -> None:
        from controller.runtime import create_run_log
        from controller.runtime._ctl_server import run_with_control
        from controller.runtime._ctl_wire import control_path
        from controller.schedule._preflight import preflight
        from controller.storage import ClockKind

        late_s = (self.clock.utc() - exp.start_utc).total_seconds()
        why = f"start due {format_when(exp.start_utc, self.zone)}"
        if late_s >= 60.0:
            why += f", {late_s / 60.0:.0f} min late"
        moved = self._try_move(exp, _S.PREFLIGHT, why)
        if moved is None:
            return
        exp = moved
        self._say(f"{exp.id} preflight ({why})")
        try:
            job = self._prepare(exp)
        except SquallError as exc:
            self._refuse(exp, f"cannot start: {exc.one_line()}")
            return
        ranges = {
            c: (cs.interlocks.sensor_min_c, cs.interlocks.sensor_max_c)
            for c, cs in job.plan.chambers.items()
        }
        report = await preflight(
            self.rig,
            exp.chambers,
            job.make_io(),
            now_utc=self.clock.utc(),
            probe_ranges_c=ranges,
            last_log=self._latched_log(exp),
            ready_timeout_s=self.settings.ready_timeout_s,
        )
        if not report.passed:
            self._refuse(exp, report.summary())
            return
        log_path = self._log_path(exp)
        moved = self._try_move(exp, _S.RUNNING, report.summary(), log_path=log_path)
        if moved is None:
            return
        exp = moved
        speed = self.config.speed if self.config.sim else 1.0
        try:
            writer = create_run_log(
                job.inputs,
                job.plan,
                log_path,
                clock_kind=ClockKind.VIRTUAL if self.config.sim else ClockKind.REAL,
                commit_interval_s=self.settings.commit_interval_for(speed),
            )
        except SquallError as exc:
            self._alarm(f"{exp.id} cannot start: {exc.one_line()}")
            self._finish(exp, _S.ABORTED, f"cannot create the run log: {exc.one_line()}")
            return
        self._say(f"{exp.id} running '{exp.title}' on {', '.join(exp.chambers)}; log {log_path}")
        loop = self._loop(job, writer, exp)

        def with_control(loop: ControlLoop) -> Awaitable[RunSummary]:
            return run_with_control(loop, control_path(log_path))

        try:
            link = run_telemetry(
                job,
                writer,
                exp,
                clock=self.clock,
                rig_path=self.rig_path,
                paced=not (self.config.sim and self.config.speed is None),
                say=self._say,
            )
            if link is None:
                summary: RunSummary = await with_control(loop)
            else:
                summary = await link.run(loop, with_control)
        except Exception as error:
            self._alarm(f"{exp.id} run failed: {type(error).__name__}: {error}")
            self._finish(
                self.store.get(exp.id),
                _S.ABORTED,
                f"the run failed ({type(error).__name__}: {error}); outputs were made safe",
            )
            return
        except BaseException:  # serve stopped (Ctrl-C, cancellation): the loop made it safe
            self._finish(
                self.store.get(exp.id),
                _S.ABORTED,
                "serve was stopped during the run; outputs were made safe",
            )
            raise
        finally:
            if not writer.closed:
                writer.close()
        self._settle_run(self.store.get(exp.id), summary)

    def _settle_run(self, exp: Experiment, summary: RunSummary) -> None:
        from controller.protocol import format_duration
        from controller.storage import RunEndReason

        alarms = f", {len(summary.alarms)} alarms raised" if summary.alarms else ""
        if summary.end_reason is RunEndReason.COMPLETED:
            text = (
                f"completed: {format_duration(summary.run_s)}, {summary.rows_written} rows{alarms}"
            )
            self._finish(exp, _S.DONE, text)
        elif summary.end_reason is RunEndReason.ABORTED:
            self._finish(exp, _S.ABORTED, f"{summary.detail or 'aborted'}{alarms}")
        else:
            detail = f" ({summary.detail})" if summary.detail else ""
            self._finish(exp, _S.ABORTED, f"{summary.end_reason.value}{detail}{alarms}")

    def _loop(self, job: Job, writer: RunLogWriter, exp: Experiment) -> ControlLoop:
        """The control loop of a job; holds through ``squall ctl`` show in the store.

        A hold freezes protocol time, so the loop is asked whether it is held only when a
        tick's protocol time did not advance (or while the store says held)."""
        from controller.runtime import ControlLoop

        last_elapsed: list[float | None] = [None]
        state = [_S.RUNNING]

        def progress(status: TickStatus) -> None:
            frozen = status.elapsed_s == last_elapsed[0]
            last_elapsed[0] = status.elapsed_s
            if not frozen and state[0] is not _S.HELD:
                return
            held = bool(loop.status()["held"])
            if held and state[0] is _S.RUNNING:
                self._move(exp, _S.HELD, "held by an operator (squall ctl)")
                state[0] = _S.HELD
            elif not held and state[0] is _S.HELD:
                self._move(exp, _S.RUNNING, "resumed by an operator (squall ctl)")
                state[0] = _S.RUNNING

        loop = ControlLoop(
            io=job.make_io(),
            clock=self.clock,
            compiled=job.inputs.compiled,
            plan=job.plan,
            writer=writer,
            progress=progress,
        )
        return loop

    def _prepare(self, exp: Experiment) -> Job:
        """Validate and compile the snapshot against the rig file as it is now."""
        job = prepare_job(
            exp,
            rig_path=self.rig_path,
            clock=self.clock,
            settings=self.settings,
            sim=self.config.sim,
            speed=self.config.speed,
            seed=self.config.seed,
        )
        self.rig = job.inputs.rig  # the rig file as it stands (calibration dates may be new)
        return job

    def _log_path(self, exp: Experiment) -> Path:
        folder = self.config.schedule_path.resolve().parent
        stem = f"{exp.id}-{exp.protocol_path.stem}"
        path = folder / f"{stem}.sqlite"
        n = 2
        while path.exists():
            path = folder / f"{stem}-{n}.sqlite"
            n += 1
        return path

    def _latched_log(self, exp: Experiment) -> Path | None:
        """The rig's previous run log whose latched trips still count, or None."""
        runs = [
            e
            for e in self.store.experiments(rig_path=self.rig_path)
            if e.id != exp.id and e.log_path is not None and e.log_path.exists()
        ]
        if not runs:
            return None
        previous = max(runs, key=lambda e: (e.start_utc, e.id))
        ended = self.store.history(previous.id)[-1].time_utc
        for other in self.store.experiments(rig_path=self.rig_path):
            for entry in self.store.history(other.id):
                if (
                    entry.from_state is _S.REFUSED
                    and entry.to_state is _S.PLANNED
                    and entry.time_utc >= ended
                ):
                    return None  # re-planned after a refusal: the operator has seen to it
        return previous.log_path


def _lock(rig_path: Path) -> RigLock:
    from controller.runtime import RigLock

    try:
        return RigLock(rig_path)
    except SquallError as exc:
        raise SquallError(
            f"{exc.message}; only one 'squall serve' (or 'squall run' on the devices) may "
            "hold a rig",
            file=rig_path,
        ) from None


def serve(config: ServeConfig, *, notify: Callable[[str], None] | None = None) -> ServeResult:
    """Run a rig's schedule: preflight and start each planned experiment when it is due.

    Parameters
    ----------
    config
        Rig, schedule, clock and limits (no unit).
    notify
        Called with one line (prefixed with the time) at every state change and alarm;
        default: logged at INFO (no unit).

    Returns
    -------
    ServeResult
        When serve ran and what became of each experiment it took up (no unit).

    Raises
    ------
    SquallError
        A bad rig file, a missing schedule, a zone-less or bad time, or the rig held by
        another serve or controller (nothing is changed then).
    """
    from controller.clock import RealClock, VirtualClock, run_with_clock
    from controller.files import load_model
    from controller.rig import Rig
    from controller.schedule import ScheduleStore

    rig_path = Path(config.rig_path).resolve()
    rig = load_model(rig_path, Rig)
    schedule = Path(config.schedule_path)
    if not schedule.is_file():
        raise SquallError(
            "no schedule here; add experiments with 'squall schedule add' first", file=schedule
        )
    for name, moment in (("--until", config.until_utc), ("start_utc", config.start_utc)):
        if moment is not None and (moment.tzinfo is None or moment.utcoffset() is None):
            raise SquallError(f"{moment.isoformat()} has no zone; add one", field=name)
    if config.for_s is not None and not (math.isfinite(config.for_s) and config.for_s > 0):
        raise SquallError(f"must be a duration above 0, got {config.for_s!r} s", field="--for")
    if not config.sim and (config.speed is not None or config.start_utc is not None):
        raise SquallError("--speed applies to a simulated serve only (add --sim)", field="--speed")
    lock = _lock(rig_path) if config.hold_rig or not config.sim else None
    try:
        clock: RealClock | VirtualClock
        if config.sim:
            start = config.start_utc or datetime.now(UTC).replace(microsecond=0)
            clock = VirtualClock(start, config.speed)
        else:
            clock = RealClock()
        started = clock.utc()
        until = config.until_utc
        if config.for_s is not None:
            limit = started + timedelta(seconds=config.for_s)
            until = limit if until is None else min(until, limit)
        say = notify or (lambda text: _log.info("%s", text))
        with ScheduleStore(schedule, now=lambda: clock.utc()) as store:
            server = _Server(config, rig, store, clock, until, say)

            async def main(_clock: Clock) -> None:
                await server.run()

            run_with_clock(clock, main)
            return ServeResult(started, clock.utc(), tuple(server.outcomes))
    finally:
        if lock is not None:
            lock.release()
