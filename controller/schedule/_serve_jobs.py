"""What ``squall serve`` makes of one experiment before and beside its run: the compiled job
(inputs, control plan, chamber I/O) and its MQTT telemetry link.

Rules of this module
--------------------
- A job is compiled from the protocol snapshot the store keeps, against the rig file as it
  stands at the experiment's start (calibration dates may be newer than at booking).
- Simulated, every run gets a fresh simulated rack started at the clock's present, stepped
  every tick when the clock runs as fast as possible; the rig's ``[io]`` settings (optode
  period, module watchdog) apply to the simulated modules too. On the devices, each call of
  ``make_io`` opens its own connections; problems in the rig's ``[io]`` table are found
  when the job is made, before the preflight.
- Telemetry: a run publishes as ``squall run`` does when the rig has a ``[telemetry]`` table,
  with the experiment's id on its operator tasks; a run on an unpaced clock does not, and the
  serve's output says so.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from controller.errors import SquallError

if TYPE_CHECKING:
    from controller.clock import Clock
    from controller.runtime import ChamberIO, ControlPlan, RunInputs, RunSettings
    from controller.runtime._telemetry_link import TelemetryLink
    from controller.schedule import Experiment
    from controller.storage import RunLogWriter

__all__ = ["Job", "prepare_job", "run_telemetry"]


@dataclass(kw_only=True)
class Job:
    """One experiment made ready to run.

    Attributes
    ----------
    inputs
        Protocol snapshot and rig, validated and compiled (no unit).
    plan
        The control plan (no unit).
    make_io
        Makes the chamber I/O of the run (preflight and run each make their own) (no unit).
    """

    inputs: RunInputs
    plan: ControlPlan
    make_io: Callable[[], ChamberIO]


def prepare_job(
    exp: Experiment,
    *,
    rig_path: Path,
    clock: Clock,
    settings: RunSettings,
    sim: bool,
    speed: float | None,
    seed: int | None,
) -> Job:
    """Validate and compile an experiment's snapshot against the rig file as it is now.

    Parameters
    ----------
    exp
        The experiment (its protocol snapshot) (no unit).
    rig_path
        The rig file, absolute (no unit).
    clock
        Serve's clock; its present is the run's start (no unit).
    settings
        Control settings of the run (no unit).
    sim
        Simulate the chambers instead of driving the devices.
    speed
        With ``sim``: None for as fast as possible, else simulated s per real s.
    seed
        With ``sim``: sensor-noise seed, dimensionless; None for the rig's.

    Returns
    -------
    Job
        The job.

    Raises
    ------
    SquallError
        Located in the protocol snapshot or the rig file.
    """
    from controller.files import read_text
    from controller.runtime import inputs_from_text, plan_control

    rig_text = read_text(rig_path)
    inputs = inputs_from_text(
        protocol_text=exp.protocol_text,
        protocol_file=exp.protocol_path,
        protocol_dir=exp.protocol_path.parent,
        rig_text=rig_text,
        rig_file=rig_path,
        start_utc=clock.utc().replace(microsecond=0),
    )
    plan = plan_control(inputs.rig, inputs.compiled.chambers, settings, inputs.incubation)
    if sim:
        make = _sim_io(inputs, plan, clock, speed=speed, seed=seed)
    else:
        make = _hardware_io(inputs, plan, clock, rig_path)
    return Job(inputs=inputs, plan=plan, make_io=make)


def _sim_io(
    inputs: RunInputs, plan: ControlPlan, clock: Clock, *, speed: float | None, seed: int | None
) -> Callable[[], ChamberIO]:
    """A fresh simulated rack for the run; every I/O made is a view of it."""
    from controller.runtime._simulated import simulated_io
    from simulator import Rack

    rack = Rack(inputs.rig, seed=seed, start_utc=clock.utc())

    def make() -> ChamberIO:
        return simulated_io(rack, clock, inputs, plan, speed)

    return make


def _hardware_io(
    inputs: RunInputs, plan: ControlPlan, clock: Clock, rig_path: Path
) -> Callable[[], ChamberIO]:
    """The rig's devices; each call opens its own connections."""
    from controller.files import locate
    from controller.runtime import HardwareIO

    def make() -> ChamberIO:
        try:
            return HardwareIO.from_rig(inputs.rig, clock, base_dir=rig_path.parent, plan=plan)
        except SquallError as exc:
            raise locate(exc, text=inputs.rig_text, file=inputs.rig_path) from None

    make()  # problems with the [io] table refuse the experiment before preflight
    return make


def run_telemetry(
    job: Job,
    writer: RunLogWriter,
    exp: Experiment,
    *,
    clock: Clock,
    rig_path: Path,
    paced: bool,
    say: Callable[[str], None],
) -> TelemetryLink | None:
    """The run's MQTT link when the rig file has a ``[telemetry]`` table, as for ``run``.

    Parameters
    ----------
    job
        The experiment's job (no unit).
    writer
        The run's log (its name is the published run id) (no unit).
    exp
        The experiment (its title and id) (no unit).
    clock
        Serve's clock (no unit).
    rig_path
        The rig file; relative password and TLS files are in its folder (no unit).
    paced
        False on a simulated clock as fast as possible: nothing is published.
    say
        Told, in one line, that the run publishes or why it does not (no unit).

    Returns
    -------
    TelemetryLink or None
        The link, its operator tasks handed over, not yet running; None without telemetry.

    Raises
    ------
    SquallError
        The password file cannot be read.
    """
    from controller.runtime._telemetry_link import run_tasks, telemetry_link

    inputs = job.inputs
    config = inputs.rig.telemetry
    link = telemetry_link(
        config,
        clock=clock,
        run_id=writer.meta.run_id,
        protocol=exp.title,
        chambers=tuple(job.plan.chambers),
        duration_s=inputs.compiled.duration_s,
        period_s=job.plan.settings.period_s,
        base_dir=rig_path.parent,
        paced=paced,
        notice=lambda text: say(f"{exp.id} {text}"),
    )
    if link is not None and config is not None:
        link.publish_tasks(run_tasks(inputs, experiment_id=exp.id))
        say(f"{exp.id} publishing as {config.controller_id} to {config.address}")
    return link
