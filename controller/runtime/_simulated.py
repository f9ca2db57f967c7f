"""Run a protocol on an in-process simulated rack: files in, a finished run log out.

Rules of this module
--------------------
- Every problem in the protocol, the rig, a CSV they name, the log path or the protocol's fit
  to the rig is a :class:`~controller.errors.SquallError` located in its file (exit 2 at the
  CLI), raised before anything is created on disk.
- The run's start: ``start_utc`` if given, else the protocol's ``begins`` date-time, else now
  (to the second). The simulated clock, the rack and the compiled protocol share it.
- A log is never overwritten; the default is ``runs/<protocol stem>-<UTC launch time>.sqlite``
  in the working folder.
- The simulated I/O modules keep the rig's ``[io]`` settings where it has them (optode
  cadence, device watchdog; default three tick periods).
- :class:`SimulatedRun` exposes the assembled pieces (clock, rack, I/O, plan, writer) so tests
  and benchmarks can inject faults or wrap the I/O before running.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from controller.clock import Clock, VirtualClock, run_with_clock
from controller.errors import SquallError
from controller.files import load_model, locate, parse_toml, read_text, validate_data
from controller.protocol import CompiledProtocol, Protocol, Severity, compile_protocol
from controller.rig import Rig
from controller.runtime._io import ChamberIO
from controller.runtime._loop import ControlLoop, RunSummary, TickStatus
from controller.runtime._settings import ControlPlan, RunSettings, plan_control
from controller.runtime._sim_io import SimulatedIO
from controller.storage import ChamberRecord, ClockKind, RunLogWriter, RunMeta
from simulator import Rack

__all__ = [
    "RunInputs",
    "SimulatedRun",
    "create_run_log",
    "default_log_path",
    "load_run_inputs",
    "run_simulated",
]


@dataclass(frozen=True, kw_only=True)
class RunInputs:
    """A protocol and a rig, validated, compiled and checked against each other.

    Attributes
    ----------
    protocol_path, rig_path
        The files as named.
    protocol_text, rig_text
        Their text (stored in the run log).
    rig
        The validated rig.
    compiled
        The protocol compiled from the run's start (rig findings attached).
    """

    protocol_path: Path
    rig_path: Path
    protocol_text: str
    rig_text: str
    rig: Rig
    compiled: CompiledProtocol


def load_run_inputs(
    protocol_path: Path, rig_path: Path, start_utc: datetime | None = None
) -> RunInputs:
    """Read, validate, compile and check a protocol against a rig.

    Parameters
    ----------
    protocol_path
        Protocol file (TOML).
    rig_path
        Rig file (TOML).
    start_utc
        Elapsed time 0, aware; default the protocol's ``begins``, else now (whole seconds).

    Returns
    -------
    RunInputs
        Everything a run needs from the two files.

    Raises
    ------
    SquallError
        Located in the protocol or rig file: invalid files, CSVs that do not cover the
        protocol, or a protocol the rig cannot run (the first error finding, with the count
        of the others).
    """
    protocol_path, rig_path = Path(protocol_path), Path(rig_path)
    rig = load_model(rig_path, Rig)
    rig_text = read_text(rig_path)
    text = read_text(protocol_path)
    protocol = validate_data(
        parse_toml(text, file=protocol_path), Protocol, text=text, file=protocol_path
    )
    if start_utc is None:
        if isinstance(protocol.begins, datetime):
            start_utc = protocol.begins
        else:
            start_utc = datetime.now(UTC).replace(microsecond=0)
    elif start_utc.tzinfo is None or start_utc.utcoffset() is None:
        raise SquallError("the start time needs a zone (e.g. 2027-07-10T08:00:00+00:00)")
    try:
        compiled = compile_protocol(
            protocol, start_utc=start_utc.astimezone(UTC), base_dir=protocol_path.parent, rig=rig
        )
    except SquallError as exc:
        raise locate(exc, text=text, file=protocol_path) from None
    errors = [f for f in compiled.findings if f.severity is Severity.ERROR]
    if errors:
        first = errors[0]
        more = f" (and {len(errors) - 1} more; see 'squall check')" if len(errors) > 1 else ""
        problem = SquallError(
            f"the rig {rig.name!r} cannot run this protocol: {first.message}{more}",
            field=first.field,
        )
        if first.field is None:
            raise SquallError(problem.message, file=protocol_path)
        raise locate(problem, text=text, file=protocol_path)
    return RunInputs(
        protocol_path=protocol_path,
        rig_path=rig_path,
        protocol_text=text,
        rig_text=rig_text,
        rig=rig,
        compiled=compiled,
    )


def default_log_path(protocol_path: Path, launched_utc: datetime | None = None) -> Path:
    """``runs/<protocol stem>-<UTC launch time>.sqlite`` in the working folder.

    Parameters
    ----------
    protocol_path
        The protocol file.
    launched_utc
        Launch time, aware; default now.

    Returns
    -------
    Path
        The default log path (relative).
    """
    when = launched_utc or datetime.now(UTC)
    stamp = when.astimezone(UTC).strftime("%Y%m%dT%H%M%SZ")
    return Path("runs") / f"{Path(protocol_path).stem}-{stamp}.sqlite"


def create_run_log(
    inputs: RunInputs,
    plan: ControlPlan,
    log_path: Path,
    *,
    clock_kind: ClockKind,
    commit_interval_s: float,
) -> RunLogWriter:
    """Create the run log of a run (simulated or on hardware), its folder if needed.

    Parameters
    ----------
    inputs
        Protocol and rig (their text is stored in the log).
    plan
        The control plan; its chambers are the run's.
    log_path
        The log file; an existing file is never overwritten.
    clock_kind
        Real or virtual clock.
    commit_interval_s
        Commit interval in clock time, s.

    Returns
    -------
    RunLogWriter
        The open writer (the control loop finishes it).
    """
    path = Path(log_path)
    if path.exists():
        raise SquallError("a file already exists there; refusing to overwrite it", file=path)
    meta = RunMeta(
        run_id=path.stem,
        protocol_text=inputs.protocol_text,
        rig_text=inputs.rig_text,
        start_utc_s=inputs.compiled.start_utc.timestamp(),
        clock_kind=clock_kind,
        chambers=tuple(
            ChamberRecord(
                chamber=c.id,
                water_volume_l=c.water_volume_l,
                sediment_area_m2=c.sediment_area_m2,
                bath=c.bath,
            )
            for c in inputs.rig.chambers
            if c.id in plan.chambers
        ),
    )
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise SquallError(f"cannot create the log folder: {exc.strerror}", file=path) from exc
    return RunLogWriter(path, meta=meta, commit_interval_s=commit_interval_s)


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
    """

    inputs: RunInputs
    plan: ControlPlan
    clock: VirtualClock
    rack: Rack
    io: SimulatedIO
    writer: RunLogWriter

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
        compiled, rig = inputs.compiled, inputs.rig
        plan = plan_control(rig, compiled.chambers, settings)
        clock = VirtualClock(compiled.start_utc, speed)
        rack = Rack(rig, seed=seed, start_utc=compiled.start_utc)
        step_s = settings.period_s if speed is None else None
        safe = {c: cs.interlocks.safe_outputs() for c, cs in plan.chambers.items()}
        wiring = rig.io  # the rig's [io] settings apply to its simulated modules too
        watchdog_s = wiring.watchdog_timeout_s if wiring is not None else None
        io = SimulatedIO(
            rack,
            clock,
            step_s=step_s,
            optode_period_s=wiring.optode_period_s if wiring is not None else 30.0,
            watchdog_s=watchdog_s or 3.0 * settings.period_s,
            safe=safe,
        )
        writer = create_run_log(
            inputs,
            plan,
            log_path,
            clock_kind=ClockKind.VIRTUAL,
            commit_interval_s=settings.commit_interval_for(speed),
        )
        return cls(inputs=inputs, plan=plan, clock=clock, rack=rack, io=io, writer=writer)

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
        )

    def run(self, progress: Callable[[TickStatus], None] | None = None) -> RunSummary:
        """Run the protocol to its end on the virtual clock.

        Parameters
        ----------
        progress
            Called after every tick.

        Returns
        -------
        RunSummary
            How the run went; the log is finished.
        """
        loop = self.loop(progress=progress)

        async def main(_clock: Clock) -> RunSummary:
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
