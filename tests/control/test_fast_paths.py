"""The hot-path forms of the control core give exactly what the checked, immutable forms give.

PidLoop against pid_step/pid_track, evaluate_values against evaluate (including the shared
all-clear mapping a quiet chamber is recognised by), InterlockMemory against evaluate_values
and acknowledge, Outputs.unchecked against Outputs, the
cheaper input tests of rate_limit and split_range, and DriveCurve's straight-line shortcut.
Exact equality throughout: these are the same arithmetic, not approximations of it.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.control import (
    Condition,
    ConditionState,
    EventKind,
    IllegalInterlockEvent,
    InterlockLimits,
    InterlockMemory,
    InterlockState,
    Outputs,
    PidLoop,
    PidParams,
    PidState,
    Readings,
    SafetyState,
    _interlock_memory,
    _interlocks,
    acknowledge,
    evaluate,
    evaluate_values,
    pid_step,
    pid_track,
    rate_limit,
    split_range,
)
from controller.control._interlocks import _ALL_CLEAR, _evaluate_full
from controller.rig import DriveCurve

LIMITS = InterlockLimits(
    min_temperature_c=10.0,
    max_temperature_c=30.0,
    max_rate_c_per_h=7.03125,
    rate_window_s=64.0,
    stale_after_s=30.0,
    frozen_after_s=900.0,
    comm_loss_after_s=10.0,
)

PARAMS = (
    PidParams(kc=2.0, ti_s=100.0, out_min=-50.0, out_max=50.0),
    PidParams(kc=3.0, ti_s=60.0, td_s=15.0, out_min=-100.0, out_max=100.0, setpoint_weight=0.5),
    PidParams(kc=-1.5, ti_s=math.inf, td_s=5.0, out_min=0.0, out_max=10.0),
    PidParams(kc=0.3, ti_s=60.0, out_min=-50.0, out_max=50.0, tracking_time_s=7.0),
)


@pytest.mark.parametrize("params", PARAMS)
@settings(max_examples=40, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.floats(-80.0, 80.0),  # measured
            st.floats(-80.0, 80.0),  # setpoint
            st.floats(0.5, 120.0),  # dt_s
            st.floats(-120.0, 120.0),  # manual output
            st.booleans(),  # track instead of step
        ),
        min_size=1,
        max_size=30,
    )
)
def test_pid_loop_walks_the_same_states_as_pid_step_and_pid_track(
    params: PidParams, ticks: list[tuple[float, float, float, float, bool]]
) -> None:
    state, loop = PidState(), PidLoop(params)
    for measured, setpoint, dt_s, manual, tracking in ticks:
        if tracking:
            result = pid_track(state, params, manual, measured, setpoint, dt_s)
            output = loop.track(manual, measured, setpoint, dt_s)
        else:
            result = pid_step(state, params, measured, setpoint, dt_s)
            output = loop.step(measured, setpoint, dt_s)
        state = result.state
        assert output == result.output
        assert loop.state == state  # every field bit for bit (dataclass equality of floats)


def test_pid_loop_starts_from_a_given_state_and_its_gains_cannot_be_swapped() -> None:
    start = PidState(integral=4.0, derivative=-1.0, last_measured=20.0, last_output=7.0)
    loop = PidLoop(PARAMS[1], start)
    assert loop.state == start
    assert loop.step(20.5, 21.0, 10.0) == pid_step(start, PARAMS[1], 20.5, 21.0, 10.0).output
    with pytest.raises(AttributeError):
        loop.params = PARAMS[0]  # type: ignore[misc]


@pytest.mark.parametrize(
    ("measured", "setpoint", "dt_s", "message"),
    [
        (math.nan, 1.0, 10.0, "measured must be finite"),
        (1.0, math.inf, 10.0, "setpoint must be finite"),
        (1.0, 1.0, 0.0, "dt_s must be finite and above 0"),
        (1.0, 1.0, math.nan, "dt_s must be finite and above 0"),
        (1.0, 1.0, math.inf, "dt_s must be finite and above 0"),
        (1.0, 1.0, -10.0, "dt_s must be finite and above 0"),
        (-math.inf, -math.inf, 10.0, "measured must be finite"),
    ],
)
def test_pid_loop_refuses_what_pid_step_refuses_and_keeps_its_state(
    measured: float, setpoint: float, dt_s: float, message: str
) -> None:
    loop = PidLoop(PARAMS[0])
    loop.step(1.0, 2.0, 10.0)
    before = loop.state
    with pytest.raises(ValueError, match=message):
        pid_step(before, PARAMS[0], measured, setpoint, dt_s)
    with pytest.raises(ValueError, match=message):
        loop.step(measured, setpoint, dt_s)
    assert loop.state == before


def test_pid_loop_takes_finite_inputs_whose_error_overflows() -> None:
    """The step's one-test check fails on an error times dt_s beyond the float range; the
    named checks then find every input finite and the step goes on as pid_step's."""
    params = PidParams(kc=1e-300, ti_s=100.0, out_min=-50.0, out_max=50.0)
    loop = PidLoop(params)
    result = pid_step(PidState(), params, -1e307, 1e307, 10.0)
    assert loop.step(-1e307, 1e307, 10.0) == result.output == 50.0
    assert loop.state == result.state and math.isfinite(loop.integral)


def test_rate_limit_and_split_range_still_name_the_bad_input() -> None:
    assert rate_limit(1.0, 5.0, 0.1, 10.0) == 2.0
    assert rate_limit(1, 5, 0.1, 0.0) == 1.0  # ints are taken as floats
    for args, message in (
        ((math.nan, 1.0, 0.1, 1.0), "prev_sp must be finite"),
        ((1.0, math.inf, 0.1, 1.0), "target_sp must be finite"),
        ((1.0, 2.0, -0.1, 1.0), "max_rate_per_s must be 0 or more"),
        ((1.0, 2.0, math.nan, 1.0), "max_rate_per_s must be 0 or more"),
        ((1.0, 2.0, 0.1, -1.0), "dt_s must not be negative"),
        ((1.0, 2.0, 0.1, math.inf), "dt_s must be finite"),
    ):
        with pytest.raises(ValueError, match=message):
            rate_limit(*args)
    assert split_range(150.0, 2.0) == (100.0, 0.0)
    assert split_range(-150.0, 2.0) == (0.0, 100.0)
    assert split_range(51.0, 2.0) == (50.0, 0.0)
    for args, message in (
        ((math.nan, 2.0), "u_pct must be finite"),
        ((10.0, math.nan), "deadband_pct must be finite"),
        ((10.0, 100.0), r"deadband_pct must be in \[0, 100\)"),
        ((10.0, -1.0), r"deadband_pct must be in \[0, 100\)"),
    ):
        with pytest.raises(ValueError, match=message):
            split_range(*args)


# ------------------------------------------------------------------------- interlocks


readings_strategy = st.builds(
    Readings,
    temperature_c=st.one_of(
        st.none(), st.just(math.nan), st.floats(-10.0, 70.0), st.sampled_from([9.9, 30.1, 20.0])
    ),
    level_ok=st.sampled_from([True, True, True, False, None]),
    comm_ok=st.sampled_from([True, True, True, False, None]),
    e_stop=st.sampled_from([False, False, False, True, None]),
)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(
            readings_strategy,
            st.floats(0.0, 120.0),
            st.one_of(st.none(), st.sampled_from(list(Condition))),
        ),
        min_size=1,
        max_size=40,
    )
)
def test_evaluate_values_walks_the_same_states_as_evaluate(
    ticks: list[tuple[Readings, float, Condition | None]],
) -> None:
    """Random readings and operator acknowledgements: the same states, actions and events,
    whether the chamber was quiet (the shared all-clear mapping) or not."""
    a = b = InterlockState()
    t_s = 0.0
    for reading, step_s, ack in ticks:
        t_s += step_s
        a, actions_a, events_a = evaluate(a, reading, LIMITS, t_s)
        b, actions_b, events_b = evaluate_values(
            b,
            reading.temperature_c,
            reading.level_ok,
            reading.comm_ok,
            reading.e_stop,
            LIMITS,
            t_s,
        )
        assert (a, actions_a, events_a) == (b, actions_b, events_b)
        if ack is not None and a.conditions[ack] in (
            ConditionState.ACTIVE,
            ConditionState.LATCHED,
        ):
            if LIMITS.policies[ack].latch:
                a = acknowledge(a, ack, LIMITS, t_s)[0]
                b = acknowledge(b, ack, LIMITS, t_s)[0]


def test_a_chamber_quiet_again_after_an_acknowledged_trip_still_sees_the_next_fault() -> None:
    """The all-clear mapping is recognised by identity: acknowledging the last holding
    condition brings it back, and a fault after that is raised as on a fresh chamber."""
    good = Readings(temperature_c=20.0, level_ok=True, comm_ok=True, e_stop=False)
    state, _, _ = evaluate(InterlockState(), good, LIMITS, 0.0)
    quiet_conditions = state.conditions
    hot = Readings(temperature_c=31.0, level_ok=True, comm_ok=True, e_stop=False)
    state, actions, events = evaluate(state, hot, LIMITS, 10.0)
    assert actions.force is not None and state.conditions[Condition.OVER_TEMPERATURE] is (
        ConditionState.ACTIVE
    )
    state, _, _ = evaluate(state, good, LIMITS, 20.0)  # gone, latched
    assert state.conditions is not quiet_conditions
    state, actions, _ = acknowledge(state, Condition.OVER_TEMPERATURE, LIMITS, 25.0)
    assert state.conditions is quiet_conditions  # all clear: the shared mapping again
    assert all(v is ConditionState.CLEAR for v in state.conditions.values())
    state, actions, events = evaluate(state, good, LIMITS, 30.0)
    assert actions.force is None and state.safety is SafetyState.NORMAL and events == ()
    cold = Readings(temperature_c=9.0, level_ok=True, comm_ok=True, e_stop=False)
    state, actions, events = evaluate(state, cold, LIMITS, 40.0)
    assert actions.force is not None
    assert [(e.kind, e.condition) for e in events if e.condition is not None] == [
        (EventKind.RAISED, Condition.UNDER_TEMPERATURE)
    ]


# A mostly quiet chamber: slow drifts inside the limits, held readings (the frozen check),
# jumps (the rate check) and now and then a fault of any kind, so the quiet chamber's short
# way (at the top of evaluate_values) is taken often and left at every kind of condition.
quiet_readings = st.one_of(
    st.builds(
        Readings,
        temperature_c=st.sampled_from([20.0, 20.0, 20.0, 20.05, 20.1, 19.95, 25.0, 10.05]),
        level_ok=st.sampled_from([True, None]),
        comm_ok=st.just(True),
        e_stop=st.sampled_from([False, None]),
    ),
    readings_strategy,
)


@settings(max_examples=80, deadline=None)
@given(
    st.lists(
        st.tuples(
            quiet_readings,
            st.sampled_from([0.0, 10.0, 10.0, 30.0, 64.0, 120.0]),
            st.one_of(st.none(), st.sampled_from(list(Condition))),
        ),
        min_size=1,
        max_size=60,
    )
)
def test_the_quiet_chambers_short_way_walks_the_same_states_as_the_full_way(
    ticks: list[tuple[Readings, float, Condition | None]],
) -> None:
    a = b = InterlockState()
    t_s = 0.0
    for reading, step_s, ack in ticks:
        t_s += step_s
        values = (reading.temperature_c, reading.level_ok, reading.comm_ok, reading.e_stop)
        a, actions_a, events_a = evaluate_values(a, *values, LIMITS, t_s)
        b, actions_b, events_b = _evaluate_full(b, *values, LIMITS, t_s)
        assert (a, actions_a, events_a) == (b, actions_b, events_b)
        assert (a.conditions is _ALL_CLEAR) == (b.conditions is _ALL_CLEAR)
        pending = ack is not None and a.conditions[ack] in _ACKNOWLEDGEABLE
        if ack is not None and pending and LIMITS.policies[ack].latch:
            a = acknowledge(a, ack, LIMITS, t_s)[0]
            b = acknowledge(b, ack, LIMITS, t_s)[0]


_ACKNOWLEDGEABLE = (ConditionState.ACTIVE, ConditionState.LATCHED)


def test_the_short_way_is_left_at_the_tick_a_quiet_chamber_gets_a_condition(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Each way out of quiet: the full way raises the condition at the same tick."""
    full_ways = []

    def full(*args: object) -> object:
        full_ways.append(args)
        return _evaluate_full(*args)  # type: ignore[arg-type]

    monkeypatch.setattr(_interlocks, "_evaluate_full", full)

    def walk(temps: list[float | None], step_s: float = 10.0, **other: bool | None) -> list:
        state, t_s, shorts, raised = InterlockState(), 0.0, [], []
        for k, temp in enumerate(temps):
            last = k == len(temps) - 1
            values = (
                temp,
                other.get("level_ok", True) if last else True,
                other.get("comm_ok", True) if last else True,
                other.get("e_stop", False) if last else False,
            )
            before = len(full_ways)
            state, _, events = evaluate_values(state, *values, LIMITS, t_s)
            shorts.append(len(full_ways) == before)
            raised += [(k, e.condition) for e in events if e.kind is EventKind.RAISED]
            t_s += step_s
        return [shorts[1:], raised]

    quiet = [True] * 4
    assert walk([20.0, 20.1, 20.0, 20.1, 20.0]) == [quiet, []]
    assert walk([20.0, 20.1, 20.0, 20.1, 30.0]) == [
        [True, True, True, False],
        [(4, Condition.OVER_TEMPERATURE)],  # 40 s: the 64 s rate window is not over yet
    ]
    assert walk([20.0, 20.1, 20.0, 20.1, 10.0])[1][0] == (4, Condition.UNDER_TEMPERATURE)
    assert walk([20.0, 20.1, 20.0, 20.1, None], step_s=40.0) == [
        [True, True, True, False],
        [(4, Condition.SENSOR_STALE)],
    ]
    for fault, condition in (
        ({"level_ok": False}, Condition.LOW_LEVEL),
        ({"e_stop": True}, Condition.E_STOP),
    ):
        assert walk([20.0, 20.1, 20.0, 20.1, 20.0], **fault) == [
            [True, True, True, False],
            [(4, condition)],
        ]
    # comm not ok goes the full way; the loss is raised once comm_loss_after_s has passed
    assert walk([20.0, 20.1, 20.0, 20.1, 20.0], step_s=20.0, comm_ok=False)[1] == [
        (4, Condition.COMM_LOSS)
    ]
    held = [20.0] * 100  # the frozen check: 900 s without a change
    shorts, raised = walk(held)
    assert raised == [(90, Condition.SENSOR_FROZEN)] and shorts[88:90] == [True, False]
    # 0.125 °C in 64 s is exactly the rate limit (7.03125 °C/h): raised on reaching it
    shorts, raised = walk([20.0, 20.0, 20.125], step_s=64.0)
    assert raised == [(2, Condition.RATE_OF_CHANGE)] and shorts == [True, False]
    assert walk([20.0, 20.0, 20.124], step_s=64.0) == [[True, True], []]


@settings(max_examples=80, deadline=None)
@given(
    st.lists(
        st.tuples(
            quiet_readings,
            st.sampled_from([0.0, 10.0, 10.0, 30.0, 64.0, 120.0]),
            st.one_of(st.none(), st.sampled_from(list(Condition))),
            st.booleans(),  # look at the memory's state after this tick
        ),
        min_size=1,
        max_size=60,
    )
)
def test_the_interlock_memory_walks_the_same_states_as_evaluate_values(
    ticks: list[tuple[Readings, float, Condition | None, bool]],
) -> None:
    """Mostly quiet ticks (the memory's in-place short way) and faults of every kind (its way
    through evaluate_values), with operator acknowledgements: the same states, actions and
    events, whether or not the immutable state was asked for in between."""
    state, memory = InterlockState(), InterlockMemory(LIMITS)
    assert memory.state == state and memory.limits is LIMITS
    t_s = 0.0
    for reading, step_s, ack, look in ticks:
        t_s += step_s
        values = (reading.temperature_c, reading.level_ok, reading.comm_ok, reading.e_stop)
        state, actions, events = evaluate_values(state, *values, LIMITS, t_s)
        assert memory.evaluate(*values, t_s) == events
        assert (memory.actions, memory.force, memory.alarm) == (
            actions,
            actions.force,
            actions.alarm,
        )
        assert memory.safety is state.safety
        if look or ack is not None:
            assert memory.state == state
            assert (memory.state.conditions is _ALL_CLEAR) == (state.conditions is _ALL_CLEAR)
        if ack is not None and state.conditions[ack] in _ACKNOWLEDGEABLE:
            if LIMITS.policies[ack].latch:
                state, actions, events = acknowledge(state, ack, LIMITS, t_s)
                assert memory.acknowledge(ack, t_s) == events
                assert (memory.actions, memory.force, memory.safety) == (
                    actions,
                    actions.force,
                    state.safety,
                )
    assert memory.state == state


def test_the_interlock_memory_shows_each_move_and_refuses_what_evaluate_values_refuses(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """The kept state is dropped whenever the memory moves: a state asked for after a quiet
    tick (the in-place short way) shows that tick. A bad time changes nothing; so does an
    illegal acknowledgement."""
    full_ways: list[object] = []

    def full(*args: object) -> object:
        full_ways.append(args)
        return evaluate_values(*args)  # type: ignore[arg-type]

    monkeypatch.setattr(_interlock_memory, "evaluate_values", full)
    memory = InterlockMemory(LIMITS)
    (started,) = memory.evaluate(20.0, True, True, False, 0.0)
    assert started.kind is EventKind.SAFETY_CHANGED and started.safety is SafetyState.NORMAL
    for k in (1, 2):
        assert memory.evaluate(20.0 + 0.1 * k, True, True, False, 10.0 * k) == ()
    assert len(full_ways) == 1  # the first evaluation only: then the chamber was quiet
    first = memory.state
    assert first is memory.state  # kept while the memory stands still
    assert first.last_t_s == 20.0 and first.safety is SafetyState.NORMAL
    assert memory.evaluate(20.3, True, True, False, 30.0) == ()
    assert len(full_ways) == 1  # the short way
    second = memory.state
    assert second is not first and second.last_t_s == 30.0 and second.frozen_ref_c == 20.3
    assert second == evaluate_values(first, 20.3, True, True, False, LIMITS, 30.0)[0]
    for t_s, message in ((29.0, "before the previous"), (math.nan, "finite"), (math.inf, "fin")):
        with pytest.raises(ValueError, match=message):
            memory.evaluate(20.3, True, True, False, t_s)
        assert memory.state is second
    with pytest.raises(IllegalInterlockEvent):
        memory.acknowledge(Condition.OVER_TEMPERATURE, 30.0)
    assert memory.state is second
    # a trip forces outputs at once; acknowledging it after it cleared frees them
    memory.evaluate(31.0, True, True, False, 40.0)
    assert memory.force is not None and memory.alarm is Condition.OVER_TEMPERATURE
    memory.evaluate(20.0, True, True, False, 50.0)
    assert memory.state.conditions[Condition.OVER_TEMPERATURE] is ConditionState.LATCHED
    assert memory.force is not None
    memory.acknowledge(Condition.OVER_TEMPERATURE, 55.0)
    assert memory.force is None and memory.alarm is None and memory.state.conditions is _ALL_CLEAR
    assert memory.evaluate(20.0, True, True, False, 60.0) == ()


# ---------------------------------------------------------------------------- outputs


@given(st.tuples(*(st.floats(0.0, 100.0) for _ in range(4))))
def test_unchecked_outputs_equal_checked_ones(drives: tuple[float, float, float, float]) -> None:
    heater, chiller, lamp, pump = drives
    checked = Outputs(heater_pct=heater, chiller_pct=chiller, lamp_pct=lamp, pump_pct=pump)
    fast = Outputs.unchecked(heater, chiller, lamp, pump)
    assert fast == checked and hash(fast) == hash(checked) and repr(fast) == repr(checked)
    with pytest.raises(AttributeError):
        fast.lamp_pct = 1.0  # type: ignore[misc]


# ------------------------------------------------------------------------ drive curves


def _reference_equivalent(curve: DriveCurve, value: float) -> float:
    """The interpolation as it was written before the straight-line shortcut."""
    from bisect import bisect_right

    xs, ys = curve.value, curve.drive_pct
    k = min(max(bisect_right(xs, value), 1), len(xs) - 1)
    x0, x1, y0, y1 = xs[k - 1], xs[k], ys[k - 1], ys[k]
    return y0 + (value - x0) * (y1 - y0) / (x1 - x0)


CURVES = (
    DriveCurve.linear(30.0),
    DriveCurve(drive_pct=(8.0, 30.0, 60.0, 100.0), value=(0.0, 4.8, 11.3, 20.0)),
    DriveCurve(drive_pct=(0.0, 100.0), value=(5.0, 1500.0)),
)


@pytest.mark.parametrize("curve", CURVES)
@given(st.floats(-100.0, 3000.0))
def test_drive_curve_shortcuts_give_the_reference_values(curve: DriveCurve, value: float) -> None:
    want = _reference_equivalent(curve, value)
    assert curve.equivalent_drive(value) == want
    expected = 0.0 if value <= 0.0 else min(100.0, max(curve.drive_pct[0], want))
    assert curve.drive_for(value) == expected
