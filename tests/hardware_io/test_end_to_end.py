"""End to end through the real endpoints: the control loop drives HardwareIO, which talks
Modbus TCP on 127.0.0.1 and the optode line over ptys to a simulated rack.

The rig file names its devices only through ``[io] from_announcement``: the very file a user
would point at ``squall simulate --ports-file``. The run uses the runtime's public API
(load_run_inputs, plan_control, create_run_log, ControlLoop) on an autojumping virtual clock.
"""

from __future__ import annotations

import asyncio
from pathlib import Path

import numpy as np
import pytest

from controller.clock import Clock, VirtualClock, run_with_clock
from controller.control import Outputs
from controller.runtime import (
    ControlLoop,
    RunSettings,
    RunSummary,
    create_run_log,
    load_run_inputs,
    plan_control,
)
from controller.runtime._hardware_io import HardwareIO
from controller.storage import ClockKind, EventKind, RunEndReason, RunLogReader
from simulator import Rack
from simulator.endpoints import RackServer

from .conftest import IO_GRACE_S, rig_text

pytestmark = pytest.mark.timeout(60)

IDS = ("c1", "c2")
PERIOD_S = 10.0
PROTOCOL = """format = "squall-protocol/1"
title = "Loopback check"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = ["c1", "c2"]

[[phases]]
name = "warm"
duration = "35min"
  [phases.programs]
  temperature = [
    { kind = "hold", value = 20.0, duration = "10min" },
    { kind = "ramp", to = 20.5, rate_per_h = 1.5 },
    { kind = "hold", value = 20.5 },
  ]
  light = [ { kind = "hold", value = 300.0 } ]
  flow = [ { kind = "hold", value = 4.0 } ]
"""


def run_on_loopback(tmp_path: Path) -> tuple[RunSummary, dict[str, Outputs], dict[str, Outputs]]:
    """Run the protocol; return the summary, the rack's final outputs and the safe outputs."""
    rig_file = tmp_path / "rig.toml"
    rig_file.write_text(rig_text(IDS, io='[io]\nfrom_announcement = "sim-ports.json"\n'))
    protocol_file = tmp_path / "loopback.toml"
    protocol_file.write_text(PROTOCOL)
    inputs = load_run_inputs(protocol_file, rig_file)
    compiled, rig = inputs.compiled, inputs.rig
    settings = RunSettings(period_s=PERIOD_S)
    plan = plan_control(rig, compiled.chambers, settings)
    clock = VirtualClock(compiled.start_utc, io_grace_s=IO_GRACE_S)
    rack = Rack(rig, seed=5, start_utc=compiled.start_utc)
    writer = create_run_log(
        inputs,
        plan,
        tmp_path / "run.sqlite",
        clock_kind=ClockKind.VIRTUAL,
        commit_interval_s=settings.commit_interval_for(None),
    )
    safe = {c: cs.interlocks.safe_outputs() for c, cs in plan.chambers.items()}

    async def main(clock: Clock) -> RunSummary:
        server = RackServer(rack, clock=clock)
        await server.start(ports_file=tmp_path / "sim-ports.json")
        stepper = asyncio.ensure_future(server.run(step_s=PERIOD_S))
        try:
            io = HardwareIO.from_rig(rig, clock, base_dir=tmp_path, plan=plan)
            loop = ControlLoop(io=io, clock=clock, compiled=compiled, plan=plan, writer=writer)
            async with asyncio.timeout(compiled.duration_s + 600.0):
                return await loop.run()
        finally:
            stepper.cancel()
            await asyncio.gather(stepper, return_exceptions=True)
            server.sync()
            await server.stop()

    try:
        summary = run_with_clock(clock, main)
    finally:
        if not writer.closed:
            writer.close()
    final = {}
    for cid in IDS:
        out = rack.outputs(cid)
        final[cid] = Outputs(
            heater_pct=out.heater_pct,
            chiller_pct=out.chiller_pct,
            lamp_pct=out.lamp_pct,
            pump_pct=out.pump_pct,
        )
    return summary, final, safe


def test_a_protocol_runs_through_modbus_tcp_and_the_optode_ptys(tmp_path: Path) -> None:
    summary, final, safe = run_on_loopback(tmp_path)
    assert summary.end_reason is RunEndReason.COMPLETED, summary.detail
    ticks = round(35 * 60 / PERIOD_S)
    assert summary.ticks.ticks == ticks and summary.ticks.missed == 0
    assert summary.rows_written == ticks * len(IDS)
    assert summary.alarms == ()
    with RunLogReader(summary.log_path) as reader:
        events = reader.events()
        assert reader.alarms().empty
        for cid in IDS:
            rows = reader.samples(cid)
            assert len(rows) == ticks
            settled = rows[rows.elapsed_s >= 180.0]  # after three minutes
            error = settled.temperature_c - settled.temperature_setpoint_c
            # the ramp's setpoint moves 0.5 °C; the probe noise is 0.01 °C (rig file)
            assert float(np.sqrt(np.mean(error**2))) < 0.05, error.describe()
            assert float(error.abs().max()) < 0.15
            assert settled.temperature_setpoint_c.iloc[-1] == pytest.approx(20.5)
            # the room is at 18 °C: holding 20 °C takes heat, delivered through the module
            assert (settled.heater_pct > 0).mean() > 0.9
            # PAR and flow setpoints are followed through the lamp and pump drives
            late = rows[rows.elapsed_s >= 25 * 60.0]
            assert late.par.mean() == pytest.approx(300.0, rel=0.1)
            assert late.flow_cm_s.mean() == pytest.approx(4.0, rel=0.15)
            # the optode answered on its own 30 s cadence: oxygen in (nearly) every row
            assert rows.o2_umol_l.notna().mean() > 0.95
    stop = events[events.kind == EventKind.RUN_STOP.value]
    assert len(stop) == 1 and "completed" in stop.detail.iloc[0]
    # after the run the rack's actuators are at their safe state: heater, chiller, lamp off,
    # pump at its safe flow
    assert final == safe
