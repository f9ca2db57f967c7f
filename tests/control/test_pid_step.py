"""PID step: agreement with python-control, anti-windup, derivative kick, bumpless transfer,
and the split-range, time-proportioning and setpoint-ramp helpers."""

from __future__ import annotations

import math

import control as ct
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from controller.control import (
    PidParams,
    PidState,
    TimeProportionState,
    pid_step,
    pid_track,
    rate_limit,
    split_range,
    time_proportion,
    time_proportion_step,
)

# Plant of the SIMC check example (Skogestad 2003): k = 2, τ1 = 600 s, θ = 60 s.
K, TAU_S, THETA_S = 2.0, 600.0, 60.0


def simulate_loop(
    params: PidParams,
    t_end_s: float,
    dt_s: float,
    setpoint: float = 1.0,
    disturbance: float = 0.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Discrete loop: pid_step every dt_s, zero-order hold, exact FOPDT discretisation."""
    a = math.exp(-dt_s / TAU_S)
    delay = [0.0] * round(THETA_S / dt_s)
    x, state = 0.0, PidState()
    n = round(t_end_s / dt_s)
    ys, us = np.empty(n + 1), np.empty(n + 1)
    for j in range(n + 1):
        ys[j] = x
        result = pid_step(state, params, x, setpoint, dt_s)
        state = result.state
        us[j] = result.output
        delay.append(result.output)
        x = a * x + K * (1.0 - a) * (delay.pop(0) + disturbance)
    return np.arange(n + 1) * dt_s, ys, us


def continuous_reference(params: PidParams, t: np.ndarray) -> np.ndarray:
    """The same loop in continuous time, computed with python-control.

    Two-degree-of-freedom ISA controller u = Cr·r − Cy·y with
    Cr = Kc(b + 1/(Ti s)), Cy = Kc(1 + 1/(Ti s) + Td s/(1 + Td s/N)); the dead time is a
    12th-order Padé approximation (control.pade).
    """
    s = ct.tf("s")
    num, den = ct.pade(THETA_S, 12)
    plant = K / (TAU_S * s + 1) * ct.tf(num, den)
    kc, ti, td, n = params.kc, params.ti_s, params.td_s, params.derivative_filter_n
    c_r = kc * (params.setpoint_weight + 1 / (ti * s))
    c_y = kc * (1 + 1 / (ti * s) + td * s / (1 + td * s / n))
    loop = ct.minreal(plant * c_r / (1 + plant * c_y), verbose=False)
    return np.asarray(ct.forced_response(loop, t, np.ones_like(t)).outputs)


@pytest.mark.parametrize(
    ("td_s", "weight"), [(0.0, 1.0), (20.0, 1.0), (20.0, 0.0)], ids=["PI", "PID", "PID-b0"]
)
def test_closed_loop_step_matches_python_control(td_s: float, weight: float) -> None:
    # Reference: python-control 0.10 forced_response of the continuous loop.
    params = PidParams(
        kc=2.5, ti_s=480.0, td_s=td_s, out_min=-1e6, out_max=1e6, setpoint_weight=weight
    )
    t, y, _ = simulate_loop(params, 4000.0, 0.5)
    y_ref = continuous_reference(params, t)
    error = np.abs(y - y_ref)
    assert error.max() < 0.01  # Padé ripple at t = θ dominates the difference
    assert error[t > 2.5 * THETA_S].max() < 0.002  # elsewhere only the half-sample hold lag
    assert y[-1] == pytest.approx(1.0, abs=1e-3)


def test_back_calculation_prevents_windup_under_saturation() -> None:
    limited = dict(kc=2.5, ti_s=480.0, out_min=0.0, out_max=0.6)
    with_aw = PidParams(**limited)
    without_aw = PidParams(**limited, tracking_time_s=1e12)  # tracking so slow it never acts
    _, y_aw, u_aw = simulate_loop(with_aw, 6000.0, 1.0)
    _, y_free, _ = simulate_loop(without_aw, 6000.0, 1.0)
    # The plant can reach K * 0.6 = 1.2, so setpoint 1 is feasible but the output saturates.
    assert u_aw[:10].max() == 0.6
    overshoot_aw = y_aw.max() - 1.0
    overshoot_free = y_free.max() - 1.0
    assert overshoot_free > 0.05
    assert overshoot_aw < 0.5 * overshoot_free
    assert y_aw[-1] == pytest.approx(1.0, abs=1e-3)


def test_integral_tracks_the_limit_while_saturated() -> None:
    params = PidParams(kc=2.0, ti_s=100.0, out_min=0.0, out_max=10.0)
    state = PidState()
    for _ in range(5000):  # a long, unreachable setpoint: error stays 50
        result = pid_step(state, params, measured=0.0, setpoint=50.0, dt_s=1.0)
        state = result.state
    assert result.saturated and result.output == 10.0
    # Without anti-windup the integral would be 2/100*50*5000 = 5000. Back-calculation stops
    # it where integration and tracking balance: Kc·h/Ti·e = (1 − e^(−h/Tt))·(v − u), with
    # Tt = Ti for PI, so v − u = 1/(1 − e^(−0.01)) and I = u − P + (v − u).
    v_minus_u = 1.0 / -math.expm1(-0.01)
    assert state.integral == pytest.approx(10.0 - 100.0 + v_minus_u, rel=1e-9)
    assert state.integral < 11.0


def test_no_derivative_kick_on_a_setpoint_step() -> None:
    params = PidParams(kc=2.0, ti_s=300.0, td_s=60.0, out_min=-100.0, out_max=100.0)
    state = pid_step(PidState(), params, measured=20.0, setpoint=20.0, dt_s=1.0).state
    before = pid_step(state, params, measured=20.0, setpoint=20.0, dt_s=1.0)
    stepped = pid_step(before.state, params, measured=20.0, setpoint=25.0, dt_s=1.0)
    assert stepped.d == 0.0
    assert stepped.output - before.output == pytest.approx(2.0 * 5.0)  # proportional only


def test_derivative_acts_on_the_measurement_with_its_filter() -> None:
    params = PidParams(
        kc=2.0, ti_s=math.inf, td_s=60.0, out_min=-1e3, out_max=1e3, derivative_filter_n=10
    )
    state = pid_step(PidState(), params, measured=20.0, setpoint=20.0, dt_s=1.0).state
    jump = pid_step(state, params, measured=20.5, setpoint=20.0, dt_s=1.0)
    # Backward difference of Td·s/(1 + Td·s/N): D = −Kc·Td·N/(Td + N·h)·Δy.
    assert jump.d == pytest.approx(-2.0 * 60.0 * 10.0 / (60.0 + 10.0) * 0.5)
    later = pid_step(jump.state, params, measured=20.5, setpoint=20.0, dt_s=1.0)
    assert later.d == pytest.approx(jump.d * 60.0 / 70.0)  # decays with time constant Td/N


def test_manual_to_auto_transfer_is_bumpless() -> None:
    params = PidParams(kc=4.0, ti_s=200.0, td_s=30.0, out_min=0.0, out_max=100.0)
    state = PidState()
    for _ in range(20):
        manual = pid_track(state, params, 37.5, measured=18.2, setpoint=19.0, dt_s=2.0)
        state = manual.state
    auto = pid_step(state, params, measured=18.2, setpoint=19.0, dt_s=2.0)
    assert manual.output == 37.5
    assert auto.output == pytest.approx(37.5, abs=1e-12)
    # Without tracking the first automatic output would be the bare P term, 3.2 %.
    assert pid_step(PidState(), params, 18.2, 19.0, 2.0).output == pytest.approx(3.2)


def test_pid_refuses_bad_parameters_and_inputs() -> None:
    ok = dict(kc=1.0, ti_s=100.0, out_min=0.0, out_max=1.0)
    for bad in (
        {"kc": 0.0},
        {"ti_s": 0.0},
        {"ti_s": math.nan},
        {"td_s": -1.0},
        {"out_min": 1.0},
        {"derivative_filter_n": 0.0},
        {"tracking_time_s": -5.0},
    ):
        with pytest.raises(ValueError):
            PidParams(**{**ok, **bad})
    params = PidParams(**ok)
    with pytest.raises(ValueError, match="measured"):
        pid_step(PidState(), params, math.nan, 1.0, 1.0)
    with pytest.raises(ValueError, match="dt_s"):
        pid_step(PidState(), params, 0.0, 1.0, 0.0)


@pytest.mark.parametrize(
    ("u", "expected"),
    [
        (0.0, (0.0, 0.0)),
        (2.0, (0.0, 0.0)),
        (-2.0, (0.0, 0.0)),
        (51.0, (50.0, 0.0)),
        (-51.0, (0.0, 50.0)),
        (100.0, (100.0, 0.0)),
        (-150.0, (0.0, 100.0)),
    ],
)
def test_split_range_with_a_two_percent_dead_band(u: float, expected: tuple[float, float]) -> None:
    heater, chiller = split_range(u, deadband_pct=2.0)
    assert heater == pytest.approx(expected[0])
    assert chiller == pytest.approx(expected[1])


@given(st.floats(-200, 200), st.floats(0, 99))
def test_split_range_never_heats_and_cools_together(u: float, band: float) -> None:
    heater, chiller = split_range(u, band)
    assert 0.0 <= heater <= 100.0 and 0.0 <= chiller <= 100.0
    assert heater == 0.0 or chiller == 0.0


@pytest.mark.parametrize("duty", [0.0, 12.5, 50.0, 87.5, 100.0])
def test_time_proportioning_delivers_the_duty_on_average(duty: float) -> None:
    cycle_s, dt_s = 20.0, 0.25
    times = np.arange(0.0, 100 * cycle_s, dt_s)
    on = [time_proportion(duty, cycle_s, t) for t in times]
    assert np.mean(on) * 100.0 == pytest.approx(duty, abs=1e-9)


def test_time_proportioning_drops_pulses_shorter_than_the_minimum() -> None:
    assert not any(time_proportion(4.0, 20.0, t, min_switch_s=1.0) for t in np.arange(0, 20, 0.1))
    assert all(time_proportion(96.0, 20.0, t, min_switch_s=1.0) for t in np.arange(0, 20, 0.1))


def test_latched_time_proportioning_switches_at_most_twice_per_cycle() -> None:
    state, switches, last, on_s = TimeProportionState(), 0, False, 0.0
    for j in range(400):
        t = j * 0.5
        duty = 30.0 + 40.0 * math.sin(j)  # duty jumps around within every cycle
        state, on = time_proportion_step(state, duty, 10.0, t)
        switches += on != last
        last = on
        on_s += 0.5 * on
    assert switches <= 2 * 20 + 1
    assert state.cycle_start_s == 190.0
    assert 0.0 < on_s < 200.0


def test_rate_limit_ramps_at_the_chamber_limit() -> None:
    rate = 2.0 / 3600.0  # 2 °C per hour
    sp = 20.0
    for _ in range(1800):
        sp = rate_limit(sp, 25.0, rate, 1.0)
    assert sp == pytest.approx(21.0)
    assert rate_limit(24.9999, 25.0, rate, 60.0) == 25.0  # never overshoots the target
    assert rate_limit(20.0, 10.0, math.inf, 1.0) == 10.0
    assert rate_limit(20.0, 10.0, rate, 0.0) == 20.0
    with pytest.raises(ValueError):
        rate_limit(20.0, 25.0, -1.0, 1.0)
