"""The loop's at-once path (SimulatedIO.read_now/write_now, Rack.sweep) against the
chamber-by-chamber path it short-cuts.

The same prepared run is driven twice: once on the simulated I/O itself (the loop reads and
writes every chamber at once whenever every device answers) and once through a plain
pass-through wrapper, which only offers ``read``/``write`` so the loop creates a task per
chamber as it does for hardware. Faults make devices silent (the at-once path must step
aside for exactly those ticks), sensors drop out, spike and drift, and an E-stop is pressed:
both run logs must hold the very same rows, alarms and events, and both racks must end in the
same state.
"""

from __future__ import annotations

import asyncio
from pathlib import Path

import pandas as pd

from controller.clock import Clock
from controller.control import Outputs
from controller.rig import Fault, FaultKind
from controller.runtime import ChamberReadings, RunSettings, SimulatedIO, SimulatedRun
from controller.storage import RunLogReader

from ._sim import Files, drive

PERIOD_S = 30.0


class PassThrough:
    """Chamber I/O that forwards to a simulated I/O one call at a time (no ``read_now``)."""

    def __init__(self, inner: SimulatedIO, clock: Clock) -> None:
        self.inner = inner
        self.clock = clock
        self.reads = 0

    @property
    def chambers(self) -> tuple[str, ...]:
        return self.inner.chambers

    async def __aenter__(self) -> PassThrough:
        await self.inner.__aenter__()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.inner.__aexit__(None, None, None)

    async def run(self, ready: asyncio.Event) -> None:
        await self.inner.run(ready)

    async def read(self, chamber: str) -> ChamberReadings:
        self.reads += 1
        return await self.inner.read(chamber)

    async def write(self, chamber: str, outputs: Outputs) -> bool:
        return await self.inner.write(chamber, outputs)


def faults(run: SimulatedRun) -> list[tuple[float, object]]:
    """Timed troubles (clock s): silent devices, sensor faults, an E-stop and its release.

    Each falls between two ticks: what happens at the very instant of a tick, before or after
    its reads, depends on the order the event loop pops timers of equal deadline, which is
    arbitrary on either path."""
    ids = run.rack.chamber_ids
    plan = [
        (615.0, Fault(kind=FaultKind.COMM_TIMEOUT, chamber=ids[2], duration_s=300.0)),
        (1505.0, Fault(kind=FaultKind.DROPOUT, chamber=ids[0], sensor="optode", duration_s=900)),
        (2110.0, Fault(kind=FaultKind.SPIKES, chamber=ids[1], sensor="par", magnitude=40.0)),
        (2720.0, Fault(kind=FaultKind.DRIFT, chamber=ids[2], sensor="temperature", magnitude=0.5)),
        (3301.0, Fault(kind=FaultKind.COMM_TIMEOUT, chamber=ids[0], sensor="optode")),
    ]
    actions: list[tuple[float, object]] = [
        (t, lambda r, f=fault: r.rack.inject(f)) for t, fault in plan
    ]
    actions.append((4207.0, lambda r: r.io.press_e_stop(ids[1])))
    actions.append((4510.0, lambda r: r.io.release_e_stop(ids[1])))
    return actions


def run_once(files: Files, tmp: Path, wrap: bool) -> tuple[SimulatedRun, PassThrough | None]:
    proto, rig, _ = files(("A1", "A2", "B"), hours=2.5, ramp_to_c=21.0)
    log = tmp / ("wrapped.sqlite" if wrap else "direct.sqlite")
    run = SimulatedRun.prepare(proto, rig, log, settings=RunSettings(period_s=PERIOD_S))
    wrapper = PassThrough(run.io, run.clock) if wrap else None
    drive(run, at=faults(run), io=wrapper)  # type: ignore[arg-type]
    return run, wrapper


def tables(path: Path) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    with RunLogReader(path) as reader:
        return reader.samples(), reader.alarms(), reader.events()


def test_at_once_path_logs_exactly_what_the_chamber_by_chamber_path_logs(
    files: Files, tmp_path: Path
) -> None:
    direct, _ = run_once(files, tmp_path, wrap=False)
    wrapped, spy = run_once(files, tmp_path, wrap=True)
    assert spy is not None and spy.reads > 0
    got, want = tables(direct.writer.path), tables(wrapped.writer.path)
    samples = got[0]
    assert len(samples) == len(want[0]) > 3 * 200
    # the troubles showed: a silent chamber (stale rows), a sensor dropout, alarms
    assert samples["temperature_c"].isna().any()
    assert samples["o2_umol_l"].isna().any()
    assert len(got[1]) > 0
    for mine, theirs in zip(got, want, strict=True):
        pd.testing.assert_frame_equal(mine, theirs, check_exact=True)
    for cid in direct.rack.chamber_ids:
        assert direct.rack.truth(cid) == wrapped.rack.truth(cid)
    assert direct.io.watchdog_trips == wrapped.io.watchdog_trips
    assert direct.io.last_written == wrapped.io.last_written


def test_read_now_and_write_now_step_aside_while_a_device_is_silent(
    files: Files, tmp_path: Path
) -> None:
    proto, rig, log = files(("A1", "B"), hours=0.5)
    run = SimulatedRun.prepare(proto, rig, log, settings=RunSettings(period_s=PERIOD_S))
    io, rack = run.io, run.rack
    off = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)
    rack.inject(Fault(kind=FaultKind.COMM_TIMEOUT, chamber="B", sensor="optode"))
    state = rack._rng.bit_generator.state
    assert io.read_now(["A1", "B"]) is None  # B's optode is due and silent
    assert rack._rng.bit_generator.state == state  # nothing was read
    assert io.write_now({"A1": off, "B": off}) == {"A1": True, "B": True}  # modules answer
    readings = io.read_now(["A1"])
    assert readings is not None and isinstance(readings["A1"], ChamberReadings)
    assert rack._rng.bit_generator.state != state
    rack.inject(Fault(kind=FaultKind.COMM_TIMEOUT, chamber="A1"))
    rack.advance(1.0)  # the I/O asks the rack who answers once per simulated instant
    assert io.write_now({"B": off, "A1": off}) is None
    assert io.read_now(["A1"]) is None
    run.writer.close()
