"""The decider's actuators step their PI trims written out; the numbers are the checked forms'.

:class:`~controller.runtime._decide_state.Actuator` steps a trim without derivative action
inside its ``drive`` (PidLoop.step's arithmetic on the trim's state, the integral gain kept
per step length). Here it is walked against the drive curve's own methods and a
:class:`PidLoop` stepped beside it: the same drives and the same trim state, bit for bit,
whatever the setpoints, readings and step lengths do, and the same refusals.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.control import PidLoop, PidParams, SafetyState, rate_limit
from controller.files import load_model
from controller.rig import DriveCurve, Rig
from controller.runtime import ChamberReadings, RunSettings, plan_control
from controller.runtime._decide import Decider, Target
from controller.runtime._decide_state import Actuator

CURVES = (
    DriveCurve.linear(30.0),
    DriveCurve(drive_pct=(8.0, 30.0, 60.0, 100.0), value=(0.0, 4.8, 11.3, 20.0)),
)
TRIMS = (
    PidParams(kc=0.3, ti_s=60.0, out_min=-50.0, out_max=50.0),  # as the plan builds them
    PidParams(kc=1.7, ti_s=25.0, out_min=-20.0, out_max=35.0, setpoint_weight=0.5),
    PidParams(kc=0.8, ti_s=40.0, out_min=-50.0, out_max=50.0, tracking_time_s=3.0),
    PidParams(kc=0.5, ti_s=math.inf, out_min=-10.0, out_max=10.0),  # P only: no integral
    PidParams(kc=0.4, ti_s=30.0, td_s=8.0, out_min=-50.0, out_max=50.0),  # derivative: step
)


def reference_drive(
    curve: DriveCurve, trim: PidLoop, setpoint: float | None, measured: float | None, dt_s: float
) -> float:
    """The actuator's drive from the curve's methods and the trim's checked step."""
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
@pytest.mark.parametrize("params", TRIMS)
@settings(max_examples=30, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.one_of(st.none(), st.sampled_from([0.0, 3.0, 12.0, 700.0, 15.5])),  # setpoint
            st.one_of(st.none(), st.floats(-5.0, 2000.0), st.sampled_from([0.0, 4.8, 11.3])),
            st.sampled_from([10.0, 10.0, 10.0, 1e-6, 0.5, 60.0, 600.0]),  # step length, s
        ),
        min_size=1,
        max_size=40,
    )
)
def test_an_actuator_steps_its_trim_as_pid_loop_does(
    curve: DriveCurve, params: PidParams, ticks: list[tuple[float | None, float | None, float]]
) -> None:
    """Drives equal to the reference (repr: −0.0 too) and the trim's state field for field,
    through changing step lengths (the kept integral gain is renewed at each change)."""
    actuator, trim = Actuator(curve, params), PidLoop(params)
    assert actuator.trim is not None and actuator.pi is (params.td_s == 0.0)
    for setpoint, measured, dt_s in ticks:
        want = reference_drive(curve, trim, setpoint, measured, dt_s)
        assert repr(actuator.drive(setpoint, measured, dt_s)) == repr(want)
        assert actuator.trim.state == trim.state
        assert repr(actuator.trim.last_output) == repr(trim.last_output)


def test_a_change_of_step_length_is_seen_at_once() -> None:
    """The integral gain is kept for the latest step length: a longer step integrates more,
    as the checked step does, and coming back to the first length uses its gain again."""
    params = TRIMS[0]
    actuator, trim = Actuator(DriveCurve.linear(30.0), params), PidLoop(params)
    assert actuator.trim is not None
    integrals = []
    for dt_s in (10.0, 10.0, 40.0, 10.0):
        got = actuator.drive(12.0, 10.0, dt_s)  # the flow runs 2 cm/s short
        assert got == reference_drive(DriveCurve.linear(30.0), trim, 12.0, 10.0, dt_s)
        integrals.append(actuator.trim.integral)
        assert actuator.trim.state == trim.state
    steps = [b - a for a, b in zip([0.0, *integrals], integrals, strict=False)]
    assert steps[2] > 3.0 * steps[1] > 0.0  # four times the step length, about four times


@pytest.mark.parametrize(
    ("measured", "dt_s", "message"),
    [
        (math.nan, 10.0, "measured must be finite"),
        (math.inf, 10.0, "measured must be finite"),
        (5.0, math.nan, "dt_s must be finite and above 0"),
        (5.0, math.inf, "dt_s must be finite and above 0"),
        (5.0, 0.0, "dt_s must be finite and above 0"),
    ],
)
def test_an_actuator_refuses_what_the_trim_refuses_and_keeps_its_state(
    measured: float, dt_s: float, message: str
) -> None:
    params, curve = TRIMS[0], DriveCurve.linear(30.0)
    actuator, trim = Actuator(curve, params), PidLoop(params)
    assert actuator.trim is not None
    actuator.drive(12.0, 11.0, 10.0)
    trim.step(curve.equivalent_drive(11.0), curve.drive_for(12.0), 10.0)
    before = actuator.trim.state
    with pytest.raises(ValueError, match=message):
        trim.step(curve.equivalent_drive(measured), curve.drive_for(12.0), dt_s)
    with pytest.raises(ValueError, match=message):
        actuator.drive(12.0, measured, dt_s)
    assert actuator.trim.state == before == trim.state


# ------------------------------------------------------------------ a node's PI step

RIG = """name = "fast forms rack"
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
"""


@settings(max_examples=25, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.one_of(st.none(), st.floats(5.5, 29.5)),  # probe, °C (None: no reply)
            st.sampled_from([12.0, 18.0, 18.0, 24.0, 29.0]),  # protocol's setpoint, °C
            st.sampled_from([10.0, 10.0, 10.0, 3.0, 25.0]),  # step, s
        ),
        min_size=1,
        max_size=40,
    )
)
def test_a_node_steps_its_pi_loop_as_pid_loop_does(
    tmp_path_factory: pytest.TempPathFactory, ticks: list[tuple[float | None, float, float]]
) -> None:
    """The decider's written-out PI step of a thermal node: the node's heater and chiller
    are what rate_limit, a PidLoop stepped beside it and the node's split give, and the
    node's loop state is that loop's, field for field."""
    path = tmp_path_factory.mktemp("rig") / "rig.toml"
    path.write_text(RIG)
    plan = plan_control(load_model(path, Rig), ["B"], RunSettings(period_s=10.0))
    node_settings = plan.nodes[0]
    decider, loop = Decider(plan), PidLoop(node_settings.pid)
    assert node_settings.pid.td_s == 0.0 and decider._nodes[0].pi  # stepped written out
    ramp_per_s = node_settings.max_ramp_c_per_h / 3600.0
    deadband = plan.settings.split_deadband_pct
    setpoint: float | None = None
    t_s, output, checked = 0.0, 0.0, 0
    for k, (probe, wanted, step_s) in enumerate([(20.0, 18.0, 10.0), *ticks]):
        t_s += step_s
        readings = {
            "B": ChamberReadings(
                chamber="B",
                t_s=t_s,
                temperature_c=probe,
                level_ok=True,
                e_stop=False,
                comm_ok=True,
            )
        }
        decision = decider.decide(
            readings, {"B": Target(temperature_c=wanted, par=None, flow_cm_s=None)}, t_s
        )
        if decision.chambers["B"].safety is not SafetyState.NORMAL:
            break  # forced (a probe silent too long): the loop tracks; not this test's way
        dt_s = plan.settings.period_s if k == 0 else step_s  # the first tick's step
        if probe is not None:
            previous = probe if setpoint is None else setpoint
            setpoint = rate_limit(previous, wanted, ramp_per_s, dt_s)
            output = loop.step(probe, setpoint, dt_s)
        heater, chiller = node_settings.split(output, deadband)
        outputs = decision.writes["B"]
        assert (repr(outputs.heater_pct), repr(outputs.chiller_pct)) == (
            repr(heater),
            repr(chiller),
        )
        checked += 1
        assert decider._nodes[0].pid.state == loop.state
    assert checked >= 1
