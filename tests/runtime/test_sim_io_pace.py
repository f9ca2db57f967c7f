"""SimulatedIO keeps its rack on the clock's grid with a timer callback, not a task: the rack
keeps pace when nobody reads, a task waking at a grid point finds it already there, and a
failure of that advance fails the I/O's background task as before."""

from __future__ import annotations

import asyncio

import pytest

from controller.clock import Clock, run_with_clock
from controller.runtime import RunSettings, SimulatedRun

from ._sim import Files

PERIOD_S = 30.0


def prepare(files: Files) -> SimulatedRun:
    proto, rig, log = files(("B",), hours=0.5)
    return SimulatedRun.prepare(proto, rig, log, settings=RunSettings(period_s=PERIOD_S))


def test_the_rack_keeps_pace_on_the_grid_when_nobody_reads(files: Files) -> None:
    run = prepare(files)
    seen: list[tuple[float, float]] = []

    async def main(clock: Clock) -> None:
        ready = asyncio.Event()
        pacer = asyncio.ensure_future(run.io.run(ready))
        await ready.wait()
        for t_s in (PERIOD_S, 2.5 * PERIOD_S, 4 * PERIOD_S):
            await clock.sleep_until(t_s)
            seen.append((clock.now_s(), run.rack.t_s))
        pacer.cancel()
        with pytest.raises(asyncio.CancelledError):
            await pacer

    try:
        run_with_clock(run.clock, main)
    finally:
        run.writer.close()
    # a task waking at a grid point finds the rack there already (the callback ran first);
    # between grid points the rack stands at the last one
    assert seen == [
        (PERIOD_S, PERIOD_S),
        (2.5 * PERIOD_S, 2 * PERIOD_S),
        (4 * PERIOD_S, 4 * PERIOD_S),
    ]


def test_a_failing_advance_on_the_grid_fails_the_background_task(files: Files) -> None:
    run = prepare(files)
    advance = run.rack.advance

    def broken(dt_s: float) -> None:
        if run.rack.t_s + dt_s > 2 * PERIOD_S:
            raise RuntimeError("the physics blew up")
        advance(dt_s)

    run.rack.advance = broken  # type: ignore[method-assign]

    async def main(clock: Clock) -> float:
        with pytest.raises(RuntimeError, match="blew up"):
            await run.io.run(asyncio.Event())
        return clock.now_s()

    try:
        failed_at_s = run_with_clock(run.clock, main)
    finally:
        run.writer.close()
    assert failed_at_s == 3 * PERIOD_S
    assert run.rack.t_s == 2 * PERIOD_S
