"""Open-loop programs: Rack.run_open_loop gives the trajectories of stepping the rack."""

from __future__ import annotations

from pathlib import Path

import control
import numpy as np
import pytest
from sim_rigs import chamber, rack, thermal

from controller.files import load_model
from controller.rig import Rig
from simulator import Fault, FaultKind, OpenLoopSchedule, Rack

EXAMPLE = Path(__file__).resolve().parents[2] / "rigs" / "saltmarrow-rack8.toml"
FIELDS = ("temperature_c", "o2_umol_l", "par", "probe_temperature_c", "optode_o2_umol_l")


def _random_schedule(seed: int, rows: int, chambers: int) -> OpenLoopSchedule:
    """Rows of 1–61.5 s (some off the 1 s step grid) and one long row, random drives."""
    rng = np.random.default_rng(seed)
    length = rng.choice([1.0, 2.0, 7.3, 10.0, 60.0, 61.5], size=rows)
    length[rows // 3] = 5000.0  # longer than 3600 sub-steps: cut like advance() cuts it
    switch = np.concatenate(([0.0], np.cumsum(length[:-1])))
    lamp = np.repeat(rng.choice([0.0, 30.0, 80.0], size=(rows // 40 + 1, chambers)), 40, axis=0)
    pump = np.repeat(rng.choice([0.0, 20.0, 60.0], size=(rows // 60 + 1, chambers)), 60, axis=0)
    return OpenLoopSchedule(
        switch_s=switch,
        end_s=float(switch[-1] + length[-1]),
        heater_pct=rng.uniform(0.0, 100.0, (rows, chambers)),
        chiller_pct=np.where(rng.random((rows, chambers)) < 0.3, 40.0, 0.0),
        lamp_pct=lamp[:rows],
        pump_pct=pump[:rows],
    )


def _step(r: Rack, schedule: OpenLoopSchedule) -> np.ndarray:
    """Run a schedule by set_outputs/advance; the state at every row end, (5, K, N)."""
    ends = np.append(schedule.switch_s[1:], schedule.end_s)
    out = np.empty((5, len(ends), len(r.chamber_ids)))
    for k, end in enumerate(ends):
        for i, cid in enumerate(r.chamber_ids):
            r.set_outputs(
                cid,
                heater_pct=None if schedule.heater_pct is None else schedule.heater_pct[k, i],
                chiller_pct=None if schedule.chiller_pct is None else schedule.chiller_pct[k, i],
                lamp_pct=None if schedule.lamp_pct is None else schedule.lamp_pct[k, i],
                pump_pct=None if schedule.pump_pct is None else schedule.pump_pct[k, i],
            )
        r.advance(float(end - schedule.switch_s[k]))
        for i, cid in enumerate(r.chamber_ids):
            truth = r.truth(cid)
            out[:, k, i] = [getattr(truth, name) for name in FIELDS]
    return out


def _assert_same(stepped: Rack, batch: Rack, expected: np.ndarray, run: object) -> None:
    got = np.stack([getattr(run, name) for name in FIELDS])
    assert np.max(np.abs(got[0] - expected[0])) <= 1e-9  # °C
    assert np.max(np.abs(got[1] - expected[1])) <= 1e-6  # µmol/L
    assert np.max(np.abs(got[2] - expected[2]) / np.maximum(expected[2], 1.0)) <= 1e-9
    assert np.max(np.abs(got[3] - expected[3])) <= 1e-9
    assert np.max(np.abs(got[4] - expected[4])) <= 1e-6
    assert batch.t_s == pytest.approx(stepped.t_s, abs=1e-9)
    for cid in stepped.chamber_ids:
        a, b = stepped.truth(cid), batch.truth(cid)
        assert b.temperature_c == pytest.approx(a.temperature_c, abs=1e-9)
        assert b.o2_umol_l == pytest.approx(a.o2_umol_l, abs=1e-6)
        assert b.heater_energy_j == pytest.approx(a.heater_energy_j, rel=1e-9, abs=1e-6)
        assert b.chiller_energy_j == pytest.approx(a.chiller_energy_j, rel=1e-9, abs=1e-6)
        assert b.room_loss_j == pytest.approx(a.room_loss_j, rel=1e-9, abs=1e-3)
        assert b.flush_loss_j == pytest.approx(a.flush_loss_j, rel=1e-9, abs=1e-3)
        assert b.lamp_hours_h == pytest.approx(a.lamp_hours_h, rel=1e-12)
        assert b.water_volume_l == pytest.approx(a.water_volume_l, rel=1e-12)
        assert batch.outputs(cid) == stepped.outputs(cid)


def test_open_loop_matches_stepping_on_a_random_schedule() -> None:
    rig = load_model(EXAMPLE, Rig)
    schedule = _random_schedule(seed=7, rows=600, chambers=len(rig.chambers))
    stepped, batch = Rack(rig, seed=3), Rack(rig, seed=3)
    expected = _step(stepped, schedule)
    run = batch.run_open_loop(schedule)
    assert np.array_equal(run.t_s, np.append(schedule.switch_s[1:], schedule.end_s))
    _assert_same(stepped, batch, expected, run)
    # the rack goes on from where the program left it, exactly as the stepped one does
    for r in (stepped, batch):
        r.set_outputs("C5", heater_pct=90.0)
        r.advance(120.0)
    assert batch.truth("C5").temperature_c == pytest.approx(
        stepped.truth("C5").temperature_c, abs=1e-9
    )


def test_open_loop_matches_stepping_through_faults_and_a_leak() -> None:
    rig = load_model(EXAMPLE, Rig)
    schedule = _random_schedule(seed=11, rows=450, chambers=len(rig.chambers))
    faults = [
        Fault(kind=FaultKind.HEATER_STUCK_ON, chamber="C6", at_s=2000.0, duration_s=3000.0),
        Fault(kind=FaultKind.PUMP_FAILURE, chamber="C2", at_s=1500.5, duration_s=1800.0),
        Fault(kind=FaultKind.CHILLER_FAILURE, chamber="C3", at_s=900.0, duration_s=2000.0),
        Fault(kind=FaultKind.POWER_LOSS, at_s=7000.25, duration_s=900.0),
        Fault(kind=FaultKind.LEAK, chamber="C8", magnitude=0.5, at_s=4000.0, duration_s=1500.0),
        Fault(kind=FaultKind.STUCK, chamber="C7", sensor="temperature", at_s=3000.0),
    ]
    stepped, batch = Rack(rig, seed=3), Rack(rig, seed=3)
    for r in (stepped, batch):
        for fault in faults:
            r.inject(fault)
    expected = _step(stepped, schedule)
    run = batch.run_open_loop(schedule)
    _assert_same(stepped, batch, expected, run)
    # the stuck probe froze the same reading (the same noise, sd 0.01 °C, drawn at the same
    # moment; the lagged value under it agrees to rounding)
    assert batch.read_temperature("C7") == pytest.approx(stepped.read_temperature("C7"), abs=1e-9)
    assert batch.read_temperature("C1") == pytest.approx(stepped.read_temperature("C1"), abs=1e-9)


def test_open_loop_keeps_the_oxygen_floor_at_zero() -> None:
    # Respiration far above what flushing brings in: O2 runs out, stays at 0, then recovers
    # in the light; the floored recurrence must give the stepping result.
    # 1 L over 0.05 m²: dark respiration takes 0.56 µmol L⁻¹ s⁻¹, flushing (C1, open) brings
    # back at most 2.5 h⁻¹·(C_sat − C) ≈ 0.2 µmol L⁻¹ s⁻¹; C2 is closed.
    bio = {"gpp_max_umol_m2_h": 100000.0, "resp_umol_m2_h": 40000.0, "ik_umol_m2_s": 200.0}
    chambers = [
        chamber(
            f"C{i}",
            water_volume_l=1.0,
            sim={
                "biology": bio,
                "pump": {"flush_at_full_drive_l_h": 2.0, "dead_band_pct": 0.0},
                "thermal": thermal(ua_w_k=5.0),
            },
        )
        for i in (1, 2)
    ]
    rows = 1200
    lamp = np.where((np.arange(rows) // 300) % 2 == 1, 100.0, 0.0)
    schedule = OpenLoopSchedule.uniform(
        2.0,
        lamp_pct=np.stack((lamp, lamp[::-1]), axis=1),
        pump_pct=np.stack((np.full(rows, 100.0), np.zeros(rows)), axis=1),
    )
    stepped, batch = rack(*chambers, seed=1), rack(*chambers, seed=1)
    expected = _step(stepped, schedule)
    run = batch.run_open_loop(schedule)
    assert (expected[1] == 0.0).any() and (expected[1] > 10.0).any()
    _assert_same(stepped, batch, expected, run)


def test_open_loop_thermal_node_matches_python_control() -> None:
    # Reference: python-control (c2d with zero-order hold at 1 s, forced_response) on
    # C·dT/dt = P − UA·(T − T_room), the same heater series; both are exact ZOH steps.
    r = rack(chamber(water_volume_l=40.0, sim={"thermal": thermal(ua_w_k=3.0, heater_max_w=200.0)}))
    cap = r.truth("C1").heat_capacity_j_k
    rng = np.random.default_rng(5)
    drive = rng.uniform(0.0, 100.0, 3600)
    run = r.run_open_loop(OpenLoopSchedule.uniform(1.0, heater_pct=drive[:, None]))
    plant = control.ss([[-3.0 / cap]], [[1.0 / cap, 3.0 / cap]], [[1.0]], [[0.0, 0.0]])
    u = np.vstack((np.append(drive * 2.0, 0.0), np.full(3601, 20.0)))
    reference = control.forced_response(
        control.c2d(plant, 1.0, method="zoh"), np.arange(3601.0), u, X0=[20.0]
    )
    expected = np.asarray(reference.outputs).reshape(-1)[1:]
    assert np.max(np.abs(run.temperature_c[:, 0] - expected)) <= 1e-9


def test_schedule_is_checked() -> None:
    ok = np.zeros((3, 2))
    with pytest.raises(ValueError, match="start at 0"):
        OpenLoopSchedule(switch_s=np.array([1.0, 2.0, 3.0]), end_s=4.0, heater_pct=ok)
    with pytest.raises(ValueError, match="increase"):
        OpenLoopSchedule(switch_s=np.array([0.0, 2.0, 2.0]), end_s=4.0, heater_pct=ok)
    with pytest.raises(ValueError, match="increase"):
        OpenLoopSchedule(switch_s=np.array([0.0, 1.0, 2.0]), end_s=2.0, heater_pct=ok)
    with pytest.raises(ValueError, match="0–100"):
        OpenLoopSchedule.uniform(1.0, lamp_pct=np.full((3, 2), 101.0))
    with pytest.raises(ValueError, match="0–100"):
        OpenLoopSchedule.uniform(1.0, pump_pct=np.full((3, 2), np.nan))
    with pytest.raises(ValueError, match="rows"):
        OpenLoopSchedule(switch_s=np.array([0.0, 1.0]), end_s=4.0, heater_pct=ok)
    with pytest.raises(ValueError, match="at least one"):
        OpenLoopSchedule.uniform(1.0)
    with pytest.raises(ValueError, match="chambers"):
        rack().run_open_loop(OpenLoopSchedule.uniform(1.0, heater_pct=ok))


def test_uniform_schedule_and_actuators_left_alone() -> None:
    schedule = OpenLoopSchedule.uniform(30.0, heater_pct=np.full((4, 1), 50.0))
    assert schedule.switch_s.tolist() == [0.0, 30.0, 60.0, 90.0]
    assert schedule.end_s == 120.0
    r = rack(chamber(sim={"lamp": {"par_at_full_drive": 500.0, "curve_shape": 0.0}}))
    r.set_outputs("C1", lamp_pct=40.0)
    r.advance(10.0)
    run = r.run_open_loop(schedule)
    assert r.outputs("C1").lamp_pct == 40.0  # not in the program: as commanded before
    assert r.outputs("C1").heater_pct == 50.0
    assert run.par[:, 0] == pytest.approx(200.0)
    assert run.t_s.tolist() == [40.0, 70.0, 100.0, 130.0]
    assert r.water_temperatures_c()[0] == r.truth("C1").temperature_c
