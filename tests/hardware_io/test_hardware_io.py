"""HardwareIO against a simulated rack served on its real endpoints (Modbus TCP + optode ptys).

The rack follows the virtual clock (``RackServer(clock=...)`` and its ``run`` task), so the
module watchdogs expire in simulated time exactly as they would on a bench.
"""

from __future__ import annotations

import asyncio
import json
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import dataclass
from pathlib import Path

import pytest

from controller.clock import VirtualClock
from controller.control import Outputs
from controller.drivers import decode_outputs, decode_point, decode_safe_outputs, point
from controller.errors import SquallError
from controller.files import load_model
from controller.rig import Rig
from controller.rig._io import InputCorrection, RigIo, io_from_ports
from controller.runtime import ChamberIO, ChamberReadings, Quantity, RunSettings
from controller.runtime._hardware_io import HardwareIO
from simulator import Fault, FaultKind, Rack
from simulator.endpoints import IoModule, RackServer

from .conftest import START, rig, rig_text, virtual

pytestmark = pytest.mark.timeout(30)

IDS = ("c1", "c2")
WATCHDOG_S = 30.0
OPTODE_PERIOD_S = 30.0
SYNC_S = 5.0
"""Clock seconds between the server's rack updates when nobody asks, s."""
SAFE = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=25.0)
DRIVE = Outputs(heater_pct=37.5, chiller_pct=0.0, lamp_pct=12.25, pump_pct=40.0)
OFF = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)


@dataclass
class Bench:
    rack: Rack
    server: RackServer
    io: HardwareIO
    clock: VirtualClock

    def module(self, chamber: str) -> IoModule:
        return self.server.modbus.module(chamber)

    def actual(self, chamber: str) -> Outputs:
        out = self.rack.outputs(chamber)
        return Outputs(
            heater_pct=out.heater_pct,
            chiller_pct=out.chiller_pct,
            lamp_pct=out.lamp_pct,
            pump_pct=out.pump_pct,
        )


@asynccontextmanager
async def bench(
    clock: VirtualClock,
    *,
    budget_s: float = 1.5,
    corrections: dict[str, InputCorrection] | None = None,
) -> AsyncIterator[Bench]:
    """A served rack and a started HardwareIO on it (ready), torn down afterwards."""
    rack = Rack(rig(IDS), seed=3, start_utc=START)
    server = RackServer(rack, clock=clock)
    announcement = await server.start()
    template = RigIo(
        from_announcement="-", optode_period_s=OPTODE_PERIOD_S, corrections=corrections or {}
    )
    io_map = io_from_ports(announcement.to_dict(), IDS, template=template)
    io = HardwareIO(
        io_map,
        IDS,
        clock,
        watchdog_timeout_s=WATCHDOG_S,
        safe={"c1": SAFE, "c2": SAFE},
        budget_s=budget_s,
    )
    ready = asyncio.Event()
    tasks: list[asyncio.Task[None]] = []
    try:
        async with io:
            tasks = [
                asyncio.ensure_future(server.run(step_s=SYNC_S)),
                asyncio.ensure_future(io.run(ready)),
            ]
            async with asyncio.timeout(60.0):
                await ready.wait()
            yield Bench(rack=rack, server=server, io=io, clock=clock)
    finally:
        for task in tasks:
            task.cancel()
        await asyncio.gather(*tasks, return_exceptions=True)
        await server.stop()


def test_it_is_chamber_io() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            assert isinstance(b.io, ChamberIO)
            assert b.io.chambers == IDS

    virtual(body)


def test_start_up_writes_safe_drives_and_arms_the_watchdog_before_ready() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            for cid in IDS:
                words = b.module(cid).holding_words()
                assert decode_safe_outputs(words[6:10]) == decode_safe_outputs(
                    (0, 0, 0, 2500)
                )  # pump 25 %, the rest off
                timeout = decode_point(point("watchdog_timeout_s"), [words[4]])
                assert timeout == WATCHDOG_S
                assert words[5] != 0  # fed once
                assert decode_outputs(words[0:4]) == decode_outputs((0, 0, 0, 0))
                assert not b.module(cid).tripped
            # the first optode reading is in before ready
            assert b.io.optode_stats("c1") == (1, 0)

    virtual(body)


def test_readings_match_the_racks_truth_within_sensor_noise() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            t0 = clock.now_s()
            for cid in IDS:
                assert await b.io.write(cid, DRIVE)
            for k in range(1, 9):  # four minutes of 30 s ticks keep the watchdog fed
                await clock.sleep_until(t0 + 30.0 * k + 0.001)  # just after each optode poll
                for cid in IDS:
                    assert await b.io.write(cid, DRIVE)
            reads = await asyncio.gather(*(b.io.read(cid) for cid in IDS))
            for reading in reads:
                truth = b.rack.truth(reading.chamber)
                assert reading.comm_ok and reading.failed == frozenset()
                # probe noise 0.01 °C (rig file), float32 on the wire
                assert reading.temperature_c == pytest.approx(truth.probe_temperature_c, abs=0.05)
                # PAR noise 1 % of reading (rig default) plus the 0.1 count of the register
                assert reading.par == pytest.approx(truth.par, rel=0.05, abs=0.2)
                # flow noise 0.1 cm/s (rig default), 0.01 cm/s counts
                assert reading.flow_cm_s == pytest.approx(truth.flow_cm_s, abs=0.5)
                # optode noise 0.3 µmol/L (rig default), measured 1 ms ago
                assert reading.o2_umol_l == pytest.approx(truth.optode_o2_umol_l, abs=2.0)
                assert reading.o2_sat_pct == pytest.approx(
                    100.0 * reading.o2_umol_l / truth.o2_saturation_umol_l, abs=1.0
                )
                assert reading.level_ok is True and reading.e_stop is False
            assert reads[0].par is not None and reads[0].par > 10.0  # the lamp is lit
            assert b.io.optode_stats("c1") == (9, 0)
            # c2's polls are staggered half a period after c1's: 0 s, then 45 s, 75 s, ...
            assert b.io.optode_stats("c2") == (8, 0)

    virtual(body)


def test_writes_drive_the_actuators_through_drives_and_relays() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            assert await b.io.write("c2", DRIVE)
            assert b.actual("c2") == DRIVE
            assert b.actual("c1") == OFF
            assert b.module("c2").coil_bits()[:4] == (True, False, True, True)
            assert await b.io.write("c2", OFF)
            assert b.actual("c2") == OFF
            assert b.module("c2").coil_bits()[:4] == (False, False, False, False)

    virtual(body)


def test_every_write_carries_drives_relays_feed_and_safe_drives_in_one_request() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            (link,) = b.io.links.values()
            before = link.requests
            for _ in range(5):
                assert await b.io.write("c1", DRIVE)
            assert link.requests - before == 5
            # a relay opened behind the controller's back is closed again by the next write
            assert b.module("c1").write_coils(0, [False]) is None
            assert b.actual("c1").heater_pct == 0.0
            assert await b.io.write("c1", DRIVE)
            assert b.actual("c1") == DRIVE
            # so are safe drives lost behind its back
            assert b.module("c1").write_holding(9, [0]) is None
            assert await b.io.write("c1", OFF)
            words = b.module("c1").holding_words()
            assert decode_safe_outputs(words[6:10]).pump_pct == SAFE.pump_pct
            assert b.module("c1").coil_bits()[:4] == (False, False, False, False)

    virtual(body)


def test_the_watchdog_holds_outputs_while_fed_and_drops_them_to_safe_when_feeding_stops() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            t0 = clock.now_s()
            for k in range(13):  # two minutes of 10 s ticks
                await clock.sleep_until(t0 + 10.0 * k)
                assert await b.io.write("c1", DRIVE)
            last_feed = clock.now_s()
            assert b.module("c1").trips == 0 and b.actual("c1") == DRIVE
            await clock.sleep_until(last_feed + WATCHDOG_S - 1.0)
            assert b.actual("c1") == DRIVE  # not yet
            await clock.sleep_until(last_feed + WATCHDOG_S + SYNC_S + 0.5)  # next server sync
            assert b.module("c1").tripped
            assert b.actual("c1") == SAFE
            reading = await b.io.read("c1")
            assert reading.comm_ok  # a tripped module still answers
            # the controller comes back: feeding clears the trip, the drive is taken again
            assert await b.io.write("c1", DRIVE)
            assert not b.module("c1").tripped and b.actual("c1") == DRIVE
            assert b.module("c1").trips == 1

    virtual(body)


def test_a_silent_module_gives_stale_readings_and_failed_writes_not_errors() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock, budget_s=1.5) as b:
            fault = Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c1", sensor="modbus")
            b.rack.inject(fault.model_copy(update={"at_s": b.rack.t_s}))
            t0 = clock.now_s()
            silent, other = await asyncio.gather(b.io.read("c1"), b.io.read("c2"))
            assert clock.now_s() - t0 <= 1.5 + 1e-6  # bounded by the budget
            assert not silent.comm_ok
            assert {Quantity.TEMPERATURE, Quantity.PAR, Quantity.FLOW} <= silent.failed
            assert {Quantity.LEVEL, Quantity.E_STOP} <= silent.failed
            assert silent.temperature_c is None and silent.level_ok is None
            assert silent.o2_umol_l is not None  # the optode is a separate device
            assert other.comm_ok and other.temperature_c is not None
            assert await b.io.write("c1", DRIVE) is False
            assert await b.io.write("c2", DRIVE) is True
            b.rack.clear_faults(FaultKind.COMM_TIMEOUT)
            assert (await b.io.read("c1")).comm_ok
            assert await b.io.write("c1", DRIVE)
            assert b.actual("c1") == DRIVE

    virtual(body)


def test_a_module_that_lost_power_is_set_up_again() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            assert await b.io.write("c1", DRIVE)
            b.rack.inject(
                Fault(kind=FaultKind.POWER_LOSS, chamber="c1", at_s=b.rack.t_s, duration_s=20.0)
            )
            t0 = clock.now_s()
            assert await b.io.write("c1", DRIVE) is False
            await clock.sleep_until(t0 + 25.0)
            b.server.sync()  # the module reboots with power-on defaults
            assert decode_safe_outputs(b.module("c1").holding_words()[6:10]).pump_pct == 0.0
            assert await b.io.write("c1", DRIVE)
            words = b.module("c1").holding_words()
            assert decode_safe_outputs(words[6:10]).pump_pct == SAFE.pump_pct
            assert decode_point(point("watchdog_timeout_s"), [words[4]]) == WATCHDOG_S
            assert b.actual("c1") == DRIVE

    virtual(body)


def test_a_silent_optode_never_stalls_a_read() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            fault = Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c1", sensor="optode")
            b.rack.inject(fault.model_copy(update={"at_s": b.rack.t_s}))
            t_poll = clock.now_s() + OPTODE_PERIOD_S  # the next poll waits 1 s in vain
            await clock.sleep_until(t_poll + 0.5)
            assert b.io.optode_stats("c1") == (2, 0)  # asked, not yet given up
            before = clock.now_s()
            during: ChamberReadings = await b.io.read("c1")
            assert clock.now_s() == before  # no wait for the optode at all
            assert during.comm_ok and during.o2_umol_l is not None  # the previous measurement
            await clock.sleep_until(t_poll + 2.0)
            assert b.io.optode_stats("c1") == (2, 1)
            after = await b.io.read("c1")
            assert not after.comm_ok  # the missed poll is reported once
            assert after.o2_umol_l is None and Quantity.OXYGEN in after.failed
            again = await b.io.read("c1")
            assert again.comm_ok and Quantity.OXYGEN in again.failed
            b.rack.clear_faults(FaultKind.COMM_TIMEOUT)
            await clock.sleep_until(t_poll + OPTODE_PERIOD_S + 0.001)
            back = await b.io.read("c1")
            assert back.o2_umol_l is not None and back.failed == frozenset()

    virtual(body)


def test_e_stop_and_dropouts_are_reported() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            b.module("c2").set_estop(True)
            b.rack.inject(
                Fault(kind=FaultKind.DROPOUT, chamber="c2", sensor="temperature", at_s=b.rack.t_s)
            )
            reading = await b.io.read("c2")
            assert reading.e_stop is True and reading.comm_ok
            assert reading.temperature_c is None and reading.failed == {Quantity.TEMPERATURE}
            assert (await b.io.read("c1")).e_stop is False

    virtual(body)


def test_calibration_corrections_apply_to_the_readings() -> None:
    fix = InputCorrection(temperature_offset_c=-0.5, par_gain=2.0, flow_offset_cm_s=-10.0)

    async def body(clock: VirtualClock) -> None:
        async with bench(clock, corrections={"c1": fix}) as b:
            for cid in IDS:
                assert await b.io.write(cid, DRIVE)
            await clock.sleep(120.0)  # the lamp warms up
            fixed, plain = await asyncio.gather(b.io.read("c1"), b.io.read("c2"))
            assert fixed.temperature_c is not None and plain.temperature_c is not None
            assert fixed.temperature_c == pytest.approx(
                b.rack.truth("c1").probe_temperature_c - 0.5, abs=0.05
            )
            assert plain.temperature_c == pytest.approx(
                b.rack.truth("c2").probe_temperature_c, abs=0.05
            )
            # both chambers get the same drive: the corrected PAR reads twice the other's,
            # within the two sensors' 1 % noise (rig default)
            assert fixed.par == pytest.approx(2.0 * plain.par, rel=0.06)
            assert fixed.flow_cm_s == 0.0  # an offset cannot make flow negative

    virtual(body)


def test_a_link_too_slow_for_the_budget_is_reported(caplog: pytest.LogCaptureFixture) -> None:
    link = {"name": "slow", "tcp": {"host": "127.0.0.1"}, "timeout_s": 0.5}
    io_map = RigIo(modbus=[link])  # type: ignore[list-item]
    with caplog.at_level("WARNING", logger="controller.runtime._hardware_io"):
        HardwareIO(io_map, IDS, VirtualClock(START), watchdog_timeout_s=30.0, budget_s=0.8)
    assert "would not fit the 0.8 s budget" in caplog.text
    caplog.clear()
    with caplog.at_level("WARNING", logger="controller.runtime._hardware_io"):
        HardwareIO(io_map, IDS, VirtualClock(START), watchdog_timeout_s=30.0, budget_s=1.5)
    assert caplog.text == ""


def test_from_rig_uses_the_rig_files_io_table(tmp_path: Path) -> None:
    rig_file = tmp_path / "rig.toml"
    rig_file.write_text(rig_text(IDS, io='[io]\nfrom_announcement = "ports.json"\n'))
    the_rig = load_model(rig_file, Rig)
    rack = Rack(the_rig, seed=3, start_utc=START)
    settings = RunSettings(period_s=5.0, read_timeout_s=1.0, write_timeout_s=1.0)
    ports: dict = {}

    async def body(clock: VirtualClock) -> None:
        server = RackServer(rack, clock=clock)
        await server.start(ports_file=tmp_path / "ports.json")
        ports.update(json.loads((tmp_path / "ports.json").read_text()))
        io = HardwareIO.from_rig(the_rig, clock, base_dir=tmp_path, settings=settings)
        ready = asyncio.Event()
        async with io:
            task = asyncio.ensure_future(io.run(ready))
            await asyncio.wait_for(ready.wait(), 30.0)
            assert io.watchdog_timeout_s == 15.0  # three tick periods
            assert (
                decode_point(
                    point("watchdog_timeout_s"), [server.modbus.module("c1").holding_words()[4]]
                )
                == 15.0
            )
            assert (await io.read("c2")).comm_ok
            task.cancel()
            await asyncio.gather(task, return_exceptions=True)
        await server.stop()

    virtual(body)
    too_short = rig_text(IDS, io='[io]\nfrom_announcement = "ports.json"\nwatchdog_timeout_s = 7\n')
    rig_file.write_text(too_short)
    (tmp_path / "ports.json").write_text(json.dumps(ports))
    with pytest.raises(SquallError, match="between control ticks") as caught:
        HardwareIO.from_rig(
            load_model(rig_file, Rig), VirtualClock(START), base_dir=tmp_path, settings=settings
        )
    assert caught.value.field == "io.watchdog_timeout_s"
    with pytest.raises(SquallError, match=r"no \[io\] table") as caught:
        HardwareIO.from_rig(rig(IDS), VirtualClock(START), base_dir=tmp_path)
    assert caught.value.field == "io"


# --------------------------------------------------------------------------- joined exchanges


def test_the_loops_concurrent_reads_and_writes_of_a_run_take_one_request_each() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            (link,) = b.io.links.values()
            before = link.requests
            reads = await asyncio.gather(*(b.io.read(cid) for cid in IDS))
            assert link.requests - before == 1  # c1 and c2 are neighbours: one read
            assert all(r.comm_ok and r.temperature_c is not None for r in reads)
            before = link.requests
            assert all(await asyncio.gather(*(b.io.write(cid, DRIVE) for cid in IDS)))
            assert link.requests - before == 1  # drives, relays and feed of both
            assert b.actual("c1") == DRIVE and b.actual("c2") == DRIVE
            counters = [b.module(cid).holding_words()[5] for cid in IDS]
            before = link.requests
            assert all(await asyncio.gather(b.io.write("c1", OFF), b.io.write("c2", DRIVE)))
            assert link.requests - before == 1
            assert b.module("c1").coil_bits()[:4] == (False, False, False, False)
            assert b.actual("c1") == OFF and b.actual("c2") == DRIVE
            assert [b.module(cid).holding_words()[5] for cid in IDS] != counters  # both fed
            # the safe drives carried between the blocks are the ones set up
            assert (
                decode_safe_outputs(b.module("c1").holding_words()[6:10]).pump_pct == SAFE.pump_pct
            )
            before = link.requests
            assert await b.io.write("c2", DRIVE)  # alone: a request of its own
            assert link.requests - before == 1

    virtual(body)


def test_a_tripped_neighbour_makes_the_joined_write_busy_yet_both_are_driven() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock) as b:
            assert all(await asyncio.gather(*(b.io.write(cid, DRIVE) for cid in IDS)))
            module = b.module("c1")
            assert module.write_holding(4, [5]) is None  # 0.5 s watchdog, then left unfed
            b.rack.advance(1.0)
            module.refresh()
            assert module.tripped and b.actual("c1") == SAFE
            assert all(await asyncio.gather(*(b.io.write(cid, DRIVE) for cid in IDS)))
            assert not module.tripped
            assert b.actual("c1") == DRIVE and b.actual("c2") == DRIVE
            assert module.trips == 1

    virtual(body)


def test_a_silent_module_is_exchanged_with_alone_until_it_answers_again() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock, budget_s=1.5) as b:
            (link,) = b.io.links.values()
            fault = Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c1", sensor="modbus")
            b.rack.inject(fault.model_copy(update={"at_s": b.rack.t_s}))
            (run,) = set(b.io._runs.values())
            for _ in range(2):  # the first read finds out (a probe), the second knows
                silent, other = await asyncio.gather(b.io.read("c1"), b.io.read("c2"))
                assert not silent.comm_ok and other.comm_ok
                assert run.suspects == {"c1"}
            written = await asyncio.gather(*(b.io.write(cid, DRIVE) for cid in IDS))
            assert written == [False, True]  # the neighbour is still fed
            b.rack.clear_faults(FaultKind.COMM_TIMEOUT)
            reads = await asyncio.gather(*(b.io.read(cid) for cid in IDS))
            assert all(r.comm_ok for r in reads) and not run.suspects  # joined again
            before = link.requests
            reads = await asyncio.gather(*(b.io.read(cid) for cid in IDS))
            assert all(r.comm_ok for r in reads) and link.requests - before == 1
            assert all(await asyncio.gather(*(b.io.write(cid, DRIVE) for cid in IDS)))
            assert b.actual("c1") == DRIVE  # set up again after the silence, then driven

    virtual(body)


def test_a_run_silent_as_a_whole_stays_joined() -> None:
    async def body(clock: VirtualClock) -> None:
        async with bench(clock, budget_s=1.5) as b:
            (link,) = b.io.links.values()
            (run,) = set(b.io._runs.values())
            for cid in IDS:
                fault = Fault(kind=FaultKind.COMM_TIMEOUT, chamber=cid, sensor="modbus")
                b.rack.inject(fault.model_copy(update={"at_s": b.rack.t_s}))
            reads = await asyncio.gather(*(b.io.read(cid) for cid in IDS))
            assert not any(r.comm_ok for r in reads)
            assert not run.suspects  # nothing learned: going block by block would not help
            b.rack.clear_faults(FaultKind.COMM_TIMEOUT)
            before = link.requests
            reads = await asyncio.gather(*(b.io.read(cid) for cid in IDS))
            assert all(r.comm_ok for r in reads) and link.requests - before == 1

    virtual(body)
