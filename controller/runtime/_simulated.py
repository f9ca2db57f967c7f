"""Run a protocol on an in-process simulated rack: files in, a finished run log out.

Rules of this module
--------------------
- Inputs and the run log come from :mod:`._inputs`: every problem is a located
  :class:`~controller.errors.SquallError` raised before anything is created on disk, and a
  log is never overwritten.
- The run's start: ``start_utc`` if given, else the protocol's ``begins`` date-time, else now
  (to the second). The simulated clock, the rack and the compiled protocol share it.
- The simulated I/O modules keep the rig's ``[io]`` settings where it has them (optode
  cadence, device watchdog; default three tick periods).
- A resumed simulated run (:meth:`SimulatedRun.resume`) starts a fresh rack, its wall clock
  at the log's last sample plus the real time the run was down.
- :class:`SimulatedRun` exposes the assembled pieces (clock, rack, I/O, plan, writer) so tests
  and benchmarks can inject faults or wrap the I/O before running.
"""

from __future__ import annotations

import math
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

from controller.clock import Clock, VirtualClock, run_with_clock
from controller.errors import SquallError
from controller.runtime._inputs import (
    RunInputs,
    create_run_log,
    default_log_path,
    load_run_inputs,
    open_resumed,
    resumed_inputs,
)
from controller.runtime._io import ChamberIO
from controller.runtime._launch import check_resumable, last_written_utc_s
from controller.runtime._loop import ControlLoop, RunSummary, TickStatus
from controller.runtime._protocol_clock import StartPoint
from controller.runtime._settings import ControlPlan, RunSettings, plan_control
from controller.runtime._sim_io import SimulatedIO
from controller.storage import ClockKind, RunLogWriter
from simulator import Rack

__all__ = ["SimulatedRun", "run_simulated", "simulated_io"]


def simulated_io(
    rack: Rack, clock: Clock, inputs: RunInputs, plan: ControlPlan, speed: float | None
) -> SimulatedIO:
    """The chamber I/O of a simulated run: a view of ``rack`` on ``clock``.

    Parameters
    ----------
    rack
        The simulated rack (no unit).
    clock
        The run's clock (no unit).
    inputs
        The run's protocol and rig; the rig's ``[io]`` settings (optode cadence, module
        watchdog) apply to its simulated modules too (no unit).
    plan
        The control plan (tick period, safe outputs) (no unit).
    speed
        None for as fast as possible (the rack is then stepped every tick), else simulated
        s per real s.

    Returns
    -------
    SimulatedIO
        The I/O.
    """
    settings, wiring = plan.settings, inputs.rig.io
    return SimulatedIO(
        rack,
        clock,
        step_s=settings.period_s if speed is None else None,
        optode_period_s=wiring.optode_period_s if wiring is not None else 30.0,
        watchdog_s=(wiring.watchdog_timeout_s if wiring is not None else None)
        or 3.0 * settings.period_s,
        safe={c: cs.interlocks.safe_outputs() for c, cs in plan.chambers.items()},
    )


@dataclass(kw_only=True)
class SimulatedRun:
    """A protocol ready to run on a simulated rack (created by :meth:`prepare`).

    Attributes
    ----------
    inputs
        The protocol and rig.
    plan
        The control plan.
    clock
        The virtual clock (start = the protocol's start).
    rack
        The simulated rack.
    io
        Chamber I/O over the rack.
    writer
        The open run-log writer.
    start
        Where protocol time starts (a resumed run's position and hold).
    """

    inputs: RunInputs
    plan: ControlPlan
    clock: VirtualClock
    rack: Rack
    io: SimulatedIO
    writer: RunLogWriter
    start: StartPoint = field(default_factory=StartPoint)

    @classmethod
    def prepare(
        cls,
        protocol_path: Path,
        rig_path: Path,
        log_path: Path | None = None,
        *,
        speed: float | None = None,
        start_utc: datetime | None = None,
        settings: RunSettings | None = None,
        seed: int | None = None,
    ) -> SimulatedRun:
        """Load, check and assemble everything; create the run log.

        Parameters
        ----------
        protocol_path
            Protocol file (TOML).
        rig_path
            Rig file (TOML) with the simulator parameters.
        log_path
            Run log to create; default :func:`default_log_path`. Never overwritten.
        speed
            None: as fast as possible (the clock jumps to the next deadline); otherwise
            simulated seconds per real second, above 0.
        start_utc
            Start of the run, aware; default the protocol's ``begins``, else now.
        settings
            Run-wide control settings; default :class:`RunSettings`.
        seed
            Sensor-noise seed, dimensionless; default the rig's.

        Returns
        -------
        SimulatedRun
            Ready to :meth:`run`.
        """
        if speed is not None and not (math.isfinite(speed) and speed > 0):
            raise SquallError(f"speed must be a number above 0, got {speed!r}", field="--speed")
        inputs = load_run_inputs(protocol_path, rig_path, start_utc)
        path = Path(log_path) if log_path is not None else default_log_path(protocol_path)
        return cls.assemble(inputs, path, speed=speed, settings=settings, seed=seed)

    @classmethod
    def assemble(
        cls,
        inputs: RunInputs,
        log_path: Path,
        *,
        speed: float | None = None,
        settings: RunSettings | None = None,
        seed: int | None = None,
    ) -> SimulatedRun:
        """Assemble a run from inputs already loaded (or built in code); create the log.

        Parameters
        ----------
        inputs
            Protocol and rig, compiled and checked.
        log_path
            Run log to create; never overwritten.
        speed
            None: as fast as possible; otherwise simulated seconds per real second.
        settings
            Run-wide control settings; default :class:`RunSettings`.
        seed
            Sensor-noise seed, dimensionless; default the rig's.

        Returns
        -------
        SimulatedRun
            Ready to :meth:`run`.
        """
        settings = settings or RunSettings()
        plan = plan_control(inputs.rig, inputs.compiled.chambers, settings, inputs.incubation)
        writer = create_run_log(
            inputs,
            plan,
            log_path,
            clock_kind=ClockKind.VIRTUAL,
            commit_interval_s=settings.commit_interval_for(speed),
        )
        return cls._build(inputs, plan, writer, inputs.compiled.start_utc, speed, seed)

    @classmethod
    def _build(
        cls,
        inputs: RunInputs,
        plan: ControlPlan,
        writer: RunLogWriter,
        clock_start: datetime,
        speed: float | None,
        seed: int | None,
        start: StartPoint | None = None,
    ) -> SimulatedRun:
        """The clock, rack and I/O of a run whose log is open."""
        clock = VirtualClock(clock_start, speed)
        rack = Rack(inputs.rig, seed=seed, start_utc=clock_start)
        io = simulated_io(rack, clock, inputs, plan, speed)
        return cls(
            inputs=inputs,
            plan=plan,
            clock=clock,
            rack=rack,
            io=io,
            writer=writer,
            start=start or StartPoint(),
        )

    @classmethod
    def resume(
        cls,
        log_path: Path,
        *,
        speed: float | None = None,
        settings_for: Callable[[float], RunSettings] | None = None,
        seed: int | None = None,
    ) -> SimulatedRun:
        """Continue an interrupted simulated run from its log.

        Parameters
        ----------
        log_path
            The interrupted run log; protocol and rig come from its text.
        speed
            None: as fast as possible; otherwise simulated seconds per real second.
        settings_for
            Builds the run settings from the original tick period (s); default
            ``RunSettings(period_s=...)``.
        seed
            Sensor-noise seed, dimensionless; default the rig's.

        Returns
        -------
        SimulatedRun
            Ready to :meth:`run`, appending to the log.

        Notes
        -----
        A simulated rack lives only while its run does: the resumed rack starts afresh from
        the rig's initial state. Its wall clock resumes at the log's last sample plus the
        real time since the log was last written (at least one tick), as if the simulated
        chambers had gone on in real time meanwhile; the protocol position follows from that
        (or stays put if the run was held).
        """
        log_path = Path(log_path)
        if speed is not None and not (math.isfinite(speed) and speed > 0):
            raise SquallError(f"speed must be a number above 0, got {speed!r}", field="--speed")
        written_utc_s = last_written_utc_s(log_path)  # before reading opens the -wal file
        meta, launch = check_resumable(log_path)
        if not launch.simulated:
            raise SquallError(
                "this run drove the rig's devices, not a simulation: resume it without --sim",
                file=log_path,
            )
        inputs = resumed_inputs(log_path, meta, launch)
        settings = (settings_for or _period_settings)(launch.period_s)
        plan = plan_control(inputs.rig, inputs.compiled.chambers, settings, inputs.incubation)
        down_s = max(settings.period_s, time.time() - written_utc_s)
        writer, point = open_resumed(log_path, inputs, plan, settings.commit_interval_for(speed))
        try:
            last_utc = point.last_utc_s if point.last_utc_s is not None else meta.start_utc_s
            clock_start = datetime.fromtimestamp(last_utc + down_s, tz=UTC)
            start = StartPoint(
                elapsed_s=point.last_elapsed_s or 0.0, held=point.held, last_utc_s=last_utc
            )
            return cls._build(inputs, plan, writer, clock_start, speed, seed, start)
        except BaseException:
            writer.close()
            raise

    def loop(
        self,
        *,
        io: ChamberIO | None = None,
        progress: Callable[[TickStatus], None] | None = None,
    ) -> ControlLoop:
        """The control loop of this run.

        Parameters
        ----------
        io
            Chamber I/O to use instead of :attr:`io` (e.g. a wrapper around it).
        progress
            Called after every tick.

        Returns
        -------
        ControlLoop
            Not yet started; ``await loop.run()`` inside the clock's loop.
        """
        return ControlLoop(
            io=io or self.io,
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
        runner: Callable[[ControlLoop], Awaitable[RunSummary]] | None = None,
    ) -> RunSummary:
        """Run the protocol to its end on the virtual clock.

        Parameters
        ----------
        progress
            Called after every tick.
        loop
            The control loop to run (from :meth:`loop`, e.g. to reach its operator hooks);
            default a new one with ``progress``.
        runner
            Runs the loop inside the clock's event loop (e.g. with the control socket open);
            default ``loop.run()``.

        Returns
        -------
        RunSummary
            How the run went; the log is finished.
        """
        loop = loop or self.loop(progress=progress)

        async def main(_clock: Clock) -> RunSummary:
            if runner is not None:
                return await runner(loop)
            return await loop.run()

        try:
            return run_with_clock(self.clock, main)
        finally:
            if not self.writer.closed:
                self.writer.close()


def run_simulated(
    protocol_path: Path,
    rig_path: Path,
    log_path: Path | None = None,
    *,
    speed: float | None = None,
    start_utc: datetime | None = None,
    settings: RunSettings | None = None,
    progress: Callable[[TickStatus], None] | None = None,
) -> RunSummary:
    """Run a protocol on an in-process simulated rack and write its run log.

    Parameters
    ----------
    protocol_path
        Protocol file (TOML).
    rig_path
        Rig file (TOML).
    log_path
        Run log to create; default ``runs/<protocol stem>-<UTC launch time>.sqlite``.
    speed
        None for as fast as possible, else simulated seconds per real second.
    start_utc
        Start of the run, aware; default the protocol's ``begins``, else now.
    settings
        Run-wide control settings.
    progress
        Called after every tick with a :class:`TickStatus`.

    Returns
    -------
    RunSummary
        How the run went, with the log's path.
    """
    run = SimulatedRun.prepare(
        protocol_path, rig_path, log_path, speed=speed, start_utc=start_utc, settings=settings
    )
    return run.run(progress)


def _period_settings(period_s: float) -> RunSettings:
    """Default run settings with a given tick period."""
    return RunSettings(period_s=period_s)
