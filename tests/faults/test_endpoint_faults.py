"""Faults on the wire: the controller talks Modbus TCP on 127.0.0.1 and the optode's line
protocol over a pseudo-terminal to the simulator's endpoints, as it would to a real rack.

The control loop runs :class:`~controller.runtime.HardwareIO` on an autojumping virtual
clock (timeouts and back-off pauses cost no real time; ``io_grace_s`` leaves the kernel a
few real milliseconds to deliver loopback and pty bytes before each jump). The rig file
names its devices only through ``[io] from_announcement``, the file ``squall simulate``
writes, except that the optode's port is a symbolic link, as a udev rule gives a USB serial
adapter a stable name: unplugging the adapter removes the link, plugging it in again
creates it anew (on a new pty).
"""

from __future__ import annotations

import asyncio
import json
import time
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import pandas as pd
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
from controller.storage import ClockKind, RunLogReader
from simulator import Fault, FaultKind, Rack
from simulator.endpoints import RackServer

from ._harness import (
    CHAMBER,
    PERIOD_S,
    PROBE_S,
    FaultRecord,
    LogCheck,
    RecordBook,
    check_log,
    outputs_of,
    protocol_text,
    raised_between,
    rig_text,
)

pytestmark = pytest.mark.timeout(120)

ONSET_S = 240.0
"""When the faults here begin, s of run time."""
IO_GRACE_S = 0.01
"""Real time the virtual clock leaves loopback and pty peers before each jump, s."""
OPTODE_PERIOD_S = 30.0
"""The optode's measuring cadence in the rig's [io] table, s."""
REOPEN_BACKOFF_MAX_S = 60.0
"""Longest pause between attempts to reopen a lost serial port (the transport's default), s."""
IO_TABLE = f"""
[io]
from_announcement = "ports.json"
optode_period_s = {OPTODE_PERIOD_S:g}
"""

Step = tuple[float, Callable[[RackServer, Path], object]]


@dataclass(frozen=True, kw_only=True)
class WireOutcome:
    """A finished run over the endpoints: summary, log rows, alarms, safe-state time."""

    summary: RunSummary
    samples: pd.DataFrame
    alarms: pd.DataFrame
    safe_at_s: float | None
    log: LogCheck
    rack: Rack
    safe: Outputs
    commit_interval_s: float
    wall_s: float

    def record(
        self,
        *,
        fault: str,
        injected: str,
        expected: str,
        safe_bound_s: float | None,
        alarm_until_s: float,
    ) -> FaultRecord:
        """The scenario's record; alarms counted from onset to ``alarm_until_s`` (s)."""
        return FaultRecord(
            fault=fault,
            injected=injected,
            expected=expected,
            alarm=raised_between(self.alarms, ONSET_S, alarm_until_s),
            safe_after_s=(
                None
                if safe_bound_s is None or self.safe_at_s is None
                else round(self.safe_at_s - ONSET_S, 3)
            ),
            safe_bound_s=safe_bound_s,
            integrity=self.log.integrity,
            contiguous=self.log.contiguous and self.log.finished,
            lost_s=max(0, self.summary.ticks.ticks - self.log.ticks) * PERIOD_S,
            lost_bound_s=self.commit_interval_s,
            wall_s=round(self.wall_s, 2),
        )


def run_over_the_wire(
    folder: Path,
    *,
    faults: Sequence[Fault] = (),
    steps: Sequence[Step] = (),
    minutes: float = 12.0,
    watch: bool = True,
) -> WireOutcome:
    """Serve the rig's rack on loopback and run the matrix's protocol through HardwareIO.

    Parameters
    ----------
    folder
        Where the rig, protocol, ports file, optode link and log go.
    faults
        Simulator faults injected into the served rack.
    steps
        ``(t_s, step(server, link))`` pairs run at clock time ``t_s`` (s), with the optode
        link's path.
    minutes
        Protocol length, min.
    watch
        Look for the safe state from :data:`ONSET_S` on (every :data:`PROBE_S`, each look
        costing the clock's I/O grace in real time).

    Returns
    -------
    WireOutcome
        The run; ``safe_at_s`` is when the rack's actuators first showed the safe state at
        or after :data:`ONSET_S`.
    """
    rig_file = folder / "rig.toml"
    rig_file.write_text(rig_text(extra=IO_TABLE), encoding="utf-8")
    protocol_file = folder / "protocol.toml"
    protocol_file.write_text(protocol_text(hours=minutes / 60.0), encoding="utf-8")
    inputs = load_run_inputs(protocol_file, rig_file)
    compiled, rig = inputs.compiled, inputs.rig
    settings = RunSettings(period_s=PERIOD_S)
    plan = plan_control(rig, compiled.chambers, settings)
    safe = plan.chambers[CHAMBER].interlocks.safe_outputs()
    clock = VirtualClock(compiled.start_utc, io_grace_s=IO_GRACE_S)
    rack = Rack(rig, seed=5, start_utc=compiled.start_utc)
    for fault in faults:
        rack.inject(fault)
    commit_s = settings.commit_interval_for(None)
    writer = create_run_log(
        inputs,
        plan,
        folder / "run.sqlite",
        clock_kind=ClockKind.VIRTUAL,
        commit_interval_s=commit_s,
    )
    link = folder / "optode-B"
    safe_at: list[float] = []

    async def main(clock: Clock) -> RunSummary:
        server = RackServer(rack, clock=clock)
        announced = await server.start()
        link.symlink_to(announced.optodes[CHAMBER])
        ports = announced.to_dict()
        ports["optodes"] = {CHAMBER: str(link)}
        (folder / "ports.json").write_text(json.dumps(ports), encoding="utf-8")
        stepper = asyncio.ensure_future(server.run(step_s=PERIOD_S))
        loop: ControlLoop | None = None

        async def monitor() -> None:
            t_s = ONSET_S
            while loop is None or not loop.done.is_set():
                await clock.sleep_until(t_s)
                server.sync()
                if outputs_of(rack.outputs(CHAMBER)) == safe:
                    safe_at.append(clock.now_s())
                    return
                t_s += PROBE_S

        async def later(t_s: float, step: Callable[[RackServer, Path], object]) -> None:
            await clock.sleep_until(t_s)
            done = step(server, link)
            if isinstance(done, Awaitable):
                await done

        helpers = [asyncio.ensure_future(monitor())] if watch else []
        helpers += [asyncio.ensure_future(later(t, s)) for t, s in steps]
        try:
            io = HardwareIO.from_rig(rig, clock, base_dir=folder, plan=plan)
            loop = ControlLoop(io=io, clock=clock, compiled=compiled, plan=plan, writer=writer)
            async with asyncio.timeout(compiled.duration_s + 600.0):
                return await loop.run()
        finally:
            for task in (stepper, *helpers):
                task.cancel()
            await asyncio.gather(stepper, *helpers, return_exceptions=True)
            server.sync()
            await server.stop()

    started = time.perf_counter()
    try:
        summary = run_with_clock(clock, main)
    finally:
        if not writer.closed:
            writer.close()
    wall_s = time.perf_counter() - started
    with RunLogReader(folder / "run.sqlite") as reader:
        samples, alarms = reader.samples(CHAMBER), reader.alarms()
    return WireOutcome(
        summary=summary,
        samples=samples,
        alarms=alarms,
        safe_at_s=safe_at[0] if safe_at else None,
        log=check_log(folder / "run.sqlite", PERIOD_S),
        rack=rack,
        safe=safe,
        commit_interval_s=commit_s,
        wall_s=wall_s,
    )


def test_a_silent_modbus_module_times_out_trips_comm_loss_and_its_watchdog_goes_safe(
    tmp_path: Path, records: RecordBook
) -> None:
    silent_s = 180.0
    fault = Fault(
        kind=FaultKind.COMM_TIMEOUT,
        chamber=CHAMBER,
        sensor="modbus",
        at_s=ONSET_S,
        duration_s=silent_s,
    )
    out = run_over_the_wire(tmp_path, faults=[fault])
    watchdog_s = 3 * PERIOD_S  # the [io] default: three control ticks
    measured = out.record(
        fault="modbus-timeout",
        injected=f"the Modbus TCP server leaves B's requests unanswered from 240 s for "
        f"{silent_s:g} s (the client's timeout expires)",
        expected="requests time out without stalling the tick; comm-loss trip; the "
        "module's watchdog drives its safe outputs; set up again and control resumes "
        "when it answers",
        safe_bound_s=watchdog_s + PROBE_S,
        alarm_until_s=ONSET_S + watchdog_s + PROBE_S,
    )
    ticks = out.summary.ticks
    note = f"{ticks.missed} ticks missed, max lateness {ticks.max_lateness_s:g} s (virtual)"
    record = records.add(replace(measured, note=note))
    record.check(alarm="comm-loss, sensor-stale")
    assert out.summary.ticks.missed == 0  # the timeouts never cost a tick
    silent = out.samples[(out.samples.t_s > ONSET_S) & (out.samples.t_s < ONSET_S + silent_s)]
    assert silent.temperature_c.isna().all()
    cleared = out.alarms[(out.alarms.action == "clear") & (out.alarms.code == "comm-loss")]
    assert len(cleared) == 1 and cleared.t_s.iloc[0] <= ONSET_S + silent_s + 2 * PERIOD_S
    assert out.samples.lamp_pct.iloc[-1] > 0.0 and pd.isna(out.samples.alarm.iloc[-1])


def test_an_unplugged_optode_adapter_is_reopened_when_it_comes_back(
    tmp_path: Path, records: RecordBook
) -> None:
    away_s = 180.0

    def unplug(server: RackServer, link: Path) -> None:
        server.optodes[CHAMBER].close()
        link.unlink()

    def plug_in(server: RackServer, link: Path) -> None:
        link.symlink_to(server.optodes[CHAMBER].open())  # a new pty under the same name

    out = run_over_the_wire(
        tmp_path, steps=[(ONSET_S, unplug), (ONSET_S + away_s, plug_in)], watch=False
    )
    measured = out.record(
        fault="serial-disconnect",
        injected=f"the optode's serial adapter unplugged at 240 s (pty closed, link "
        f"removed) and plugged in again {away_s:g} s later on a new pty",
        expected="oxygen logged as missing while it is away, never a stale value; "
        "temperature control unaffected, no trip; the port is reopened once it is back",
        safe_bound_s=None,
        alarm_until_s=ONSET_S + away_s,
    )
    s = out.samples
    back = s[(s.t_s >= ONSET_S + away_s) & s.o2_umol_l.notna()]
    note = (
        "oxygen never back"
        if back.empty
        else (f"oxygen logged again {back.t_s.iloc[0] - ONSET_S - away_s:g} s after the replug")
    )
    record = records.add(replace(measured, note=note))
    record.check(alarm=None)
    assert out.summary.ticks.missed == 0
    away = s[(s.t_s >= ONSET_S + OPTODE_PERIOD_S + PERIOD_S) & (s.t_s < ONSET_S + away_s)]
    assert len(away) and away.o2_umol_l.isna().all()
    first_back = back
    # reopened within the serial transport's longest back-off between open attempts
    # (60 s, its default cap), one measuring period of the optode and one tick
    back_by_s = ONSET_S + away_s + REOPEN_BACKOFF_MAX_S + OPTODE_PERIOD_S + PERIOD_S
    assert len(first_back) and first_back.t_s.iloc[0] <= back_by_s
    assert s.temperature_c.notna().all() and (s.lamp_pct.iloc[30:] > 0.0).all()
