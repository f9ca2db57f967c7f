"""Benchmark: the simulated rack against python-control on the same thermal problem.

Simulates the example rig (rigs/saltmarrow-rack8.toml: 8 chambers, 4 in one bath, so 5
thermal nodes) for 7 days with a 1 s physics step. A seeded pseudo-random heater drive
changes at every input interval (lamps on a 12 h day at 60 %, pumps flushing at a constant
30 %). For each interval, measured side by side in this run:

- **rack, stepwise**: ``set_outputs`` on all 8 chambers then ``advance(interval)``, tick by
  tick, the way a controller drives it. For short intervals only the first
  ``--stepwise-ticks`` ticks are stepped (a rate, simulated seconds per wall second, is
  printed; the work per simulated second does not depend on the span).
- **rack, open loop**: the whole schedule at once with ``Rack.run_open_loop`` (the same
  physics and sub-step grid, integrated in vectorised blocks).
- **python-control**: the equivalent linear plant, one state per thermal node,
  C·dT/dt = P − UA·(T − T_room) − G·(T − T_in) with the rack's C, UA, G and heater power and
  each node's heater input delayed by its dead time, discretised with
  ``control.c2d(..., 1.0, method="zoh")`` and run by ``control.forced_response`` on the same
  1 s input series (run once per interval). The rack's thermal step is the same exact
  zero-order-hold discretisation of the same equation, so the two must agree to rounding.

The rack does every chamber's heat, light, O2, metabolism and sensor lags as well;
python-control only the 5 thermal states. Printed per interval: simulated seconds per wall
second of each, the ratio to python-control's (goal ≥ 10) and the largest difference of the
node temperatures from python-control's at every interval end (goal ≤ 0.001 °C), and how
far the open-loop run strays from the stepwise one (temperature and O2) where both ran.

Run: ``/work/venv/bin/python bench/bench_simulator.py [--ticks 1,10,60,600] [--days 7]``.

**Work per control tick** (``--tick-cost``): what a ``squall run --sim`` tick asks of the
rack at a 10 s tick on the example rig, with every drive changing every tick as a controller
changes them (heaters, sun-like lamps, flow-controlled pumps): ``set_outputs`` on all 8
chambers, ``advance(10)``, ``comm_ok_all`` for both devices and one ``sweep`` of every
chamber (optodes every third tick). With ``--through-io`` the same program goes through the
simulated I/O as the loop drives it at ``--speed max`` (``SimulatedIO.sync`` at the tick,
then ``read_now`` of every chamber and ``write_now`` of the drives; optodes polled every
30 s): the simulator's whole share of a tick, readings built included. Best of
``--repeats`` runs, ms per tick of the thread's CPU time (other processes on the shared
machine count less than in wall time). With
``--against TREE`` the same program runs, alternately in fresh processes, on the simulator of
another checkout (e.g. the base commit's) and the ratio is printed: measured side by side
in one run of this bench. ``/work/venv/bin/python bench/bench_simulator.py --tick-cost
[--through-io] [--against /work/main] [--tick-count 4000] [--repeats 5]``.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

import control
import gsw
import numpy as np

from controller.files import load_model
from controller.rig import Rig
from simulator import OpenLoopSchedule, Rack

RIG = Path(__file__).resolve().parent.parent / "rigs" / "saltmarrow-rack8.toml"
PUMP_PCT = 30.0
LAMP_PCT = 60.0
DAY_S = 86_400.0


def heater_schedule(n_ticks: int, n_chambers: int, seed: int) -> np.ndarray:
    """Heater drive per tick and chamber, %: a slow sine plus seeded random steps."""
    rng = np.random.default_rng(seed)
    tick = np.arange(n_ticks)[:, None]
    base = 45.0 + 25.0 * np.sin(2 * np.pi * tick / max(n_ticks / 7.0, 1.0))
    return np.clip(base + rng.uniform(-20.0, 20.0, (n_ticks, n_chambers)), 0.0, 100.0)


def lamp_schedule(n_ticks: int, n_chambers: int, tick_s: float) -> np.ndarray:
    """Lamp drive per tick and chamber, %: on for the first 12 h of every day."""
    lit = (np.arange(n_ticks) * tick_s) % DAY_S < DAY_S / 2
    return np.repeat(np.where(lit, LAMP_PCT, 0.0)[:, None], n_chambers, axis=1)


def node_drivers(rig: Rig) -> list[int]:
    """Index of the first chamber of every thermal node (the one that drives it)."""
    seen: set[str] = set()
    drivers: list[int] = []
    for i, ch in enumerate(rig.chambers):
        key = ch.bath or f"own:{ch.id}"
        if key not in seen:
            seen.add(key)
            drivers.append(i)
    return drivers


def run_stepwise(
    rig: Rig, heater: np.ndarray, lamp: np.ndarray, tick_s: float
) -> tuple[float, np.ndarray, np.ndarray]:
    """Drive a fresh rack tick by tick.

    Returns the wall seconds spent in ``set_outputs`` and ``advance`` (reading the state for
    the comparison is not timed), and the chamber temperatures (°C) and O2 (µmol L⁻¹) at every
    tick end, shape ``(ticks, N)`` each.
    """
    rack = Rack(rig, seed=1)
    ids = rack.chamber_ids
    heater_rows = heater.tolist()
    lamp_rows = lamp.tolist()
    temps = np.empty(heater.shape)
    o2 = np.empty(heater.shape)
    wall = 0.0
    for k in range(len(heater_rows)):
        row, lamps = heater_rows[k], lamp_rows[k]
        begin = time.perf_counter()
        for i, cid in enumerate(ids):
            rack.set_outputs(cid, heater_pct=row[i], lamp_pct=lamps[i], pump_pct=PUMP_PCT)
        rack.advance(tick_s)
        wall += time.perf_counter() - begin
        temps[k] = rack.water_temperatures_c()
        o2[k] = [rack.truth(cid).o2_umol_l for cid in ids] if k % 97 == 0 else np.nan
    return wall, temps, o2


def run_open_loop(
    rig: Rig, heater: np.ndarray, lamp: np.ndarray, tick_s: float
) -> tuple[float, np.ndarray, np.ndarray]:
    """The same program through ``Rack.run_open_loop``: wall s, temperatures, O2."""
    rack = Rack(rig, seed=1)
    schedule = OpenLoopSchedule.uniform(
        tick_s,
        heater_pct=heater,
        lamp_pct=lamp,
        pump_pct=np.full(heater.shape, PUMP_PCT),
    )
    begin = time.perf_counter()
    run = rack.run_open_loop(schedule)
    wall = time.perf_counter() - begin
    return wall, run.temperature_c, run.o2_umol_l


def run_python_control(rig: Rig, heater: np.ndarray, tick_s: float) -> tuple[float, np.ndarray]:
    """The thermal nodes as a linear state-space model in python-control.

    Returns the wall seconds of building, discretising and simulating the model, and the
    node temperatures (°C) at every tick end, shape ``(ticks, M)``.
    """
    probe = Rack(rig, seed=1)
    drivers = node_drivers(rig)
    room = rig.sim.room_temperature_c
    inflow = room if rig.sim.inflow_temperature_c is None else rig.sim.inflow_temperature_c
    cap, ua, g, p_max, dead, t0 = [], [], [], [], [], []
    for i in drivers:
        ch = rig.chambers[i]
        truth = probe.truth(ch.id)
        bath = rig.bath(ch.bath) if ch.bath else None
        thermal = bath.thermal if bath else ch.sim.thermal
        assert thermal is not None
        members = [c for c in rig.chambers if (c.bath or c.id) == (ch.bath or ch.id)]
        flush = 0.0
        for c in members:  # q·ρ·cp of each member's flushing, TEOS-10 water (gsw 3.6)
            frac = max(PUMP_PCT - c.sim.pump.dead_band_pct, 0.0) / (100 - c.sim.pump.dead_band_pct)
            sr = gsw.SR_from_SP(c.salinity)
            rho_cp = gsw.rho_t_exact(sr, truth.temperature_c, 0) * gsw.cp_t_exact(
                sr, truth.temperature_c, 0
            )
            flush += frac * c.sim.pump.flush_at_full_drive_l_h / 3600.0 * rho_cp / 1000.0
        cap.append(truth.heat_capacity_j_k)
        ua.append(thermal.ua_w_k)
        g.append(flush)
        p_max.append(thermal.heater_max_w)
        dead.append(thermal.dead_time_s)
        t0.append(truth.temperature_c)
    cap_a, ua_a, g_a = np.array(cap), np.array(ua), np.array(g)
    m = len(drivers)
    n_steps = round(heater.shape[0] * tick_s) + 1
    t = np.arange(n_steps, dtype=float)
    u = np.zeros((m + 2, n_steps))
    for j, i in enumerate(drivers):
        watts = heater[:, i] / 100.0 * p_max[j]
        start = np.arange(n_steps) - dead[j]  # input felt at t was commanded at t − dead time
        tick = np.floor(start / tick_s).astype(int)
        u[j] = np.where(start >= 0, watts[np.clip(tick, 0, len(watts) - 1)], 0.0)
    u[m] = room
    u[m + 1] = inflow
    a = np.diag(-(ua_a + g_a) / cap_a)
    b = np.hstack([np.diag(1.0 / cap_a), (ua_a / cap_a)[:, None], (g_a / cap_a)[:, None]])
    begin = time.perf_counter()
    plant = control.ss(a, b, np.eye(m), np.zeros((m, m + 2)))
    discrete = control.c2d(plant, 1.0, method="zoh")
    response = control.forced_response(discrete, t, u, X0=np.array(t0))
    wall = time.perf_counter() - begin
    ticks = np.arange(round(tick_s), n_steps, round(tick_s))
    return wall, np.asarray(response.outputs)[:, ticks].T


def tick_program(rig: Rig, ticks: int) -> list[list[tuple[float, float, float, float]]]:
    """Drives per tick and chamber (heater, chiller, lamp, pump; %), all changing each tick."""
    rng = np.random.default_rng(7)
    n = len(rig.chambers)
    t = np.arange(ticks)[:, None] * 10.0
    heater = np.clip(40.0 + 30.0 * np.sin(t / 5000.0) + rng.uniform(-5, 5, (ticks, n)), 0, 100)
    chiller = np.where(heater < 20.0, 10.0, 0.0)
    sun = np.clip(np.sin(2 * np.pi * (t % DAY_S) / DAY_S), 0.0, None)
    lamp = np.clip(80.0 * sun + rng.uniform(-1, 1, (ticks, n)) * (sun > 0), 0, 100)
    pump = np.clip(15.0 + 5.0 * np.sin(t / 900.0) + rng.uniform(-1, 1, (ticks, n)), 0, 100)
    return np.stack((heater, chiller, lamp, pump), axis=2).tolist()  # type: ignore[no-any-return]


class _TickClock:
    """The clock of ``--through-io``: moved by hand, one tick at a time, s."""

    def __init__(self) -> None:
        self.t_s = 0.0

    def now_s(self) -> float:
        return self.t_s


def tick_cost_through_io(ticks: int, repeats: int) -> float:
    """Best CPU time per tick of the simulator's share of a 10 s control tick, through the
    simulated I/O as the loop drives it at full speed, ms."""
    from controller.control import Outputs
    from controller.runtime import SimulatedIO

    rig = load_model(RIG, Rig)
    program = tick_program(rig, ticks)
    best = float("inf")
    for _ in range(repeats):
        clock = _TickClock()
        io = SimulatedIO(Rack(rig, seed=1), clock, step_s=10.0, watchdog_s=30.0)  # type: ignore[arg-type]
        ids = list(io.chambers)
        commands = [
            {
                cid: Outputs(heater_pct=heat, chiller_pct=cool, lamp_pct=lamp, pump_pct=pump)
                for cid, (heat, cool, lamp, pump) in zip(ids, row, strict=True)
            }
            for row in program
        ]
        begin = time.thread_time()
        for outputs in commands:
            clock.t_s += 10.0
            io.sync()
            io.read_now(ids)
            io.write_now(outputs)
        best = min(best, time.thread_time() - begin)
    return 1000.0 * best / ticks


def tick_cost(ticks: int, repeats: int) -> float:
    """Best CPU time per tick of the rack's work in a 10 s control tick, ms."""
    rig = load_model(RIG, Rig)
    program = tick_program(rig, ticks)
    best = float("inf")
    for _ in range(repeats):
        rack = Rack(rig, seed=1)
        ids = list(rack.chamber_ids)
        begin = time.thread_time()
        for k, row in enumerate(program):
            for cid, (heat, cool, lamp, pump) in zip(ids, row, strict=True):
                rack.set_outputs(
                    cid, heater_pct=heat, chiller_pct=cool, lamp_pct=lamp, pump_pct=pump
                )
            rack.advance(10.0)
            rack.comm_ok_all("modbus")
            rack.comm_ok_all("optode")
            rack.sweep(ids, [k % 3 == 0] * len(ids))
        best = min(best, time.thread_time() - begin)
    return 1000.0 * best / ticks


def tick_cost_side_by_side(against: str, ticks: int, repeats: int, through_io: bool) -> None:
    """This tree's tick cost against another checkout's, alternating fresh processes."""
    here = str(Path(__file__).resolve().parent.parent)
    found: dict[str, list[float]] = {here: [], against: []}
    mode = ["--through-io"] if through_io else []
    for _ in range(repeats):
        for tree in (against, here):
            env = {**os.environ, "PYTHONPATH": tree}
            args = [sys.executable, __file__, "--tick-cost", *mode, "--tick-count", str(ticks)]
            out = subprocess.run(
                [*args, "--repeats", "1"], env=env, capture_output=True, text=True, check=True
            )
            found[tree].append(float(out.stdout.split()[-2]))
    base, mine = min(found[against]), min(found[here])
    what = "simulator's share (through the simulated I/O)" if through_io else "rack work"
    print(f"{what} per 10 s tick, 8 chambers, best of {repeats} alternating processes:")
    print(f"  {against}: {base:.4f} ms/tick")
    print(f"  {here}: {mine:.4f} ms/tick")
    print(f"  ratio this/other: {mine / base:.3f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ticks", default="1,10,60,600", help="input intervals, s (list)")
    parser.add_argument("--days", type=float, default=7.0, help="simulated days")
    parser.add_argument(
        "--stepwise-ticks",
        type=int,
        default=100_000,
        help="most ticks stepped one by one per interval (the rate is extrapolated)",
    )
    parser.add_argument("--tick-cost", action="store_true", help="rack work per control tick")
    parser.add_argument(
        "--through-io", action="store_true", help="--tick-cost through SimulatedIO, as the loop"
    )
    parser.add_argument("--against", help="another checkout to compare the tick cost with")
    parser.add_argument("--tick-count", type=int, default=4000, help="ticks of --tick-cost")
    parser.add_argument("--repeats", type=int, default=5, help="best of this many runs")
    args = parser.parse_args()
    if args.tick_cost and args.against:
        tick_cost_side_by_side(args.against, args.tick_count, args.repeats, args.through_io)
        return
    if args.tick_cost:
        cost = tick_cost_through_io if args.through_io else tick_cost
        print(f"work per 10 s tick: {cost(args.tick_count, args.repeats):.4f} ms/tick")
        return
    rig = load_model(RIG, Rig)
    span = args.days * DAY_S
    drivers = node_drivers(rig)
    print(
        f"rig: {rig.name} ({len(rig.chambers)} chambers, {len(drivers)} thermal nodes), "
        f"{args.days:g} days, physics step {rig.sim.physics_step_s:g} s; "
        "rates in simulated s per wall s, ratio = rate / python-control's rate"
    )
    print(
        f"{'tick s':>6} | {'stepwise':>9} {'ratio':>6} {'max|ΔT| °C':>10} | "
        f"{'open loop':>9} {'ratio':>6} {'max|ΔT| °C':>10} | {'python-control':>14} | "
        f"{'open vs step ΔT °C':>18} {'ΔO2 µmol/L':>10}"
    )
    for tick_s in (float(x) for x in args.ticks.split(",")):
        n_ticks = round(span / tick_s)
        heater = heater_schedule(n_ticks, len(rig.chambers), seed=int(tick_s))
        lamp = lamp_schedule(n_ticks, len(rig.chambers), tick_s)
        pc_wall, pc_temps = run_python_control(rig, heater, tick_s)
        open_wall, open_temps, open_o2 = run_open_loop(rig, heater, lamp, tick_s)
        stepped = min(n_ticks, args.stepwise_ticks)
        step_wall, step_temps, step_o2 = run_stepwise(rig, heater[:stepped], lamp[:stepped], tick_s)
        pc_rate = n_ticks * tick_s / pc_wall
        step_rate = stepped * tick_s / step_wall
        open_rate = n_ticks * tick_s / open_wall
        step_dt = float(np.max(np.abs(step_temps[:, drivers] - pc_temps[:stepped])))
        open_dt = float(np.max(np.abs(open_temps[:, drivers] - pc_temps)))
        same_dt = float(np.max(np.abs(open_temps[:stepped] - step_temps)))
        sampled = ~np.isnan(step_o2[:, 0])
        same_o2 = float(np.max(np.abs(open_o2[:stepped][sampled] - step_o2[sampled])))
        part = "" if stepped == n_ticks else f"  (stepwise: first {stepped * tick_s / DAY_S:.2f} d)"
        print(
            f"{tick_s:6g} | {step_rate:9.0f} {step_rate / pc_rate:6.1f} {step_dt:10.1e} | "
            f"{open_rate:9.0f} {open_rate / pc_rate:6.1f} {open_dt:10.1e} | "
            f"{pc_rate:9.0f} ({pc_wall:4.1f} s) | {same_dt:18.1e} {same_o2:10.1e}{part}"
        )
    print(
        "stepwise: set_outputs on 8 chambers + advance per tick (state reads not timed); open "
        "loop: Rack.run_open_loop on the whole schedule;\npython-control: c2d zoh at 1 s + "
        "forced_response, thermal nodes only, one run per interval. "
        "Goal: ratio >= 10, max |ΔT| <= 0.001 °C."
    )


if __name__ == "__main__":
    main()
