"""Conflict checks, one kind at a time, with the messages people will read; and the heat
demand physics against a hand calculation with TEOS-10 (gsw)."""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path

import gsw
import numpy as np
import pytest

from controller.schedule import (
    ConflictKind,
    bath_conflicts,
    booking_conflicts,
    find_conflicts,
    format_when,
    load_grid,
    node_demand_w,
    node_loads,
    power_conflicts,
    water_rho_cp_j_l_k,
)

from ._helpers import START, Group, booking, rig, rig_text, write_protocol, write_rig

HOLD = '{{ kind = "hold", value = {} }}'
H1 = '{ kind = "hold", value = 20.0, duration = "1h" }'
"""An hour at 20 °C (room temperature): ramps start from it."""


def hold(value: float) -> str:
    return HOLD.format(value)


def rho_cp(salinity: float, temp_c: float) -> float:
    """ρ·cp of seawater, J L⁻¹ K⁻¹, straight from gsw (TEOS-10, IOC et al. 2010)."""
    sr = gsw.SR_from_SP(salinity)
    return float(gsw.rho_t_exact(sr, temp_c, 0) * gsw.cp_t_exact(sr, temp_c, 0) / 1000.0)


# -- time ------------------------------------------------------------------------------------


def test_a_chamber_booked_twice_names_the_chamber_the_experiment_and_its_span(
    tmp_path: Path,
) -> None:
    the_rig = rig(write_rig(tmp_path))
    mine = booking(write_protocol(tmp_path, "a.toml", groups={"a": Group(["S1", "S2"])}))
    theirs = booking(
        write_protocol(tmp_path, "b.toml", groups={"b": Group(["S2"])}),
        START + timedelta(hours=12),
        label="E0002 'Warm' (Ana)",
        experiment_id="E0002",
    )
    [conflict] = booking_conflicts(mine, [theirs], the_rig)
    assert conflict.kind is ConflictKind.CHAMBER_BOOKED
    assert conflict.message == (
        "chamber S2 is booked by E0002 'Warm' (Ana) from 2027-07-10T18:00Z "
        "(local 2027-07-10T19:00+01:00) to 2027-07-11T18:00Z (local 2027-07-11T19:00+01:00)"
    )
    assert conflict.at_utc == START + timedelta(hours=12)
    assert conflict.experiments == ("E0002",)


def test_a_busy_rig_refuses_other_chambers_too_and_says_why(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path))
    mine = booking(write_protocol(tmp_path, "a.toml", groups={"a": Group(["S1", "S2"])}))
    theirs = booking(
        write_protocol(tmp_path, "b.toml", groups={"b": Group(["B1", "B2"])}),
        START - timedelta(hours=2),
        label="E0001 'Cold' (Bo)",
        experiment_id="E0001",
    )
    [conflict] = booking_conflicts(mine, [theirs], the_rig)
    assert conflict.kind is ConflictKind.RIG_BUSY
    assert conflict.message.startswith(
        "rig 'Test rack' is busy with E0001 'Cold' (Bo) from 2027-07-10T04:00Z"
    )
    assert conflict.message.endswith(
        "(chambers B1, B2); serve runs one experiment per rig at a time — put both "
        "treatments in one protocol"
    )
    assert conflict.at_utc == START


def test_back_to_back_experiments_do_not_collide(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path))
    protocol = write_protocol(tmp_path)
    first = booking(protocol, label="E0001 'x' (y)", experiment_id="E0001")
    second = booking(protocol, first.end_utc)
    assert booking_conflicts(second, [first], the_rig) == []
    assert booking_conflicts(booking(protocol, first.end_utc - timedelta(seconds=1)),
                             [first], the_rig) != []  # fmt: skip


# -- the protocol against the rig ------------------------------------------------------------


def test_a_chamber_the_rig_lacks_is_blamed_on_its_place_in_the_protocol(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path))
    candidate = booking(write_protocol(tmp_path, groups={"a": Group(["S1", "C9"])}))
    conflicts, _ = find_conflicts(candidate, [], the_rig)
    assert conflicts[0].kind is ConflictKind.UNKNOWN_CHAMBER
    assert conflicts[0].field == "groups.a.chambers.1"
    assert conflicts[0].message == (
        "chamber 'C9' is not in rig 'Test rack' (it has B1, B2, S1, S2)"
    )


@pytest.mark.parametrize(
    ("group", "needle", "first_h"),
    [
        (Group(["S1"], temperature=hold(38.0)), "temperature setpoint 38 °C is above", 0.0),
        (
            Group(["S1"], temperature=f'{H1}, {{ kind = "ramp", to = 36.0, duration = "8h" }}'),
            "temperature setpoint 36 °C is above",
            8.5,  # 20 → 36 °C from 07:00Z at 2 °C/h passes 35 °C at 14:30Z
        ),
        (Group(["S1"], light=hold(1200.0)), "PAR setpoint reaches 1200", 0.0),
        (Group(["S1"], flow=hold(25.0)), "flow setpoint reaches 25 cm s-1", 0.0),
        (
            Group(["S1"], temperature=f'{H1}, {{ kind = "ramp", to = 26.0, duration = "1h" }}'),
            "temperature changes at up to 6 °C/h",
            1.0,
        ),
    ],
    ids=["temperature", "crossing", "par", "flow", "ramp"],
)
def test_programs_beyond_a_chambers_limits_are_refused_with_the_block_to_blame(
    tmp_path: Path, group: Group, needle: str, first_h: float
) -> None:
    the_rig = rig(write_rig(tmp_path))
    candidate = booking(write_protocol(tmp_path, groups={"a": group}))
    conflicts, _ = find_conflicts(candidate, [], the_rig)
    limits = [c for c in conflicts if c.kind is ConflictKind.CHAMBER_LIMITS]
    assert len(limits) == 1, conflicts
    assert limits[0].message.startswith("chamber S1: ")
    assert needle in limits[0].message
    at = START + timedelta(hours=first_h)
    assert limits[0].at_utc == at
    assert limits[0].message.endswith(f"; first at {format_when(at, 'Etc/GMT-1')}")
    assert limits[0].field is not None and limits[0].field.startswith("phases.0.groups.a.")
    assert limits[0].time_independent


# -- baths -----------------------------------------------------------------------------------


def test_chambers_of_one_bath_with_different_programs_are_refused(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path))
    candidate = booking(
        write_protocol(
            tmp_path,
            groups={"warm": Group(["B1"], temperature=hold(24.0)), "cool": Group(["B2"])},
        )
    )
    conflicts, _ = find_conflicts(candidate, [], the_rig)
    [bath] = [c for c in conflicts if c.kind is ConflictKind.BATH_PROGRAM]
    assert bath.message == (
        "chambers B1 and B2 share bath 'tank' (one body of water) but get different "
        "temperature programs: at 2027-07-10T06:00Z (local 2027-07-10T07:00+01:00) (B1 24 °C, "
        "B2 20 °C); put chambers of one bath in one group or give them the same temperature"
    )
    assert bath.field == "groups.cool.chambers.0"
    assert bath.time_independent


def test_bath_programs_are_compared_across_experiments_live_at_the_same_time(
    tmp_path: Path,
) -> None:
    the_rig = rig(write_rig(tmp_path))
    ramp = f'{H1}, {{ kind = "ramp", to = 22.0, duration = "2h" }}, ' + hold(22.0)
    theirs = booking(
        write_protocol(tmp_path, "b.toml", groups={"b": Group(["B2"], temperature=ramp)}),
        START - timedelta(hours=6),
        label="E0004 'Ramp' (Cy)",
        experiment_id="E0004",
    )
    mine = booking(write_protocol(tmp_path, "a.toml", groups={"a": Group(["B1"])}))
    [bath] = bath_conflicts([mine, theirs], the_rig)
    # they already differ when mine starts: theirs reached 22 °C at 02:00Z
    assert "B1 (this experiment) and B2 (E0004 'Ramp' (Cy)) share" in bath.message
    assert "at 2027-07-10T06:00Z (local 2027-07-10T07:00+01:00) (B1 20 °C, B2 22 °C)" in (
        bath.message
    )
    assert bath.experiments == ("E0004",)
    assert not bath.time_independent
    # the same program in both agrees
    same = booking(write_protocol(tmp_path, "c.toml", groups={"a": Group(["B1"])}),
                   START - timedelta(hours=6), label="E0005 'Same' (Di)",
                   experiment_id="E0005")  # fmt: skip
    assert bath_conflicts([mine, same], the_rig) == []


def test_a_bath_difference_that_grows_inside_a_ramp_is_dated_from_the_ramp_start(
    tmp_path: Path,
) -> None:
    the_rig = rig(write_rig(tmp_path))
    ramp = f'{H1}, {{ kind = "ramp", to = 21.0, duration = "2h" }}, ' + hold(21.0)
    candidate = booking(
        write_protocol(
            tmp_path,
            groups={"a": Group(["B1"]), "b": Group(["B2"], temperature=hold(20.0) + "")},
            duration="1d",
        )
    )
    assert bath_conflicts([candidate], the_rig) == []
    candidate = booking(
        write_protocol(tmp_path, "r.toml",
                       groups={"a": Group(["B1"]), "b": Group(["B2"], temperature=ramp)})
    )  # fmt: skip
    [bath] = bath_conflicts([candidate], the_rig)
    assert "from 2027-07-10T07:00Z (local 2027-07-10T08:00+01:00) (at 2027-07-10T09:00Z" in (
        bath.message
    )
    assert "(local 2027-07-10T10:00+01:00): B1 20 °C, B2 21 °C)" in bath.message


# -- heat demand -----------------------------------------------------------------------------


def test_node_demand_matches_a_hand_calculation_with_teos10_heat_capacity(tmp_path: Path) -> None:
    """P = UA·(T − T_room) + C·dT/dt + ρcp·q·(T − T_in), checked term by term.

    Source of cp and ρ: TEOS-10 (IOC, SCOR and IAPSO 2010) through gsw 3.6, called here
    independently of the code under test.
    """
    the_rig = rig(write_rig(tmp_path, flush_l_h=36.0))
    ramp = (
        hold(14.0).replace("}", ', duration = "6h" }')
        + ', { kind = "ramp", to = 10.0, duration = "2h" }, '
        + hold(10.0)
    )
    candidate = booking(
        write_protocol(
            tmp_path,
            groups={
                "a": Group(["S1"], temperature=ramp, flow=hold(10.0)),
                "b": Group(["B1", "B2"], temperature=ramp),
            },
        )
    )
    times = [START + timedelta(hours=h) for h in (5, 7, 12)]
    demand = node_demand_w(candidate, the_rig, times)
    room, inflow = 20.0, 20.0
    middle = (14.0 + 10.0) / 2.0
    # S1: own 10 L, UA 2 W/K, flushed at 36 L/h × 10/20 cm/s = 18 L/h
    c_s1 = rho_cp(35.0, middle) * 10.0
    q_l_s = 36.0 / 3600.0 * 10.0 / 20.0
    g_s1 = rho_cp(35.0, middle) * q_l_s
    expect_s1 = [
        2.0 * (14.0 - room) + g_s1 * (14.0 - inflow),  # hold at 14 °C (pull-down over by 3 h)
        2.0 * (12.0 - room) + c_s1 * (-2.0 / 3600.0) + g_s1 * (12.0 - inflow),  # mid-ramp
        2.0 * (10.0 - room) + g_s1 * (10.0 - inflow),  # hold at 10 °C
    ]
    np.testing.assert_allclose(demand["S1"], expect_s1, rtol=1e-9)
    # tank: 40 L of bath water plus B1 and B2 (10 L each), UA 10 W/K, not flushed
    c_tank = rho_cp(35.0, middle) * 60.0
    expect_tank = [10.0 * (14.0 - room), 10.0 * (12.0 - room) - c_tank * 2.0 / 3600.0,
                   10.0 * (10.0 - room)]  # fmt: skip
    np.testing.assert_allclose(demand["tank"], expect_tank, rtol=1e-9)
    assert "S2" not in demand  # not used by the protocol: held safe, draws nothing
    # hand-check the numbers themselves once: UA·ΔT is 2 W/K × 8 K, and the ramp term of
    # the tank is about 60 L × 4.1 kJ L⁻¹ K⁻¹ × 2 K/h ≈ 137 W
    assert expect_s1[2] == pytest.approx(-20.0 - g_s1 * 10.0)
    assert c_tank * 2.0 / 3600.0 == pytest.approx(136.6, abs=0.5)


def test_seawater_heat_capacity_agrees_with_published_values() -> None:
    # Seawater, S = 35, 20 °C, 1 atm: cp ≈ 3993 J kg⁻¹ K⁻¹ (UNESCO 1983 EOS-80 algorithms,
    # Millero et al. 1973; from memory) and ρ ≈ 1024.8 kg m⁻³ (UNESCO 1983, from memory);
    # TEOS-10 differs from EOS-80 by less than 0.1 %.
    assert water_rho_cp_j_l_k(35.0, 20.0) == pytest.approx(3993.0 * 1.0248, rel=2e-3)
    # Pure water at 20 °C and 1 atm: ρ = 998.21 kg m⁻³, cp = 4.184 kJ kg⁻¹ K⁻¹ (IAPWS-95,
    # from memory).
    assert water_rho_cp_j_l_k(0.0, 20.0) == pytest.approx(4184.0 * 0.99821, rel=1e-3)


def test_the_start_pulls_the_water_from_room_temperature_at_the_fastest_ramp(
    tmp_path: Path,
) -> None:
    the_rig = rig(write_rig(tmp_path))
    candidate = booking(
        write_protocol(tmp_path, groups={"a": Group(["S1"], temperature=hold(16.0))})
    )
    [load] = node_loads([candidate], the_rig)
    # 4 K at 2 °C/h: two hours of C × 2 K/h of cooling on top of UA·ΔT
    ((start_s, end_s, watts),) = load.follows
    assert (start_s, end_s) == (0.0, 7200.0)
    assert watts == pytest.approx(-load.c_j_k * 2.0 / 3600.0)
    before, after = node_demand_w(
        candidate, the_rig, [START + timedelta(hours=1), START + timedelta(hours=3)]
    )["S1"]
    assert before == pytest.approx(-8.0 + watts)
    assert after == pytest.approx(-8.0)


def test_a_shared_chiller_over_capacity_is_refused_with_each_nodes_share(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path, chiller_capacity=200.0))
    cold = hold(12.0)
    candidate = booking(
        write_protocol(
            tmp_path,
            groups={"bath": Group(["B1", "B2"], temperature=cold),
                    "own": Group(["S1", "S2"], temperature=cold)},
        )
    )  # fmt: skip
    conflicts, peaks = find_conflicts(candidate, [], the_rig)
    [plant] = [c for c in conflicts if c.kind is ConflictKind.PLANT_CAPACITY]
    c_tank = rho_cp(35.0, 12.0) * 60.0
    c_own = rho_cp(35.0, 12.0) * 10.0
    tank = 10.0 * 8.0 + c_tank * 2.0 / 3600.0  # UA·ΔT + pull-down at 2 °C/h
    own = 2.0 * 8.0 + c_own * 2.0 / 3600.0
    total = tank + 2 * own
    assert plant.message == (
        f"chiller 'cold-loop' would need {total:.0f} W at 2027-07-10T06:00Z "
        f"(local 2027-07-10T07:00+01:00) (capacity 200 W): tank {tank:.0f} W, "
        f"S1 {own:.0f} W, S2 {own:.0f} W"
    )
    assert plant.at_utc == START
    [peak] = [p for p in peaks if p.name == "chiller 'cold-loop'"]
    assert peak.peak_w == pytest.approx(total)


def test_the_first_overload_and_the_peak_are_both_reported(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path, chiller_capacity=150.0))
    program = (
        hold(20.0).replace("}", ', duration = "4h" }')
        + ', { kind = "ramp", to = 12.0, duration = "4h" }, '
        + hold(12.0)
    )
    candidate = booking(
        write_protocol(tmp_path, groups={"a": Group(["B1", "B2"], temperature=program)})
    )
    conflicts, _ = find_conflicts(candidate, [], the_rig)
    [plant] = [c for c in conflicts if c.kind is ConflictKind.PLANT_CAPACITY]
    # The ramp starts at 10:00Z: C × 2 K/h ≈ 137 W, plus UA·ΔT growing by 20 W per hour;
    # 150 W is passed during the ramp, and the need is largest (217 W) at its end, 14:00Z.
    ramp_w = rho_cp(35.0, 16.0) * 60.0 * 2.0 / 3600.0
    crossing = START + timedelta(hours=4 + (150.0 - ramp_w) / 20.0)
    assert plant.at_utc is not None
    assert abs((plant.at_utc - crossing).total_seconds()) <= 1.0
    assert plant.message.startswith(
        f"chiller 'cold-loop' would need more than its 150 W from {crossing:%Y-%m-%dT%H:%M}"
    )
    assert plant.message.endswith(
        f", {ramp_w + 80.0:.0f} W at 2027-07-10T14:00Z (local 2027-07-10T15:00+01:00): "
        f"tank {ramp_w + 80.0:.0f} W"
    )


def test_a_peak_later_than_the_first_overload_is_reported_too(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path, chiller_capacity=35.0))
    six_h = ', duration = "6h" }'
    program = ", ".join([hold(16.0).replace("}", six_h), hold(12.0).replace("}", six_h), hold(8.0)])
    candidate = booking(write_protocol(tmp_path, groups={"a": Group(["S1"], temperature=program)}))
    conflicts, _ = find_conflicts(candidate, [], the_rig)
    [plant] = [c for c in conflicts if c.kind is ConflictKind.PLANT_CAPACITY]
    # Each step down is followed at 2 °C/h (C × 2 K/h ≈ 23 W) on top of UA·(T − 20 °C):
    # 8 + 23 W from 06:00Z fits, 16 + 23 W after the step at 12:00Z does not, and the step at
    # 18:00Z needs 24 + 23 W, the most.
    follow = rho_cp(35.0, 12.0) * 10.0 * 2.0 / 3600.0
    assert plant.message == (
        f"chiller 'cold-loop' would need {16 + follow:.0f} W at 2027-07-10T12:00Z (local "
        f"2027-07-10T13:00+01:00) (capacity 35 W): S1 {16 + follow:.0f} W; peak "
        f"{24 + follow:.0f} W at 2027-07-10T18:00Z (local 2027-07-10T19:00+01:00)"
    )
    assert plant.at_utc == START + timedelta(hours=6)


def test_a_nodes_own_heater_too_small_for_the_program_is_refused(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path, own_heater=30.0))
    candidate = booking(
        write_protocol(tmp_path, groups={"a": Group(["S1"], temperature=hold(30.0))})
    )
    conflicts, _ = find_conflicts(candidate, [], the_rig)
    [node] = [c for c in conflicts if c.kind is ConflictKind.NODE_CAPACITY]
    warming = rho_cp(35.0, 30.0) * 10.0 * 2.0 / 3600.0 + 20.0
    assert node.message.startswith(
        f"chamber S1's own heater would need {warming:.0f} W of heating at 2027-07-10T06:00Z"
    )
    assert "(capacity 30 W): S1" in node.message


def test_experiments_live_together_add_up_on_a_shared_chiller(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path, chiller_capacity=60.0))
    cold = Group(["S1"], temperature=hold(10.0))
    mine = booking(write_protocol(tmp_path, "a.toml", groups={"a": cold}))
    theirs = booking(
        write_protocol(tmp_path, "b.toml", groups={"b": Group(["S2"], temperature=hold(10.0))}),
        START + timedelta(hours=12),
        label="E0007 'Cold too' (Ed)",
        experiment_id="E0007",
    )
    alone, _ = power_conflicts(mine, [], the_rig)
    assert alone == []  # 20 W + 23 W of pull-down fits in 60 W
    together, _ = power_conflicts(mine, [theirs], the_rig)
    [plant] = together
    assert plant.message.startswith("chiller 'cold-loop' would need ")
    assert "at 2027-07-10T18:00Z" in plant.message
    assert "S2 (E0007) 43 W, S1 20 W" in plant.message
    assert plant.experiments == ("E0007",)


def test_the_lamp_budget_counts_rated_power_times_par_over_max_par(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path, lamp_budget=150.0))
    day = (
        hold(0.0).replace("}", ', duration = "6h" }')
        + ", "
        + hold(800.0).replace("}", ', duration = "12h" }')
        + ", "
        + hold(0.0)
    )
    candidate = booking(
        write_protocol(
            tmp_path,
            groups={"a": Group(["B1", "B2"], light=day), "b": Group(["S1"], light=hold(400.0))},
        )
    )
    conflicts, peaks = find_conflicts(candidate, [], the_rig)
    [lamp] = [c for c in conflicts if c.kind is ConflictKind.LAMP_BUDGET]
    # 100 W × 400/1000 for S1 all day; 100 W × 800/1000 each for B1 and B2 from 12:00Z
    assert lamp.message == (
        "the lamp circuit would need 200 W at 2027-07-10T12:00Z (local 2027-07-10T13:00+01:00) "
        "(capacity 150 W): B1 80 W, B2 80 W, S1 40 W"
    )
    [peak] = [p for p in peaks if p.name == "the lamp circuit"]
    assert peak.peak_w == pytest.approx(200.0)


def test_the_grid_finds_peaks_that_dense_sampling_finds(tmp_path: Path) -> None:
    """Flow and temperature ramping together make a parabola; the grid must not miss its top."""
    the_rig = rig(write_rig(tmp_path, flush_l_h=400.0))
    six_h = ', duration = "6h" }'
    temperature = hold(8.0).replace("}", six_h) + ', { kind = "ramp", to = 20.0' + six_h
    temperature += ", " + hold(20.0)
    flow = hold(0.0).replace("}", six_h) + ', { kind = "ramp", to = 20.0' + six_h
    flow += ", " + hold(0.0)
    candidate = booking(
        write_protocol(tmp_path, groups={"a": Group(["S1"], temperature=temperature, flow=flow)})
    )
    [load] = node_loads([candidate], the_rig)
    lo, hi = candidate.start_utc.timestamp(), candidate.end_utc.timestamp()
    grid = load_grid([load], lo, hi)
    on_grid = min(load.watts(grid, "left").min(), load.watts(grid, "right").min())
    dense = np.linspace(lo, hi, 400_001)
    truth = load.watts(dense, "right").min()
    # the flushing load −g·flow·(20 − T) is a parabola over the ramps, deepest at 09:00Z
    assert truth < -1000.0
    assert on_grid == pytest.approx(truth, abs=1.0)  # within tol_w = 1 W
    corners = np.unique(np.concatenate([load.breakpoints(), [lo, hi]]))
    assert load.watts(corners, "right").min() > truth + 500.0  # breakpoints alone miss it
    assert grid.size < 1000


def test_nothing_is_found_for_a_modest_protocol(tmp_path: Path) -> None:
    the_rig = rig(write_rig(tmp_path))
    conflicts, peaks = find_conflicts(booking(write_protocol(tmp_path)), [], the_rig)
    assert conflicts == []
    assert {p.name for p in peaks} == {"chiller 'cold-loop'", "the lamp circuit"}


def test_a_measured_lamp_curve_sets_the_drive_and_its_corners_are_on_the_grid(
    tmp_path: Path,
) -> None:
    # B1's lamp gives 200 µmol m⁻² s⁻¹ at 50 % and 1000 at 100 %: the drive climbs fast at
    # first. B1 ramps 0 → 1000 while B2 (straight line, no table) ramps 1000 → 0, both over
    # 4 h from 07:00Z: together 100 + 37.5 W/h for 48 min (B1 reaches 200 at 50 %), then
    # falling by 9.4 W/h. The peak (130 W at 07:48Z) sits where B1's PAR crosses the curve's
    # corner, between the program's breakpoints.
    text = rig_text(lamp_budget=120.0).replace(
        "[chambers.lamp]\nrated_w = 100.0",
        "[chambers.lamp]\nrated_w = 100.0\n"
        "drive_pct_par = [[0.0, 0.0], [50.0, 200.0], [100.0, 1000.0]]",
        1,
    )
    (tmp_path / "curve.toml").write_text(text)
    the_rig = rig(tmp_path / "curve.toml")
    assert the_rig.chamber("B1").lamp.drive_pct_par is not None
    ramp = (
        '{{ kind = "hold", value = {}, duration = "1h" }}, '
        '{{ kind = "ramp", to = {}, duration = "4h" }}'
    )
    up, down = ramp.format(0.0, 1000.0), ramp.format(1000.0, 0.0)
    candidate = booking(
        write_protocol(
            tmp_path, groups={"a": Group(["B1"], light=up), "b": Group(["B2"], light=down)}
        )
    )
    conflicts, peaks = find_conflicts(candidate, [], the_rig)
    [lamp] = [c for c in conflicts if c.kind is ConflictKind.LAMP_BUDGET]
    assert lamp.message == (
        "the lamp circuit would need more than its 120 W from 2027-07-10T07:32Z (local "
        "2027-07-10T08:32+01:00), 130 W at 2027-07-10T07:48Z (local 2027-07-10T08:48+01:00): "
        "B2 80 W, B1 50 W"
    )
    [peak] = [p for p in peaks if p.name == "the lamp circuit"]
    assert peak.peak_w == pytest.approx(130.0)
    assert peak.at_utc == START + timedelta(minutes=108)
