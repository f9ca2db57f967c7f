"""Run a protocol on the rig's devices (or the simulator's endpoints) in real time.

Rules of this module
--------------------
- The devices are those of the rig's ``[io]`` table, reached through
  :class:`~controller.runtime._hardware_io.HardwareIO` on a monotonic real-time clock. The
  same code drives a real rack and ``squall simulate`` on loopback endpoints.
- Everything that can be checked is checked before anything is locked or written: the files,
  the ``[io]`` table and its ports file, the start time (a run on devices starts when it is
  launched, so a protocol whose ``begins`` is more than a minute away from now is refused).
- One controller per rig (:class:`~controller.runtime._launch.RigLock` on
  ``<rig file>.lock``) and one writer per log (the log's own lock), both held until the run
  has ended; a second controller is refused with one line.
- Resuming (:meth:`HardwareRun.resume`) takes protocol and rig from the log's text, the
  rig's folder and the tick period from its launch record; protocol time continues at the
  wall clock's position (or stays put if the run was held).
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

from controller.clock import Clock, RealClock, run_with_clock
from controller.errors import SquallError
from controller.files import locate
from controller.runtime._hardware_io import HardwareIO
from controller.runtime._inputs import (
    RunInputs,
    create_run_log,
    default_log_path,
    load_run_inputs,
    open_resumed,
    resumed_inputs,
)
from controller.runtime._launch import RigLock, check_resumable
from controller.runtime._loop import ControlLoop, RunSummary, TickStatus
from controller.runtime._protocol_clock import StartPoint
from controller.runtime._settings import ControlPlan, RunSettings, plan_control
from controller.storage import ClockKind, RunLogWriter

__all__ = ["START_TOLERANCE_S", "HardwareRun"]

START_TOLERANCE_S = 60.0
"""Largest distance of a hardware run's protocol start from the launch time, s."""

Runner = Callable[[ControlLoop], Awaitable[RunSummary]]
"""Runs a control loop to its end (e.g. with the control socket open around it)."""


def _run_loop(loop: ControlLoop) -> Awaitable[RunSummary]:
    return loop.run()


def _devices(inputs: RunInputs, clock: RealClock, base_dir: Path, plan: ControlPlan) -> HardwareIO:
    """The rig's devices; problems with its ``[io]`` table are located in the rig text."""
    try:
        return HardwareIO.from_rig(inputs.rig, clock, base_dir=base_dir, plan=plan)
    except SquallError as exc:
        raise locate(exc, text=inputs.rig_text, file=inputs.rig_path) from None


@dataclass(kw_only=True)
class HardwareRun:
    """A protocol ready to run on the rig's devices (from :meth:`prepare` or :meth:`resume`).

    Attributes
    ----------
    inputs
        The protocol and rig.
    plan
        The control plan.
    clock
        The real-time clock.
    io
        The devices.
    writer
        The open run-log writer.
    lock
        The rig's lock, held until the run ends.
    start
        Where protocol time starts (a resumed run's position and hold).
    """

    inputs: RunInputs
    plan: ControlPlan
    clock: RealClock
    io: HardwareIO
    writer: RunLogWriter
    lock: RigLock
    start: StartPoint = field(default_factory=StartPoint)

    @classmethod
    def prepare(
        cls,
        protocol_path: Path,
        rig_path: Path,
        log_path: Path | None = None,
        *,
        start_utc: datetime | None = None,
        settings: RunSettings | None = None,
    ) -> HardwareRun:
        """Check everything, lock the rig, create the run log.

        Parameters
        ----------
        protocol_path
            Protocol file (TOML).
        rig_path
            Rig file (TOML) with an ``[io]`` table.
        log_path
            Run log to create; default ``runs/<protocol stem>-<UTC launch time>.sqlite``.
        start_utc
            The protocol's start, aware; default its ``begins``, else now. Must lie within
            :data:`START_TOLERANCE_S` of now.
        settings
            Run-wide control settings; default :class:`RunSettings`.

        Returns
        -------
        HardwareRun
            Ready to :meth:`run`.
        """
        settings = settings or RunSettings()
        protocol_path, rig_path = Path(protocol_path), Path(rig_path)
        inputs = load_run_inputs(protocol_path, rig_path, start_utc)
        now = datetime.now(UTC)
        offset_s = (inputs.compiled.start_utc - now).total_seconds()
        if abs(offset_s) > START_TOLERANCE_S:
            raise SquallError(
                f"a run on the rig's devices starts when launched ({now:%Y-%m-%d %H:%M:%S} "
                f"UTC), but this one would start the protocol at "
                f"{inputs.compiled.start_utc:%Y-%m-%d %H:%M:%S} UTC; use begins = "
                '"on-launch" (or a --start within a minute of now)',
                file=protocol_path,
            )
        plan = plan_control(inputs.rig, inputs.compiled.chambers, settings, inputs.incubation)
        clock = RealClock()
        io = _devices(inputs, clock, rig_path.parent, plan)
        lock = RigLock(rig_path)
        try:
            writer = create_run_log(
                inputs,
                plan,
                Path(log_path) if log_path is not None else default_log_path(protocol_path),
                clock_kind=ClockKind.REAL,
                commit_interval_s=settings.commit_interval_for(1.0),
            )
        except BaseException:
            lock.release()
            raise
        return cls(inputs=inputs, plan=plan, clock=clock, io=io, writer=writer, lock=lock)

    @classmethod
    def resume(
        cls,
        log_path: Path,
        *,
        settings_for: Callable[[float], RunSettings] | None = None,
    ) -> HardwareRun:
        """Continue an interrupted run on the rig's devices from its log.

        Parameters
        ----------
        log_path
            The interrupted run log; protocol and rig come from its text.
        settings_for
            Builds the run settings from the original tick period (s); default
            ``RunSettings(period_s=...)``.

        Returns
        -------
        HardwareRun
            Ready to :meth:`run`, appending to the log.
        """
        log_path = Path(log_path)
        meta, launch = check_resumable(log_path)
        if launch.simulated:
            raise SquallError(
                "this run was simulated in the controller's process: resume it with --sim",
                file=log_path,
            )
        inputs = resumed_inputs(log_path, meta, launch)
        settings = (
            settings_for(launch.period_s)
            if settings_for is not None
            else RunSettings(period_s=launch.period_s)
        )
        plan = plan_control(inputs.rig, inputs.compiled.chambers, settings, inputs.incubation)
        clock = RealClock()
        io = _devices(inputs, clock, launch.rig_path.parent, plan)
        lock = RigLock(launch.rig_path)
        try:
            writer, point = open_resumed(log_path, inputs, plan, settings.commit_interval_for(1.0))
            last_utc = point.last_utc_s if point.last_utc_s is not None else meta.start_utc_s
            now_utc = clock.utc(0.0).timestamp()
            if now_utc <= last_utc:
                writer.close()
                raise SquallError(
                    f"the system clock ({clock.utc(0.0):%Y-%m-%d %H:%M:%S} UTC) is not after "
                    "the log's last sample; check the system time before resuming",
                    file=log_path,
                )
        except BaseException:
            lock.release()
            raise
        start = StartPoint(
            elapsed_s=point.last_elapsed_s or 0.0, held=point.held, last_utc_s=last_utc
        )
        return cls(
            inputs=inputs,
            plan=plan,
            clock=clock,
            io=io,
            writer=writer,
            lock=lock,
            start=start,
        )

    def loop(self, *, progress: Callable[[TickStatus], None] | None = None) -> ControlLoop:
        """The control loop of this run.

        Parameters
        ----------
        progress
            Called after every tick.

        Returns
        -------
        ControlLoop
            Not yet started.
        """
        return ControlLoop(
            io=self.io,
            clock=self.clock,
            compiled=self.inputs.compiled,
            plan=self.plan,
            writer=self.writer,
            progress=progress,
            start=self.start,
        )

    def run(
        self,
        progress: Callable[[TickStatus], None] | None = None,
        *,
        loop: ControlLoop | None = None,
        runner: Runner | None = None,
    ) -> RunSummary:
        """Run to the end in real time; release the log and the rig however it ends.

        Parameters
        ----------
        progress
            Called after every tick.
        loop
            The control loop to run; default a new one with ``progress``.
        runner
            Runs the loop inside the clock's event loop (e.g. with the control socket open);
            default ``loop.run()``.

        Returns
        -------
        RunSummary
            How the run went; the log is finished.
        """
        loop = loop or self.loop(progress=progress)
        run = runner or _run_loop

        async def main(_clock: Clock) -> RunSummary:
            return await run(loop)

        try:
            return run_with_clock(self.clock, main)
        finally:
            if not self.writer.closed:
                self.writer.close()
            self.lock.release()
