"""The rack server: following a clock, announcing its endpoints."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

import pytest

from controller.clock import Clock, VirtualClock, run_with_clock
from controller.drivers import (
    Measurement,
    OptodeCommand,
    OptodeRequest,
    decode_reply,
    encode_request,
)
from simulator import Rack
from simulator.endpoints import RackServer

from .conftest import START, small_rig


def test_run_keeps_the_rack_on_the_clock_and_expires_watchdogs() -> None:
    rack = Rack(small_rig(), seed=0, start_utc=START)
    clock = VirtualClock(START)  # autojump: ten minutes of clock time at once

    async def main(clock: Clock) -> None:
        server = RackServer(rack, clock=clock)
        module = server.modbus.module("c1")
        assert module.write_holding(0, [10000]) is None  # heater 100 %
        assert module.write_coils(0, [True]) is None
        assert module.write_holding(4, [50]) is None  # watchdog 5.0 s, never fed
        async with asyncio.TaskGroup() as tasks:
            runner = tasks.create_task(server.run(step_s=2.0))
            await clock.sleep(4.0)  # synced at 0, 2 and 4 s: fed at 0, not yet expired
            assert not module.tripped
            assert rack.outputs("c1").heater_pct == 100.0
            await clock.sleep(596.0)
            runner.cancel()
        assert rack.t_s == pytest.approx(600.0, abs=2.0)
        assert module.tripped and module.trips == 1
        assert rack.outputs("c1").heater_pct == 0.0

    run_with_clock(clock, main)


def test_requests_see_the_rack_at_the_clocks_present() -> None:
    rack = Rack(small_rig(), seed=0, start_utc=START)
    clock = VirtualClock(START)

    async def main(clock: Clock) -> float:
        await clock.sleep(10.0)  # the rack joins the clock late: its time 0 is clock 10 s
        server = RackServer(rack, clock=clock)
        await clock.sleep(250.0)
        assert rack.t_s == 0.0  # nobody asked yet, nothing runs
        line = encode_request(OptodeRequest(command=OptodeCommand.SAMPLE, tag=1))
        reply = server.optodes["c2"].answer(line.rstrip(b"\r\n"))
        assert reply is not None and isinstance(decode_reply(reply), Measurement)
        return rack.t_s

    assert run_with_clock(clock, main) == pytest.approx(250.0)


def test_run_refuses_without_a_clock_or_with_a_bad_step() -> None:
    server = RackServer(Rack(small_rig(), seed=0, start_utc=START))

    async def main() -> None:
        with pytest.raises(RuntimeError, match="needs a clock"):
            await server.run()
        with pytest.raises(RuntimeError, match="not been started"):
            _ = server.announcement

    asyncio.run(main())
    clocked = RackServer(Rack(small_rig(), seed=0, start_utc=START), clock=VirtualClock(START))

    async def bad_step(clock: Clock) -> None:
        with pytest.raises(ValueError, match="step_s"):
            await clocked.run(step_s=0.0)

    run_with_clock(VirtualClock(START), bad_step)


async def test_announcement_is_written_and_removed(rack: Rack, tmp_path: Path) -> None:
    ports = tmp_path / "ports.json"
    server = RackServer(rack)
    async with asyncio.timeout(10.0):
        announcement = await server.start(ports_file=ports, extra={"speed": 1.0})
        try:
            data = json.loads(ports.read_text(encoding="utf-8"))
            assert data["rig"] == "Saltmarrow bench pair"
            assert data["modbus"]["host"] == "127.0.0.1"
            assert data["modbus"]["port"] == announcement.port > 0
            assert data["modbus"]["word_order"] == "high-first"
            assert data["modbus"]["blocks"] == {
                "c1": {"unit_id": 1, "base": 0},
                "c2": {"unit_id": 1, "base": 16},
            }
            assert set(data["optodes"]) == {"c1", "c2"}
            assert all(Path(p).exists() for p in data["optodes"].values())
            assert data["speed"] == 1.0
            text = "\n".join(announcement.lines())
            assert f"127.0.0.1:{announcement.port}" in text
            assert data["optodes"]["c2"] in text
            assert not list(tmp_path.glob(".*.tmp"))  # written atomically, no leftovers
        finally:
            await server.stop()
    assert not ports.exists()
    assert all(e.path is None for e in server.optodes.values())
