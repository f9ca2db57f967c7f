"""Small invented rigs and protocols for the runtime tests (TOML text), and a driver that runs
a prepared simulated run with timed actions.

The rig has a shared bath (``A1``, ``A2`` in ``tank``) and a chamber with its own water
(``B``); each test picks the chambers it needs, since a one-chamber run is quickest. All
numbers are invented but plausible for small benthic chambers.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Sequence
from pathlib import Path

from controller.clock import Clock, run_with_clock
from controller.runtime import ChamberIO, RunSummary, SimulatedRun

BATH = """
[[baths]]
id = "tank"
water_volume_l = 40.0
salinity = 30.0

[baths.thermal]
ua_w_k = 15.0
heater_max_w = 800.0
chiller_max_w = 600.0
dead_time_s = 15.0
"""

CHAMBER = """
[[chambers]]
id = "{cid}"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0
{bath}
[chambers.limits]
min_temperature_c = {t_min}
max_temperature_c = {t_max}
max_ramp_c_per_h = 3.0
max_par = 800.0
max_flow_cm_s = 15.0

[chambers.sim]
initial_temperature_c = {init_c}

[chambers.sim.sensors]
temperature_noise_c = 0.01
temperature_tau_s = 5.0

[chambers.sim.lamp]
par_at_full_drive = 700.0
warmup_tau_s = 60.0

[chambers.sim.pump]
dead_band_pct = 6.0
flow_at_full_drive_cm_s = 14.0
flush_at_full_drive_l_h = 20.0
{thermal}"""

OWN_THERMAL = """
[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = 400.0
chiller_max_w = 300.0
dead_time_s = 10.0
"""


def rig_text(
    chambers: Sequence[str] = ("B",),
    *,
    room_c: float = 18.0,
    t_min: float = 10.0,
    t_max: float = 26.0,
    initial_c: float = 20.0,
) -> str:
    """TOML of the test rig with the chosen chambers (A1, A2 share a bath; B has its own)."""
    parts = [
        'name = "runtime test rack"\n',
        f"[sim]\nroom_temperature_c = {room_c}\nphysics_step_s = 1.0\nseed = 3\n"
        "level_alarm_loss_pct = 5.0\n",
    ]
    if any(c.startswith("A") for c in chambers):
        parts.append(BATH)
    for cid in chambers:
        in_bath = cid.startswith("A")
        parts.append(
            CHAMBER.format(
                cid=cid,
                bath='bath = "tank"' if in_bath else "",
                t_min=t_min,
                t_max=t_max,
                thermal="" if in_bath else OWN_THERMAL,
                init_c=initial_c,
            )
        )
    return "".join(parts)


def protocol_text(
    chambers: Sequence[str] = ("B",),
    *,
    hours: float = 2.0,
    temperature_c: float = 20.0,
    ramp_to_c: float | None = None,
    par: float = 300.0,
    flow_cm_s: float = 4.0,
) -> str:
    """TOML of a protocol: hold ``temperature_c`` (light and flow on), then optionally ramp
    at 1 °C/h to ``ramp_to_c`` and hold, for ``hours`` in all."""
    ids = ", ".join(f'"{c}"' for c in chambers)
    text = f"""format = "squall-protocol/1"
title = "Runtime test"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = [{ids}]
"""
    if ramp_to_c is None:
        text += f"""
[[phases]]
name = "hold"
duration = "{hours * 60:g}min"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = {temperature_c} }} ]
  light = [ {{ kind = "hold", value = {par} }} ]
  flow = [ {{ kind = "hold", value = {flow_cm_s} }} ]
"""
    else:
        first = hours / 2
        text += f"""
[[phases]]
name = "hold"
duration = "{first * 60:g}min"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = {temperature_c} }} ]
  light = [ {{ kind = "hold", value = 0.0, duration = "1h" }}, {{ kind = "hold", value = {par} }} ]
  flow = [ {{ kind = "hold", value = {flow_cm_s} }} ]

[[phases]]
name = "ramp"
duration = "{(hours - first) * 60:g}min"
  [phases.programs]
  temperature = [
    {{ kind = "ramp", to = {ramp_to_c}, rate_per_h = 1.0 }},
    {{ kind = "hold", value = {ramp_to_c} }},
  ]
  light = [ {{ kind = "hold", value = 0.0 }} ]
"""
    return text


Files = Callable[..., tuple[Path, Path, Path]]
"""The ``files`` fixture: writes a rig and a protocol, returns (protocol, rig, log path)."""

Action = tuple[float, Callable[[SimulatedRun], object]]


def drive(
    run: SimulatedRun,
    *,
    at: Sequence[Action] = (),
    io: ChamberIO | None = None,
) -> RunSummary:
    """Run ``run`` on its virtual clock, calling each ``(t_s, action(run))`` at clock time t_s.

    Parameters
    ----------
    run
        A prepared simulated run.
    at
        Actions during the run (press an E-stop, look at the rack ...).
    io
        Chamber I/O to use instead of the run's own (a wrapper around it).

    Returns
    -------
    RunSummary
        The loop's summary (exceptions from the loop propagate).
    """
    loop = run.loop(io=io)

    async def act(t_s: float, action: Callable[[SimulatedRun], object]) -> None:
        await run.clock.sleep_until(t_s)
        action(run)

    async def main(clock: Clock) -> RunSummary:
        try:
            async with asyncio.TaskGroup() as group:
                for t_s, action in at:
                    group.create_task(act(t_s, action))
                return await loop.run()
        except BaseExceptionGroup as group_error:
            if len(group_error.exceptions) == 1:  # the loop's own error, not a test bug
                raise group_error.exceptions[0] from None
            raise

    try:
        return run_with_clock(run.clock, main)
    finally:
        if not run.writer.closed:
            run.writer.close()
