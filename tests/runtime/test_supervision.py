"""Supervision: failures inside the run's tasks, cancellation, misbehaving drivers and late
ticks. Whatever happens, every chamber ends in its safe state and the run log is closed with
how the run ended."""

from __future__ import annotations

import asyncio
from pathlib import Path

import numpy as np
import pytest

from controller.clock import Clock, run_with_clock
from controller.control import Outputs
from controller.errors import RuntimeFailure
from controller.runtime import ChamberReadings, RunSettings, SimulatedIO, SimulatedRun
from controller.storage import RunEndReason, RunLogReader

from ._sim import Files, drive

PERIOD_S = 10.0


class Wrapped:
    """Chamber I/O passing everything to a simulated I/O; subclasses break one thing."""

    def __init__(self, inner: SimulatedIO, clock: Clock) -> None:
        self.inner = inner
        self.clock = clock

    @property
    def chambers(self) -> tuple[str, ...]:
        return self.inner.chambers

    async def __aenter__(self) -> Wrapped:
        await self.inner.__aenter__()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.inner.__aexit__(None, None, None)

    async def run(self, ready: asyncio.Event) -> None:
        await self.inner.run(ready)

    async def read(self, chamber: str) -> ChamberReadings:
        return await self.inner.read(chamber)

    async def write(self, chamber: str, outputs: Outputs) -> bool:
        return await self.inner.write(chamber, outputs)


class CrashingTask(Wrapped):
    """The background task dies at clock time ``at_s``."""

    at_s = 1200.0

    async def run(self, ready: asyncio.Event) -> None:
        async with asyncio.TaskGroup() as group:
            group.create_task(self.inner.run(ready))
            await self.clock.sleep_until(self.at_s)
            raise OSError("the I/O task lost its device file")


class RaisingReads(Wrapped):
    """Reads of chamber B raise between 600 s and 900 s (a driver bug)."""

    async def read(self, chamber: str) -> ChamberReadings:
        if chamber == "B" and 600.0 <= self.clock.now_s() < 900.0:
            raise ValueError("register decode failed")
        return await self.inner.read(chamber)


class StubbornRead(Wrapped):
    """One read of B at 1000 s ignores cancellation and returns 35 s later."""

    fired = False

    async def read(self, chamber: str) -> ChamberReadings:
        if chamber == "B" and not self.fired and self.clock.now_s() >= 1000.0:
            self.fired = True
            try:
                await asyncio.sleep(35.0)
            except asyncio.CancelledError:
                await asyncio.sleep(35.0)  # a driver that will not be interrupted
                raise
        return await self.inner.read(chamber)


class NeverReady(Wrapped):
    async def run(self, ready: asyncio.Event) -> None:
        await asyncio.Event().wait()


def prepare(files: Files, hours: float = 0.5, **settings: float) -> SimulatedRun:
    proto, rig, log = files(("A1", "B"), hours=hours)
    return SimulatedRun.prepare(
        proto, rig, log, settings=RunSettings(period_s=PERIOD_S, **settings)
    )


def assert_safe_now(run: SimulatedRun) -> None:
    for chamber in ("A1", "B"):
        safe = run.plan.chambers[chamber].interlocks.safe_outputs()
        o = run.rack.outputs(chamber)
        assert (o.heater_pct, o.chiller_pct, o.lamp_pct, o.pump_pct) == (
            safe.heater_pct,
            safe.chiller_pct,
            safe.lamp_pct,
            safe.pump_pct,
        )


def end_of(path: Path) -> tuple[RunEndReason, list[tuple[str, str]]]:
    with RunLogReader(path) as reader:
        info = reader.info()
        events = reader.events()
    assert info.end is not None
    return info.end.end_reason, list(zip(events.kind, events.detail, strict=True))


def test_a_task_that_dies_drives_every_output_safe_and_aborts_the_log(files: Files) -> None:
    run = prepare(files)
    lamp_on: dict[str, float] = {}
    at = [(1100.0, lambda r: lamp_on.update(B=r.rack.outputs("B").lamp_pct))]
    with pytest.raises(OSError, match="lost its device file"):
        drive(run, io=CrashingTask(run.io, run.clock), at=at)
    assert lamp_on["B"] > 0.0  # it was running normally before
    assert_safe_now(run)
    assert run.clock.now_s() == pytest.approx(1200.0)
    reason, events = end_of(run.writer.path)
    assert reason is RunEndReason.ABORTED
    kind, detail = events[-1]
    assert kind == "abort" and "OSError" in detail and "safe outputs written" in detail


def test_cancelling_the_run_makes_outputs_safe_then_propagates(files: Files) -> None:
    run = prepare(files)
    loop = run.loop()

    async def main(clock: Clock) -> None:
        task = asyncio.create_task(loop.run())
        await clock.sleep_until(700.0)
        task.cancel()
        await task

    with pytest.raises(asyncio.CancelledError):
        run_with_clock(run.clock, main)
    assert_safe_now(run)
    reason, events = end_of(run.writer.path)
    assert reason is RunEndReason.STOPPED and events[-1][0] == "run_stop"


def test_a_driver_that_raises_gives_stale_readings_and_the_run_goes_on(files: Files) -> None:
    run = prepare(files)
    summary = drive(run, io=RaisingReads(run.io, run.clock))
    assert summary.end_reason is RunEndReason.COMPLETED
    with RunLogReader(run.writer.path) as reader:
        samples = reader.samples("B")
        alarms = reader.alarms()
    broken = samples[(samples.t_s >= 600.0) & (samples.t_s < 900.0)]
    assert broken.temperature_c.isna().all()
    raised = set(alarms[alarms.action == "raise"].code)
    assert {"comm-loss", "sensor-stale"} <= raised
    assert set(alarms[alarms.action == "clear"].code) >= {"comm-loss", "sensor-stale"}
    assert samples.iloc[-1].temperature_c == pytest.approx(20.0, abs=0.2)


def test_missed_ticks_are_skipped_not_replayed_and_the_latest_due_one_runs_late(
    files: Files,
) -> None:
    run = prepare(files)
    summary = drive(run, io=StubbornRead(run.io, run.clock))
    # the tick due at 1000 s ends at 1000 + 2 s (read deadline) + 35 s = 1037 s: the ticks
    # due at 1010 and 1020 s are skipped, the one due at 1030 s runs at once, 7 s late
    assert summary.ticks.missed == 2
    assert summary.ticks.late == 1
    assert summary.ticks.max_lateness_s == pytest.approx(7.0)
    with RunLogReader(run.writer.path) as reader:
        t = reader.samples("B").t_s.to_numpy()
    grid = np.arange(0.0, 1800.0, PERIOD_S)
    expected = np.concatenate([grid[grid <= 1000.0], [1037.0], grid[grid >= 1040.0]])
    assert np.allclose(t, expected)  # back on the grid after the stall: no drift
    assert summary.ticks.ticks == len(expected)


def test_a_stall_longer_than_a_period_makes_the_next_tick_late_by_the_remainder(
    files: Files,
) -> None:
    run = prepare(files)

    class Stall(StubbornRead):
        async def read(self, chamber: str) -> ChamberReadings:
            if chamber == "B" and not self.fired and self.clock.now_s() >= 1000.0:
                self.fired = True
                try:
                    await asyncio.sleep(13.0)
                except asyncio.CancelledError:
                    await asyncio.sleep(13.0)
                    raise
            return await self.inner.read(chamber)

    summary = drive(run, io=Stall(run.io, run.clock))
    # due 1000 s, done at 1015 s: the tick due at 1010 s starts 5 s late
    assert summary.ticks.missed == 0 and summary.ticks.late == 1
    assert summary.ticks.max_lateness_s == pytest.approx(5.0)
    with RunLogReader(run.writer.path) as reader:
        t = reader.samples("B").t_s.to_numpy()
    assert t[101] == pytest.approx(1015.0) and t[102] == 1020.0


def test_devices_that_never_become_ready_fail_the_run_with_outputs_safe(files: Files) -> None:
    run = prepare(files, ready_timeout_s=60.0)
    with pytest.raises(RuntimeFailure, match="not ready within 60 s"):
        drive(run, io=NeverReady(run.io, run.clock))
    assert_safe_now(run)
    reason, _ = end_of(run.writer.path)
    assert reason is RunEndReason.ABORTED
