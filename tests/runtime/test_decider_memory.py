"""What the decider keeps between ticks follows every change of its inputs.

The decider takes settings from the frozen plan once and keeps each actuator's feed-forward
drive with the setpoint it was computed for; these tests change a setpoint, inject a fault,
fail a write and acknowledge mid-run, and check each change shows at the very tick it
happens.
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.control import (
    Condition,
    Fopdt,
    PidLoop,
    PidParams,
    SafetyState,
    rate_limit,
    split_range,
)
from controller.files import load_model
from controller.rig import DriveCurve, Rig
from controller.runtime import ChamberReadings, RunSettings, plan_control
from controller.runtime._decide import Decider, Target
from controller.runtime._decide_state import Actuator
from controller.runtime._settings import NodeSettings

RIG = """name = "decider memory rack"
[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0
[chambers.limits]
min_temperature_c = 5.0
max_temperature_c = 30.0
max_par = 700.0
max_flow_cm_s = 14.0
[chambers.pump]
drive_pct_flow_cm_s = [[0.0, 0.0], [8.0, 0.0], [50.0, 6.4], [100.0, 14.0]]
"""


@pytest.fixture
def decider(tmp_path: Path) -> Decider:
    path = tmp_path / "rig.toml"
    path.write_text(RIG)
    rig = load_model(path, Rig)
    return Decider(plan_control(rig, ["B"], RunSettings(period_s=10.0)))


def reading(t_s: float, temperature_c: float = 20.0, **more: object) -> dict[str, ChamberReadings]:
    """B's readings without PAR and flow sensors (the lamp and pump run on feed-forward)."""
    fields: dict[str, object] = {"level_ok": True, "e_stop": False, "comm_ok": True}
    fields.update(more)
    return {"B": ChamberReadings(chamber="B", t_s=t_s, temperature_c=temperature_c, **fields)}  # type: ignore[arg-type]


def target(flow_cm_s: float | None, par: float | None = 350.0) -> dict[str, Target]:
    return {"B": Target(temperature_c=20.0, par=par, flow_cm_s=flow_cm_s)}


def test_a_changed_setpoint_gets_its_own_drive_at_once(decider: Decider) -> None:
    pump = decider.plan.chambers["B"].pump_curve
    lamp = decider.plan.chambers["B"].lamp_curve
    decider.decide(reading(0.0), target(4.0), 0.0)  # first tick: outputs safe
    seen = []
    for k, flow in enumerate([4.0, 4.0, 9.0, 9.0, 0.0, 4.0, None, 4.0], start=1):
        par = 100.0 * k
        outputs = decider.decide(reading(10.0 * k), target(flow, par), 10.0 * k).writes["B"]
        want_pump = 0.0 if flow is None else pump.drive_for(flow)
        assert outputs.pump_pct == want_pump
        assert outputs.lamp_pct == lamp.drive_for(par)
        seen.append(outputs.pump_pct)
    assert len(set(seen)) == 3 and seen[0] == seen[-1] > 8.0  # 4, 9 and off; 4 again


def test_a_fault_a_failed_write_and_an_acknowledge_show_at_their_tick(decider: Decider) -> None:
    for k in range(3):
        decision = decider.decide(reading(10.0 * k), target(4.0), 10.0 * k)
    assert decision.chambers["B"].safety is SafetyState.NORMAL
    flowing = decision.writes["B"].pump_pct
    # a probe reading beyond the over-temperature trip: forced safe on this very tick
    decision = decider.decide(reading(30.0, temperature_c=40.0), target(4.0), 30.0)
    assert decision.chambers["B"].alarm is Condition.OVER_TEMPERATURE
    safe = decider.plan.chambers["B"].interlocks.safe_outputs()
    assert decision.writes["B"] == safe and decider.stop_outputs("B") == safe
    # back in range, still latched; the operator's acknowledge releases the next tick
    decision = decider.decide(reading(40.0), target(4.0), 40.0)
    assert decision.chambers["B"].safety is SafetyState.TRIPPED
    decider.acknowledge("B", Condition.OVER_TEMPERATURE, 45.0)
    decision = decider.decide(reading(50.0), target(4.0), 50.0)
    assert decision.chambers["B"].safety is SafetyState.NORMAL
    assert decision.writes["B"].pump_pct == flowing
    # writes that stop arriving count as lost communication once the limit has passed
    limit_s = decider.plan.chambers["B"].interlocks.comm_loss_after_s
    decider.note_write("B", False)
    t_s = 50.0
    while t_s - 50.0 < limit_s:
        t_s += 10.0
        decision = decider.decide(reading(t_s), target(4.0), t_s)
    assert decision.chambers["B"].alarm is Condition.COMM_LOSS
    decider.note_write("B", True)
    decision = decider.decide(reading(t_s + 10.0), target(4.0), t_s + 10.0)
    assert decision.chambers["B"].alarm is None
    assert decision.writes["B"].pump_pct == flowing


def test_the_plan_the_decider_took_its_settings_from_cannot_be_replaced(
    decider: Decider,
) -> None:
    with pytest.raises(AttributeError):
        decider.plan = decider.plan  # type: ignore[misc]


CURVES = (
    DriveCurve.linear(30.0),
    DriveCurve(drive_pct=(0.0, 100.0), value=(5.0, 1500.0)),
    DriveCurve(drive_pct=(8.0, 30.0, 60.0, 100.0), value=(0.0, 4.8, 11.3, 20.0)),
    DriveCurve(
        drive_pct=(0.0, 10.0, 20.0, 35.0, 50.0, 65.0, 80.0, 100.0),
        value=(0.0, 187.0, 355.0, 575.0, 761.0, 919.0, 1053.0, 1200.0),
    ),
)
TRIM = PidParams(kc=0.3, ti_s=60.0, out_min=-50.0, out_max=50.0)


def reference_drive(
    curve: DriveCurve, trim: PidLoop, setpoint: float | None, measured: float | None, dt_s: float
) -> float:
    """Actuator.drive as written before its shortcuts: the curve's own methods every call."""
    if setpoint is None:
        return 0.0
    drive = curve.drive_for(setpoint)
    if drive <= 0.0:
        return 0.0
    if measured is None:
        correction = trim.last_output or 0.0
    else:
        correction = trim.step(curve.equivalent_drive(measured), drive, dt_s)
    return min(100.0, max(0.0, 100.0 * (drive + correction) / 100.0))


@pytest.mark.parametrize("curve", CURVES)
@settings(max_examples=40, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.one_of(st.none(), st.sampled_from([0.0, 3.0, 12.0, 700.0])),  # setpoint
            st.one_of(st.none(), st.floats(-5.0, 2000.0), st.sampled_from([0.0, 4.8, 355.0])),
        ),
        min_size=1,
        max_size=30,
    )
)
def test_an_actuator_drives_as_its_curve_and_trim_say(
    curve: DriveCurve, ticks: list[tuple[float | None, float | None]]
) -> None:
    """The kept feed-forward drive and the straight line's kept segment give the numbers the
    curve's methods give, tick by tick, whatever the setpoint and the measurement do."""
    actuator, trim = Actuator(curve, TRIM), PidLoop(TRIM)
    for setpoint, measured in ticks:
        if measured is not None:
            assert actuator.equivalent_drive(measured) == curve.equivalent_drive(measured)
        want = reference_drive(curve, trim, setpoint, measured, 10.0)
        assert actuator.drive(setpoint, measured, 10.0) == want
        assert actuator.trim is not None and actuator.trim.state == trim.state


def reference_split(ratio: float, output_pct: float, deadband_pct: float) -> tuple[float, float]:
    """NodeSettings.split as written before its shortcut: split_range every call."""
    if output_pct >= 0.0 or ratio <= 0.0:
        return split_range(max(0.0, output_pct), deadband_pct)
    return split_range(output_pct / ratio, deadband_pct)


@settings(max_examples=300, deadline=None)
@given(
    st.sampled_from([0.0, 0.8, 1.0, 1.25]),  # chiller ratio
    st.one_of(st.floats(-200.0, 200.0), st.sampled_from([0.0, -0.0, 2.0, -2.0, -100.0, 100.0])),
    st.sampled_from([0.0, 2.0, 2, 99.5]),  # dead band, %
)
def test_a_node_splits_its_output_as_split_range_does(
    ratio: float, output_pct: float, deadband_pct: float
) -> None:
    node = NodeSettings(
        name="B",
        chambers=("B",),
        driver="B",
        model=Fopdt(gain=0.01, tau_s=600.0, theta_s=20.0),
        pid=PidParams(kc=40.0, ti_s=300.0, out_min=-100.0 * ratio, out_max=100.0),
        max_ramp_c_per_h=2.0,
        heater_on_off=False,
        chiller_ratio=ratio,
    )
    got = node.split(output_pct, deadband_pct)
    assert repr(got) == repr(reference_split(ratio, output_pct, deadband_pct))  # -0.0 too
    if ratio > 0.0:  # without a chiller any output below 0 (NaN too) is 0 % of heating
        with pytest.raises(ValueError, match="u_pct must be finite"):
            node.split(math.nan, deadband_pct)
    with pytest.raises(ValueError, match="deadband_pct"):
        node.split(output_pct, 100.0)


def at(setpoint: float) -> dict[str, Target]:
    return {"B": Target(temperature_c=setpoint, par=350.0, flow_cm_s=4.0)}


def test_the_applied_setpoint_ramps_as_rate_limit_says(decider: Decider) -> None:
    """The node's setpoint walks from the measurement toward the protocol's at the ramp limit,
    tick by tick as :func:`rate_limit` moves it, also when the protocol's setpoint jumps."""
    ramp_per_s = decider.plan.nodes[0].max_ramp_c_per_h / 3600.0
    step_c = ramp_per_s * 10.0  # per 10 s tick
    wanted = [21.0 - 3.5 * step_c] * 5 + [21.0 + step_c] * 6 + [20.0 + 0.5 * step_c] * 3
    applied, seen = 21.0, []  # the first tick starts at the measurement
    for k, setpoint in enumerate(wanted):
        t_s = 10.0 * k
        want = rate_limit(applied, setpoint, ramp_per_s, 10.0)
        decision = decider.decide(reading(t_s, 21.0), at(setpoint), t_s)
        applied = decision.chambers["B"].setpoint_c  # type: ignore[assignment]
        assert applied is not None and repr(applied) == repr(want)
        seen.append(applied == setpoint)
    assert seen == [False, False, False, True, True] + [False] * 4 + [True] * 2 + [False] * 3


@given(st.one_of(st.floats(allow_nan=False, allow_infinity=False), st.sampled_from([0.0, -0.0])))
def test_one_probes_mean_is_its_reading_as_fsum_gives_it(value: float) -> None:
    """A node of one chamber takes ``x + 0.0`` for the mean ``math.fsum([x]) / 1``."""
    assert repr(value + 0.0) == repr(math.fsum([value]) / 1)
