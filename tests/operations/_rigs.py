"""Invented rigs and protocols for the long-run operation tests, and a run driver.

The rig is one benthic chamber of the fictional Saltmarrow Lagoon set-up, with a community
about ten times as productive per area as the simulator's default, so closed windows leave
the 80–120 % band within an hour or two by day and by night; its flushing pump exchanges
the chamber's water about three times an hour at the protocol's flow. All numbers are
invented for tests.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Sequence
from pathlib import Path
from types import TracebackType
from typing import Self

from controller.clock import Clock, run_with_clock
from controller.control import Outputs
from controller.runtime import ChamberIO, ChamberReadings, ControlLoop, RunSummary, SimulatedRun

RIG = """name = "Saltmarrow incubation rack"

[sim]
room_temperature_c = 18.0
physics_step_s = 10.0
seed = 11
{chambers}"""

CHAMBER = """
[[chambers]]
id = "{cid}"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0

[chambers.limits]
min_temperature_c = 10.0
max_temperature_c = 26.0
max_ramp_c_per_h = 3.0
max_par = 800.0
max_flow_cm_s = 15.0

[chambers.sim]
initial_temperature_c = 20.0

[chambers.sim.lamp]
par_at_full_drive = 700.0
warmup_tau_s = 60.0

[chambers.sim.pump]
dead_band_pct = 6.0
flow_at_full_drive_cm_s = 14.0
flush_at_full_drive_l_h = 120.0

{biology}
[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = 400.0
chiller_max_w = 300.0
dead_time_s = 10.0
"""

BAND = """
[incubation]
o2_low_pct = 80.0
o2_high_pct = 120.0
min_closed = "20min"
max_closed = "2h"
flush = "30min"
settle = "15min"
"""


PRODUCTIVE = """[chambers.sim.biology]
gpp_max_umol_m2_h = 20000.0
ik_umol_m2_s = 250.0
resp_umol_m2_h = 9000.0
"""
"""A community whose closed windows leave the 80–120 % band within one to two hours."""


def rig_text(chambers: Sequence[str] = ("L1",), *, extra: str = "", productive: bool = True) -> str:
    """TOML of the rig with the given chambers (and extra top-level tables); without
    ``productive`` the chambers keep the simulator's default community (about 3 µmol L⁻¹
    h⁻¹ of O2 change here, so windows run their full length)."""
    biology = PRODUCTIVE if productive else ""
    body = "".join(CHAMBER.format(cid=c, biology=biology) for c in chambers)
    return RIG.format(chambers=body) + extra


def protocol_text(
    chambers: Sequence[str] = ("L1",),
    *,
    phases: Sequence[tuple[str, str]] = (("incubations", "3d"),),
    incubation: str = BAND,
    begins: str = "2027-07-01T00:00:00+00:00",
) -> str:
    """TOML of a protocol: 20 °C, a half-sine day from 06:00 to 18:00 peaking at 600 µmol
    photons m⁻² s⁻¹, 4 cm s⁻¹ of flow, in the given phases, with an incubation table."""
    ids = ", ".join(f'"{c}"' for c in chambers)
    text = f"""format = "squall-protocol/1"
title = "Closed incubations by day and by night"
begins = "{begins}"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = [{ids}]
"""
    for index, (name, duration) in enumerate(phases):
        text += f"""
[[phases]]
name = "{name}"
duration = "{duration}"
"""
        if index == 0:
            text += """  [phases.programs]
  temperature = [ { kind = "hold", value = 20.0 } ]
  light = [ { kind = "daylight", sunrise = "06:00", sunset = "18:00", peak = 600.0 } ]
  flow = [ { kind = "hold", value = 4.0 } ]
"""
        else:
            text += """  [phases.programs]
  temperature = [ { kind = "hold", value = 21.0 } ]
"""
    return text + incubation


def write_files(
    folder: Path, *, rig: str | None = None, protocol: str | None = None
) -> tuple[Path, Path, Path]:
    """Write the rig and protocol into ``folder``; return (protocol, rig, log path)."""
    rig_file = folder / "rig.toml"
    rig_file.write_text(rig if rig is not None else rig_text(), encoding="utf-8")
    protocol_file = folder / "protocol.toml"
    protocol_file.write_text(
        protocol if protocol is not None else protocol_text(), encoding="utf-8"
    )
    return protocol_file, rig_file, folder / "run.sqlite"


class TruthSpy:
    """Chamber I/O around a simulated run's own, noting the rack's true O2 at every read.

    Parameters
    ----------
    run
        The simulated run whose I/O and rack are watched.
    """

    def __init__(self, run: SimulatedRun) -> None:
        self.sim = run
        self.inner = run.io
        self.truth: list[tuple[float, str, float]] = []
        """(clock time s, chamber, true O2 % air saturation) at every read."""
        self.writes: list[tuple[float, str, Outputs]] = []
        """(clock time s, chamber, outputs %) of every write."""

    @property
    def chambers(self) -> tuple[str, ...]:
        return self.inner.chambers

    async def __aenter__(self) -> Self:
        await self.inner.__aenter__()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.inner.__aexit__(exc_type, exc, tb)

    async def run(self, ready: asyncio.Event) -> None:
        await self.inner.run(ready)

    async def read(self, chamber: str) -> ChamberReadings:
        reading = await self.inner.read(chamber)
        now = self.sim.clock.now_s()
        self.truth.append((now, chamber, self.sim.rack.truth(chamber).o2_sat_pct))
        return reading

    async def write(self, chamber: str, outputs: Outputs) -> bool:
        self.writes.append((self.sim.clock.now_s(), chamber, outputs))
        return await self.inner.write(chamber, outputs)


Action = tuple[float, Callable[[ControlLoop], object]]


def drive(
    run: SimulatedRun,
    *,
    at: Sequence[Action] = (),
    io: ChamberIO | None = None,
) -> tuple[RunSummary, ControlLoop]:
    """Run ``run`` on its virtual clock, calling each ``action(loop)`` at clock time t_s.

    Returns
    -------
    tuple
        The summary and the loop (to look at its state after the run).
    """
    loop = run.loop(io=io)

    async def act(t_s: float, action: Callable[[ControlLoop], object]) -> None:
        await run.clock.sleep_until(t_s)
        action(loop)

    async def main(_clock: Clock) -> RunSummary:
        async with asyncio.TaskGroup() as group:
            for t_s, action in at:
                group.create_task(act(t_s, action))
            result = await loop.run()
        return result

    try:
        summary = run_with_clock(run.clock, main)
    finally:
        if not run.writer.closed:
            run.writer.close()
    return summary, loop


class Crash(Exception):
    """Stands for the controller process dying (raised by :func:`crash`)."""


def crash(
    run: SimulatedRun, at_s: float, *, before: Sequence[Action] = (), io: ChamberIO | None = None
) -> ControlLoop:
    """Run ``run`` and let it die at clock time ``at_s`` as a killed process would: no safe
    outputs written by the controller, no end event, records still queued for the log lost,
    the log left unfinished (the rows already handed to SQLite are committed on closing).

    Returns
    -------
    ControlLoop
        The loop that died.
    """

    async def gone(_reason: object, _detail: object) -> None:
        return None

    def die(_loop: ControlLoop) -> None:
        raise Crash

    loop = run.loop(io=io)
    loop._shutdown = gone  # type: ignore[method-assign]

    async def act(t_s: float, action: Callable[[ControlLoop], object]) -> None:
        await run.clock.sleep_until(t_s)
        action(loop)

    async def main(_clock: Clock) -> None:
        async with asyncio.TaskGroup() as group:
            for t_s, action in (*before, (at_s, die)):
                group.create_task(act(t_s, action))
            await loop.run()

    try:
        run_with_clock(run.clock, main)
    except* Crash:
        pass
    finally:
        if not run.writer.closed:
            run.writer.close()
    return loop
