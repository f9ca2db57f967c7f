"""Benchmark: the simulated rack against python-control on the same thermal problem.

Simulates the example rig (rigs/saltmarrow-rack8.toml: 8 chambers, 4 in one bath, so 5
thermal nodes) for 7 days with a 1 s physics step. A seeded pseudo-random heater drive
changes every control tick (lamps on a 12 h day, pumps flushing at a constant 30 %), the
way a controller would drive it. The equivalent linear plant (one state per thermal node,
C·dT/dt = P − UA·(T − T_room) − G·(T − T_in), same C, UA, G and heater power, each node's
heater input shifted by its dead time) is run through python-control
(``c2d(..., method="zoh")`` and ``forced_response``) on the same 1 s input series, in the
same process, side by side. The rack does everything else too (oxygen, light, sensors);
python-control only the thermal states.

Printed per tick length: simulated seconds per wall second, the wall-time ratio
(python-control / rack) and the largest temperature difference at the tick boundaries.
Goal: ratio ≥ 10, difference ≤ 0.001 °C. Each ``advance`` call has a fixed cost (one
vectorised segment of some sixty numpy operations), so the ratio grows with the tick length:
short ticks are dominated by that cost, long ticks by the per-sub-step work.

Run: ``/work/venv/bin/python bench/bench_simulator.py [--ticks 60,600] [--days 7]``.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import control
import gsw
import numpy as np

from controller.files import load_model
from controller.rig import Rig
from simulator import Rack

RIG = Path(__file__).resolve().parent.parent / "rigs" / "saltmarrow-rack8.toml"
PUMP_PCT = 30.0


def heater_schedule(n_ticks: int, n_chambers: int, seed: int) -> np.ndarray:
    """Heater drive per tick and chamber, %: a slow sine plus seeded random steps."""
    rng = np.random.default_rng(seed)
    tick = np.arange(n_ticks)[:, None]
    base = 45.0 + 25.0 * np.sin(2 * np.pi * tick / max(n_ticks / 7.0, 1.0))
    return np.clip(base + rng.uniform(-20.0, 20.0, (n_ticks, n_chambers)), 0.0, 100.0)


def run_rack(rig: Rig, drives: np.ndarray, tick_s: float, sample: bool) -> tuple[float, np.ndarray]:
    """Drive a fresh rack tick by tick; return wall seconds and node temperatures per tick."""
    rack = Rack(rig, seed=1)
    ids = rack.chamber_ids
    drivers = _node_drivers(rig)
    samples = np.empty((drives.shape[0] + 1, len(drivers)))
    if sample:
        samples[0] = [rack.truth(ids[i]).temperature_c for i in drivers]
    start = time.perf_counter()
    for k, row in enumerate(drives):
        lamp = 60.0 if (k * tick_s) % 86400.0 < 43200.0 else 0.0
        for i, cid in enumerate(ids):
            rack.set_outputs(cid, heater_pct=float(row[i]), lamp_pct=lamp, pump_pct=PUMP_PCT)
        rack.advance(tick_s)
        if sample:
            samples[k + 1] = [rack.truth(ids[i]).temperature_c for i in drivers]
    return time.perf_counter() - start, samples


def _node_drivers(rig: Rig) -> list[int]:
    """Index of the first chamber of every thermal node (the one that drives it)."""
    seen: set[str] = set()
    drivers: list[int] = []
    for i, ch in enumerate(rig.chambers):
        key = ch.bath or f"own:{ch.id}"
        if key not in seen:
            seen.add(key)
            drivers.append(i)
    return drivers


def run_python_control(rig: Rig, drives: np.ndarray, tick_s: float) -> tuple[float, np.ndarray]:
    """The same thermal nodes as a linear state-space model in python-control."""
    probe = Rack(rig, seed=1)
    drivers = _node_drivers(rig)
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
        for c in members:  # q·ρ·cp of each member's flushing, TEOS-10 water (gsw)
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
    n_steps = round(drives.shape[0] * tick_s) + 1
    t = np.arange(n_steps, dtype=float)
    u = np.zeros((m + 2, n_steps))
    for j, i in enumerate(drivers):
        watts = drives[:, i] / 100.0 * p_max[j]
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
    ticks = np.arange(0, n_steps, round(tick_s))
    return wall, np.asarray(response.outputs)[:, ticks].T


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--ticks", default="60,600,3600", help="control tick lengths, s (comma list)"
    )
    parser.add_argument("--days", type=float, default=7.0, help="simulated days")
    args = parser.parse_args()
    rig = load_model(RIG, Rig)
    span = args.days * 86400.0
    print(
        f"rig: {rig.name} ({len(rig.chambers)} chambers, {len(_node_drivers(rig))} thermal"
        f" nodes), {args.days:g} days, physics step {rig.sim.physics_step_s:g} s"
    )
    print(
        f"{'tick s':>7} {'rack wall s':>12} {'sim s / wall s':>15} {'python-control s':>17}"
        f" {'ratio':>7} {'max |ΔT| °C':>12}"
    )
    for tick_s in (float(x) for x in args.ticks.split(",")):
        n_ticks = round(span / tick_s)
        drives = heater_schedule(n_ticks, len(rig.chambers), seed=int(tick_s))
        rack_wall, _ = run_rack(rig, drives, tick_s, sample=False)
        _, rack_temps = run_rack(rig, drives, tick_s, sample=True)
        pc_wall, pc_temps = run_python_control(rig, drives, tick_s)
        diff = float(np.max(np.abs(rack_temps - pc_temps)))
        ratio = pc_wall / rack_wall
        verdict = "goal met" if ratio >= 10.0 and diff <= 1e-3 else "below goal"
        print(
            f"{tick_s:7g} {rack_wall:12.2f} {span / rack_wall:15.0f} {pc_wall:17.2f}"
            f" {ratio:7.1f} {diff:12.2e}  {verdict}"
        )
    print(
        "rack: every chamber's heat, light, O2 and sensors, stepped tick by tick through "
        "set_outputs/advance;\npython-control: the thermal states only, whole run in one call. "
        "Goal: ratio >= 10, max |ΔT| <= 0.001 °C."
    )


if __name__ == "__main__":
    main()
