"""Interlock state machine: thresholds, latching, acknowledgement, fail-safe outputs."""

from __future__ import annotations

import math
import re
from dataclasses import replace

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.control import (
    Condition,
    ConditionPolicy,
    ConditionState,
    EventKind,
    IllegalInterlockEvent,
    InterlockEvent,
    InterlockLimits,
    InterlockState,
    Level,
    Outputs,
    Readings,
    SafetyState,
    acknowledge,
    evaluate,
    transition_table_markdown,
)

LIMITS = InterlockLimits(
    min_temperature_c=10.0,
    max_temperature_c=30.0,
    max_rate_c_per_h=7.03125,  # 0.125 °C per 64 s: exact in binary floating point
    rate_window_s=64.0,
    stale_after_s=30.0,
    frozen_after_s=900.0,
    comm_loss_after_s=10.0,
    temperature_hysteresis_c=0.2,
    safe_pump_pct=30.0,
)
SAFE = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=30.0)
WANTED = Outputs(heater_pct=80.0, chiller_pct=0.0, lamp_pct=60.0, pump_pct=70.0)


def ok(temperature_c: float | None = 20.0, **changes: bool | None) -> Readings:
    fields: dict[str, float | bool | None] = {
        "temperature_c": temperature_c,
        "level_ok": True,
        "comm_ok": True,
        "e_stop": False,
    }
    fields.update(changes)
    return Readings(**fields)  # type: ignore[arg-type]


def running(limits: InterlockLimits = LIMITS) -> InterlockState:
    """A state after one healthy evaluation at t = 0."""
    state, actions, _ = evaluate(InterlockState(), ok(), limits, 0.0)
    assert state.safety is SafetyState.NORMAL and actions.force is None
    return state


def test_outputs_start_safe_and_stay_safe_until_a_healthy_evaluation() -> None:
    state = InterlockState()
    for t in (0.0, 1.0, 2.0):
        state, actions, _ = evaluate(state, ok(None), LIMITS, t)
        assert state.safety is SafetyState.STARTING
        assert actions.apply(WANTED) == SAFE
    state, actions, events = evaluate(state, ok(), LIMITS, 3.0)
    assert state.safety is SafetyState.NORMAL
    assert actions.apply(WANTED) == WANTED
    assert [e.kind for e in events] == [EventKind.SAFETY_CHANGED]


def test_a_trip_that_clears_during_start_up_does_not_release_the_outputs() -> None:
    state = InterlockState()
    for t in range(0, 12):  # devices silent: comm-loss trips at 10 s
        state, actions, _ = evaluate(state, Readings(), LIMITS, float(t))
    assert state.safety is SafetyState.TRIPPED
    state, actions, _ = evaluate(state, Readings(comm_ok=True), LIMITS, 12.0)
    assert state.conditions[Condition.COMM_LOSS] is ConditionState.CLEAR
    assert state.safety is SafetyState.STARTING  # no temperature has been read yet
    assert actions.force == SAFE


def at(state: InterlockState, readings: Readings, t_s: float) -> InterlockState:
    return evaluate(state, readings, LIMITS, t_s)[0]


def series(state: InterlockState, points: list[tuple[float, Readings]]) -> InterlockState:
    for t_s, readings in points:
        state = at(state, readings, t_s)
    return state


# Each case: condition, the readings just short of its threshold, the readings at it.
THRESHOLDS = [
    (Condition.OVER_TEMPERATURE, [(1.0, ok(29.999))], [(1.0, ok(30.0))]),
    (Condition.UNDER_TEMPERATURE, [(1.0, ok(10.001))], [(1.0, ok(10.0))]),
    (Condition.SENSOR_OUT_OF_RANGE, [(1.0, ok(59.999))], [(1.0, ok(60.0))]),
    (Condition.SENSOR_OUT_OF_RANGE, [(1.0, ok(-4.999))], [(1.0, ok(-5.0))]),
    (Condition.SENSOR_OUT_OF_RANGE, [(1.0, ok(20.0))], [(1.0, ok(math.nan))]),
    (Condition.SENSOR_STALE, [(29.9, ok(None))], [(30.0, ok(None))]),
    (
        Condition.SENSOR_FROZEN,
        [(t, ok(20.0)) for t in range(10, 891, 10)],
        [(t, ok(20.0)) for t in range(10, 901, 10)],
    ),
    (
        Condition.RATE_OF_CHANGE,
        [(64.0, ok(20.0 + 127 / 1024))],  # 6.976 °C/h
        [(64.0, ok(20.125))],  # 7.03125 °C/h exactly
    ),
    (
        Condition.RATE_OF_CHANGE,
        [(64.0, ok(20.0 - 127 / 1024))],
        [(64.0, ok(19.875))],  # falling as fast
    ),
    (Condition.LOW_LEVEL, [(1.0, ok(level_ok=True))], [(1.0, ok(level_ok=False))]),
    (Condition.COMM_LOSS, [(9.9, ok(comm_ok=False))], [(10.0, ok(comm_ok=False))]),
    (Condition.E_STOP, [(1.0, ok(e_stop=False))], [(1.0, ok(e_stop=True))]),
]


@pytest.mark.parametrize(
    ("condition", "below", "reached"),
    THRESHOLDS,
    ids=[f"{case[0].value}-{i}" for i, case in enumerate(THRESHOLDS)],
)
def test_each_condition_trips_at_its_threshold_and_not_below(
    condition: Condition,
    below: list[tuple[float, Readings]],
    reached: list[tuple[float, Readings]],
) -> None:
    assert series(running(), below).conditions[condition] is ConditionState.CLEAR
    state, actions, events = evaluate(
        series(running(), reached[:-1]), reached[-1][1], LIMITS, reached[-1][0]
    )
    assert state.conditions[condition] is ConditionState.ACTIVE
    raised = [e for e in events if e.kind is EventKind.RAISED and e.condition is condition]
    assert len(raised) == 1 and raised[0].message
    level = LIMITS.policies[condition].level
    assert raised[0].level is level
    if level is Level.TRIP:
        assert state.safety is SafetyState.TRIPPED
        assert actions.force is not None and actions.force.heater_pct == 0.0
    else:
        assert state.safety is SafetyState.ALARM and actions.force is None


def test_trip_reason_names_value_and_limit() -> None:
    _, actions, events = evaluate(running(), ok(31.25), LIMITS, 5.0)
    raised = next(e for e in events if e.kind is EventKind.RAISED)
    assert raised.condition is Condition.OVER_TEMPERATURE
    assert "31.250 °C" in raised.message and "30.000 °C" in raised.message
    assert actions.alarm is Condition.OVER_TEMPERATURE


# The reason each THRESHOLDS case must carry when it trips: the measured value and the limit
# with their units, as the run log shows them (texts are formatted only when a state changes).
REASONS = [
    "temperature 30.000 °C, limit 30.000 °C",
    "temperature 10.000 °C, limit 10.000 °C",
    "probe reads 60.000 °C, plausible only between -5.000 and 60.000 °C",
    "probe reads -5.000 °C, plausible only between -5.000 and 60.000 °C",
    "probe reads inf °C, plausible only between -5.000 and 60.000 °C",  # NaN is implausible
    "no probe reply for 30.0 s (limit 30.0 s)",
    "probe unchanged within 0 °C for 900 s (limit 900 s)",
    "temperature changing at +7.031 °C/h over 64 s (limit 7.031 °C/h)",
    "temperature changing at -7.031 °C/h over 64 s (limit 7.031 °C/h)",
    "water level switch low",
    "no good device exchange for 10.0 s (limit 10.0 s)",
    "emergency stop pressed",
]


@pytest.mark.parametrize(
    ("case", "reason"),
    list(zip(THRESHOLDS, REASONS, strict=True)),
    ids=[f"{case[0].value}-{i}" for i, case in enumerate(THRESHOLDS)],
)
def test_every_trip_event_carries_its_reason(
    case: tuple[Condition, list[tuple[float, Readings]], list[tuple[float, Readings]]],
    reason: str,
) -> None:
    condition, below, reached = case
    state = running()
    for t_s, readings in below:  # short of the threshold: nothing about this condition
        state, _, events = evaluate(state, readings, LIMITS, t_s)
        assert [e for e in events if e.condition is condition] == []
    state = series(running(), reached[:-1])
    _, _, events = evaluate(state, reached[-1][1], LIMITS, reached[-1][0])
    mine = [e for e in events if e.condition is condition]
    assert [(e.kind, e.message) for e in mine] == [(EventKind.RAISED, reason)]
    changed = [e for e in events if e.kind is EventKind.SAFETY_CHANGED]
    level = LIMITS.policies[condition].level.value
    assert [e.message for e in changed] == [f"normal -> {changed[0].safety.value}: "
                                            f"{condition.value} ({level})"]  # fmt: skip


def test_latched_and_cleared_events_carry_the_reason_at_that_tick() -> None:
    state = at(running(), ok(30.5), 10.0)
    state, _, events = evaluate(state, ok(25.0), LIMITS, 20.0)
    assert [e.message for e in events] == [
        "temperature 25.000 °C, limit 30.000 °C; latched until acknowledged"
    ]
    state = at(running(), ok(None), 30.0)  # stale (not latching), then a reply
    _, _, events = evaluate(state, ok(20.0), LIMITS, 31.0)
    assert [(e.kind, e.message) for e in events] == [
        (EventKind.CLEARED, "no probe reply for 0.0 s (limit 30.0 s)"),
        (EventKind.SAFETY_CHANGED, "tripped -> normal: all clear"),
    ]


def test_frozen_probe_tolerates_change_within_epsilon_only() -> None:
    limits = replace(LIMITS, frozen_epsilon_c=0.01)
    state = running(limits)
    for k in range(1, 91):  # jitter of 0.005 °C counts as frozen
        state = evaluate(state, ok(20.0 + 0.005 * (k % 2)), limits, 10.0 * k)[0]
    assert state.conditions[Condition.SENSOR_FROZEN] is ConditionState.ACTIVE
    state = running(limits)
    for k in range(1, 91):  # 0.02 °C steps are movement
        state = evaluate(state, ok(20.0 + 0.02 * (k % 2)), limits, 10.0 * k)[0]
    assert state.conditions[Condition.SENSOR_FROZEN] is ConditionState.CLEAR


def test_latched_trip_holds_outputs_safe_until_acknowledged() -> None:
    state = at(running(), ok(30.5), 10.0)
    state, actions, events = evaluate(state, ok(25.0), LIMITS, 20.0)
    assert state.conditions[Condition.OVER_TEMPERATURE] is ConditionState.LATCHED
    assert [e.kind for e in events] == [EventKind.LATCHED]
    assert state.safety is SafetyState.TRIPPED and actions.apply(WANTED) == SAFE
    state, actions, events = acknowledge(state, Condition.OVER_TEMPERATURE, LIMITS, 30.0)
    assert state.conditions[Condition.OVER_TEMPERATURE] is ConditionState.CLEAR
    assert state.safety is SafetyState.NORMAL and actions.apply(WANTED) == WANTED
    assert [e.kind for e in events] == [EventKind.ACKNOWLEDGED, EventKind.SAFETY_CHANGED]


def test_acknowledged_active_trip_clears_by_itself_when_the_condition_goes() -> None:
    state = at(running(), ok(30.5), 10.0)
    state, actions, _ = acknowledge(state, Condition.OVER_TEMPERATURE, LIMITS, 11.0)
    assert state.conditions[Condition.OVER_TEMPERATURE] is ConditionState.ACKNOWLEDGED
    assert actions.force == SAFE  # still present: still safe
    state, actions, _ = evaluate(state, ok(25.0), LIMITS, 12.0)
    assert state.conditions[Condition.OVER_TEMPERATURE] is ConditionState.CLEAR
    assert actions.force is None


def test_temperature_limit_clears_only_past_its_hysteresis() -> None:
    state = at(running(), ok(30.0), 1.0)
    state = at(state, ok(29.85), 2.0)  # inside the 0.2 °C band: still present
    assert state.conditions[Condition.OVER_TEMPERATURE] is ConditionState.ACTIVE
    state = at(state, ok(29.79), 3.0)
    assert state.conditions[Condition.OVER_TEMPERATURE] is ConditionState.LATCHED


def test_non_latching_trip_releases_when_the_condition_goes() -> None:
    state = at(running(), ok(None), 30.0)
    assert state.safety is SafetyState.TRIPPED
    state, actions, events = evaluate(state, ok(20.0), LIMITS, 31.0)
    assert state.conditions[Condition.SENSOR_STALE] is ConditionState.CLEAR
    assert state.safety is SafetyState.NORMAL and actions.force is None
    assert [e.kind for e in events] == [EventKind.CLEARED, EventKind.SAFETY_CHANGED]


def test_most_conservative_safe_state_wins_when_trips_combine() -> None:
    state = at(running(), ok(30.5, level_ok=False), 1.0)
    _, actions, _ = evaluate(state, ok(30.5, level_ok=False), LIMITS, 2.0)
    # Leak stops the pumps; over-temperature alone would keep them at the safe flow.
    assert actions.force == Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)


@pytest.mark.parametrize(
    ("level", "safety"), [(Level.WARNING, SafetyState.WARNING), (Level.ALARM, SafetyState.ALARM)]
)
def test_warning_and_alarm_levels_report_without_forcing_outputs(
    level: Level, safety: SafetyState
) -> None:
    limits = replace(LIMITS, policies={Condition.E_STOP: ConditionPolicy(level=level, latch=False)})
    state, actions, _ = evaluate(running(limits), ok(e_stop=True), limits, 1.0)
    assert state.safety is safety
    assert actions.force is None and actions.alarm is Condition.E_STOP


@pytest.mark.parametrize(
    ("condition", "make"),
    [
        (Condition.SENSOR_STALE, lambda: at(running(), ok(None), 30.0)),  # not latching
        (Condition.OVER_TEMPERATURE, running),  # latching but clear
        (
            Condition.OVER_TEMPERATURE,
            lambda: acknowledge(
                at(running(), ok(31.0), 1.0), Condition.OVER_TEMPERATURE, LIMITS, 2.0
            )[0],
        ),  # already acknowledged
    ],
    ids=["non-latching", "clear", "already-acknowledged"],
)
def test_illegal_acknowledgement_raises_and_leaves_state_unchanged(
    condition: Condition, make: object
) -> None:
    state = make()  # type: ignore[operator]
    snapshot = replace(state)
    with pytest.raises(IllegalInterlockEvent) as info:
        acknowledge(state, condition, LIMITS, 99.0)
    assert info.value.condition is condition
    assert state == snapshot


def test_time_must_not_run_backwards() -> None:
    state = at(running(), ok(), 10.0)
    with pytest.raises(ValueError, match="before the previous"):
        evaluate(state, ok(), LIMITS, 9.0)
    with pytest.raises(ValueError, match="finite"):
        evaluate(state, ok(), LIMITS, math.nan)


def test_events_and_limits_validate_themselves() -> None:
    with pytest.raises(ValueError):
        InterlockEvent(
            kind=EventKind.SAFETY_CHANGED,
            t_s=0.0,
            message="x",
            condition=Condition.E_STOP,
            level=Level.TRIP,
        )
    with pytest.raises(ValueError):
        InterlockEvent(kind=EventKind.RAISED, t_s=0.0, message="x", condition=Condition.E_STOP)
    with pytest.raises(ValueError):
        replace(LIMITS, max_temperature_c=70.0)  # beyond the probe's plausible range
    with pytest.raises(ValueError):
        replace(LIMITS, stale_after_s=0.0)
    with pytest.raises(ValueError):
        Outputs(heater_pct=101.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)


def test_rendered_table_matches_what_acknowledge_allows() -> None:
    text = transition_table_markdown()
    rows = re.findall(r"^\| (yes|no) \| (\w+) \| (\w+) \| (\w+) \|$", text, flags=re.M)
    table = {
        (latch == "yes", ConditionState(a), sig): ConditionState(b) for latch, a, sig, b in rows
    }
    assert len(table) == 14
    for latch, condition in ((True, Condition.E_STOP), (False, Condition.COMM_LOSS)):
        for before in ConditionState:
            state = replace(
                running(),
                conditions={**running().conditions, condition: before},
            )
            documented = table.get((latch, before, "ack"))
            if documented is None:
                with pytest.raises(IllegalInterlockEvent):
                    acknowledge(state, condition, LIMITS, 1.0)
            else:
                after = acknowledge(state, condition, LIMITS, 1.0)[0].conditions[condition]
                assert after is documented


readings_strategy = st.builds(
    Readings,
    temperature_c=st.one_of(
        st.none(), st.floats(allow_nan=True, allow_infinity=True), st.floats(5.0, 35.0)
    ),
    level_ok=st.one_of(st.none(), st.booleans()),
    comm_ok=st.one_of(st.none(), st.booleans()),
    e_stop=st.one_of(st.none(), st.booleans()),
)
step_strategy = st.tuples(
    st.floats(0.0, 120.0), readings_strategy, st.one_of(st.none(), st.sampled_from(Condition))
)


@settings(max_examples=150, deadline=None)
@given(st.lists(step_strategy, min_size=1, max_size=40))
def test_random_sequences_never_leave_outputs_unsafe_while_tripped(
    steps: list[tuple[float, Readings, Condition | None]],
) -> None:
    state, t_s = InterlockState(), 0.0
    for dt_s, readings, ack in steps:
        t_s += dt_s
        state, actions, events = evaluate(state, readings, LIMITS, t_s)
        if ack is not None:
            before = state
            try:
                state, actions, _ = acknowledge(state, ack, LIMITS, t_s)
            except IllegalInterlockEvent:
                assert state == before
        trip_holding = any(LIMITS.policies[c].level is Level.TRIP for c in state.holding())
        assert (state.safety is SafetyState.TRIPPED) == trip_holding
        if state.safety in (SafetyState.STARTING, SafetyState.TRIPPED) or not state.healthy_seen:
            force = actions.force
            assert force is not None
            assert force.heater_pct == force.chiller_pct == force.lamp_pct == 0.0
            assert force.pump_pct <= LIMITS.safe_pump_pct
        else:
            assert actions.force is None
        for event in events:
            assert event.message and event.t_s == t_s
