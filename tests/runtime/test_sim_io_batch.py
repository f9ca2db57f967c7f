"""SimulatedIO.write_now commands every chamber through one batched rack call: per chamber it
must answer and remember exactly what one-by-one ``write`` calls would (a command the rack
refuses fails for that chamber alone and is not remembered as written)."""

from __future__ import annotations

import asyncio
from pathlib import Path

from controller.cli.cmd_check import load_rig
from controller.control import Outputs
from controller.rig import Fault, FaultKind
from controller.runtime import SimulatedIO
from simulator import Rack

EXAMPLE = Path(__file__).parents[2] / "rigs" / "saltmarrow-rack8.toml"


class StillClock:
    """A clock the test moves by hand, s."""

    def __init__(self) -> None:
        self.t_s = 100.0

    def now_s(self) -> float:
        return self.t_s


def test_write_now_takes_good_commands_and_refuses_a_bad_one_alone() -> None:
    clock = StillClock()
    io = SimulatedIO(Rack(load_rig(EXAMPLE), seed=1), clock, watchdog_s=30.0)  # type: ignore[arg-type]
    ids = io.chambers
    good = Outputs(heater_pct=30.0, chiller_pct=0.0, lamp_pct=50.0, pump_pct=40.0)
    bad = Outputs.unchecked(30.0, 0.0, 150.0, 40.0)  # lamp above 100 %: the rack refuses it
    clock.t_s += 10.0
    done = io.write_now({ids[4]: good, ids[5]: bad, ids[6]: good})
    assert done is not None
    assert done[ids[4]] is True and done[ids[6]] is True
    assert isinstance(done[ids[5]], ValueError) and "lamp_pct" in str(done[ids[5]])
    assert io.last_written == {ids[4]: good, ids[6]: good}
    assert io.rack.outputs(ids[6]).lamp_pct == 50.0
    assert io.rack.outputs(ids[5]).lamp_pct == 0.0
    # the refused chamber's module was never fed: its watchdog does not start, the others' do
    clock.t_s += 31.0
    io.sync()
    assert sorted(chamber for _, chamber in io.watchdog_trips) == sorted([ids[4], ids[6]])


def test_write_now_matches_write_chamber_by_chamber() -> None:
    rig = load_rig(EXAMPLE)
    at_once, one_by_one = StillClock(), StillClock()
    a = SimulatedIO(Rack(rig, seed=2), at_once)  # type: ignore[arg-type]
    b = SimulatedIO(Rack(rig, seed=2), one_by_one)  # type: ignore[arg-type]
    for t in range(12):
        commands = {
            cid: Outputs(
                heater_pct=float((9 * i + 5 * t) % 80),
                chiller_pct=float((i + t) % 3),
                lamp_pct=float((7 * i + 13 * t) % 100),
                pump_pct=float(10 + (3 * i + 11 * t) % 70),
            )
            for i, cid in enumerate(a.chambers)
        }
        at_once.t_s += 10.0
        one_by_one.t_s += 10.0
        assert a.write_now(commands) == {cid: True for cid in commands}
        for cid, outputs in commands.items():
            assert asyncio.run(b.write(cid, outputs)) is True
        assert a.last_written == b.last_written
        for cid in a.chambers:
            assert a.rack.outputs(cid) == b.rack.outputs(cid)
            assert a.rack.truth(cid) == b.rack.truth(cid)


def test_read_now_hears_a_device_fall_silent_and_answer_again_after_quiet_ticks() -> None:
    # Who answers is kept while the rack's active faults stay the same (Rack.fault_version):
    # a timeout beginning, then ending, between two ticks must still be heard at once.
    clock = StillClock()
    rack = Rack(load_rig(EXAMPLE), seed=3)
    io = SimulatedIO(rack, clock)  # type: ignore[arg-type]
    ids = io.chambers
    for _ in range(5):
        clock.t_s += 10.0
        assert io.read_now(ids) is not None
    version = rack.fault_version
    timeout = Fault(
        kind=FaultKind.COMM_TIMEOUT, chamber=ids[3], at_s=rack.t_s + 15.0, duration_s=20.0
    )
    rack.inject(timeout)
    clock.t_s += 10.0
    assert io.read_now(ids) is not None  # not begun yet
    assert io.write_now({ids[3]: Outputs.unchecked(0.0, 0.0, 0.0, 0.0)}) is not None
    clock.t_s += 10.0
    assert io.read_now(ids) is None  # began as the rack advanced: the module is silent
    assert io.write_now({ids[3]: Outputs.unchecked(0.0, 0.0, 0.0, 0.0)}) is None
    assert rack.fault_version > version
    clock.t_s += 30.0
    assert io.read_now(ids) is not None  # ended: it answers again


def test_the_watchdog_bound_sees_every_command_and_trips_at_the_exact_moment() -> None:
    """SimulatedIO keeps a lower bound of the next watchdog trip so that a sync need not look
    at every module; a command (write or write_now) must move the next trip, and a module fed
    later than the others must trip at its own moment, not at the bound's."""
    clock = StillClock()
    io = SimulatedIO(Rack(load_rig(EXAMPLE), seed=1), clock, watchdog_s=30.0)  # type: ignore[arg-type]
    ids = io.chambers
    on = Outputs(heater_pct=30.0, chiller_pct=0.0, lamp_pct=50.0, pump_pct=40.0)
    assert io.write_now({ids[0]: on, ids[1]: on}) is not None  # fed at rack time 0
    clock.t_s += 20.0
    asyncio.run(io.write(ids[1], on))  # fed again at 20: due at 50, not 30
    clock.t_s += 9.0
    io.sync()
    assert io.watchdog_trips == []  # nothing due before 30
    clock.t_s += 6.0  # rack time 35
    io.sync()
    assert io.watchdog_trips == [(30.0, ids[0])]
    assert io.rack.outputs(ids[0]).lamp_pct == 0.0 and io.rack.outputs(ids[1]).lamp_pct == 50.0
    clock.t_s += 5.0  # rack time 40: a new command after the trip feeds ids[0] again
    assert io.write_now({ids[0]: on}) is not None
    clock.t_s += 14.0  # rack time 54
    io.sync()
    assert io.watchdog_trips == [(30.0, ids[0]), (50.0, ids[1])]
    clock.t_s += 20.0  # rack time 74: ids[0] fed at 40 trips at 70
    io.sync()
    assert io.watchdog_trips == [(30.0, ids[0]), (50.0, ids[1]), (70.0, ids[0])]
    assert io.rack.t_s == 74.0
    # every module tripped, none fed: nothing is due until a command arrives again
    asyncio.run(io.write(ids[2], on))  # fed at 74: due at 104
    clock.t_s += 40.0  # rack time 114
    io.sync()
    assert io.watchdog_trips[-1] == (104.0, ids[2])
