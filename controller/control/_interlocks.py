"""Safety interlocks of one chamber as a pure state machine.

Rules of this module
--------------------
- Everything that decides how a condition's state changes lives in ``_TRANSITIONS`` just
  below the enums: one table keyed by (latching?, state, signal). Code and the docs
  renderer (:func:`transition_table_markdown`) both read it. A signal with no entry is
  illegal: it raises :class:`IllegalInterlockEvent` and the state is left as it was.
- Each tick, every :class:`Condition` yields the signal ACTIVE, CLEAR, or nothing (no new
  information, e.g. no probe reply this tick). A condition becomes active when its measure
  *reaches* its threshold (≥ for upper limits and durations, ≤ for lower limits); the
  temperature limits clear only ``temperature_hysteresis_c`` inside the limit.
- A condition is *holding* while ACTIVE, ACKNOWLEDGED or LATCHED. The chamber's
  :class:`SafetyState` is the most severe level among holding conditions, except that it
  starts as STARTING and stays there until the first healthy evaluation (a fresh, in-range
  temperature, no trip holding, and no negative level, comm or E-stop reading).
- Fail safe: while STARTING or TRIPPED the actions force every output to a safe state
  (heaters off, chiller off, lamps off, pumps at the safe flow; the lowest value wins when
  several trips name different safe states). WARNING and ALARM only report.
- Nothing here reads a clock or does I/O: the caller passes readings and the time.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from enum import Enum
from types import MappingProxyType

from controller.control._interlock_config import (
    Condition,
    InterlockLimits,
    Level,
    Outputs,
    Readings,
)

__all__ = [
    "Actions",
    "ConditionState",
    "EventKind",
    "IllegalInterlockEvent",
    "InterlockEvent",
    "InterlockState",
    "SafetyState",
    "Signal",
    "acknowledge",
    "evaluate",
    "transition_table_markdown",
]


class ConditionState(Enum):
    """Where one condition stands (alarm-management style)."""

    __hash__ = object.__hash__  # members are singletons; the C hash is 2x faster

    CLEAR = "clear"  # not present
    ACTIVE = "active"  # present, not acknowledged
    ACKNOWLEDGED = "acknowledged"  # present, acknowledged (clears by itself when it goes)
    LATCHED = "latched"  # gone, but latching and not yet acknowledged


class Signal(Enum):
    """What drives a condition's state."""

    __hash__ = object.__hash__  # members are singletons; the C hash is 2x faster

    ACTIVE = "active"  # the condition is present this tick
    CLEAR = "clear"  # the condition is absent this tick
    ACK = "ack"  # an operator acknowledges it


_C, _S = ConditionState, Signal

#: The one transition table: (latching, state, signal) -> next state. Missing = illegal.
_TRANSITIONS: Mapping[tuple[bool, ConditionState, Signal], ConditionState] = MappingProxyType(
    {
        # Non-latching: follows the condition; there is nothing to acknowledge.
        (False, _C.CLEAR, _S.ACTIVE): _C.ACTIVE,
        (False, _C.CLEAR, _S.CLEAR): _C.CLEAR,
        (False, _C.ACTIVE, _S.ACTIVE): _C.ACTIVE,
        (False, _C.ACTIVE, _S.CLEAR): _C.CLEAR,
        # Latching: holds after the condition goes until acknowledged.
        (True, _C.CLEAR, _S.ACTIVE): _C.ACTIVE,
        (True, _C.CLEAR, _S.CLEAR): _C.CLEAR,
        (True, _C.ACTIVE, _S.ACTIVE): _C.ACTIVE,
        (True, _C.ACTIVE, _S.CLEAR): _C.LATCHED,
        (True, _C.ACTIVE, _S.ACK): _C.ACKNOWLEDGED,
        (True, _C.ACKNOWLEDGED, _S.ACTIVE): _C.ACKNOWLEDGED,
        (True, _C.ACKNOWLEDGED, _S.CLEAR): _C.CLEAR,
        (True, _C.LATCHED, _S.ACTIVE): _C.ACTIVE,
        (True, _C.LATCHED, _S.CLEAR): _C.LATCHED,
        (True, _C.LATCHED, _S.ACK): _C.CLEAR,
    }
)

_HOLDING = frozenset({_C.ACTIVE, _C.ACKNOWLEDGED, _C.LATCHED})
_PRESENT = frozenset({_C.ACTIVE, _C.ACKNOWLEDGED})


class SafetyState(Enum):
    """The chamber's overall interlock state."""

    __hash__ = object.__hash__  # members are singletons; the C hash is 2x faster

    STARTING = "starting"  # no healthy evaluation yet: outputs safe
    NORMAL = "normal"
    WARNING = "warning"
    ALARM = "alarm"
    TRIPPED = "tripped"  # a trip-level condition holds: outputs safe


_SAFETY_OF_LEVEL = {
    Level.WARNING: SafetyState.WARNING,
    Level.ALARM: SafetyState.ALARM,
    Level.TRIP: SafetyState.TRIPPED,
}
_RANK = {Level.WARNING: 1, Level.ALARM: 2, Level.TRIP: 3}


class IllegalInterlockEvent(Exception):
    """A signal the transition table does not allow (e.g. acknowledging a non-latching
    condition); the state it was applied to is unchanged."""

    def __init__(self, condition: Condition, state: ConditionState, signal: Signal) -> None:
        super().__init__(
            f"{signal.value} is not allowed for {condition.value} in state {state.value}"
        )
        self.condition = condition
        self.state = state
        self.signal = signal


@dataclass(frozen=True, kw_only=True)
class InterlockState:
    """Everything the interlocks remember; build the first one with ``InterlockState()``.

    Parameters
    ----------
    conditions
        State of every condition.
    safety
        Overall state.
    started_s, last_t_s
        Clock times of the first and of the latest evaluation, s.
    last_reply_s
        Clock time of the latest probe reply, s.
    frozen_ref_c, frozen_since_s
        Reading the frozen check compares with (°C) and since when it has not moved (s).
    rate_anchor_c, rate_anchor_s
        Start of the current rate-of-change window: reading (°C) and time (s).
    last_comm_ok_s
        Clock time of the latest good exchange with the devices, s.
    healthy_seen
        Whether an evaluation has been healthy yet (until then the state is STARTING).
    actions
        The actions decided by the latest evaluation or acknowledgement; None before any.
    """

    conditions: Mapping[Condition, ConditionState] = field(
        default_factory=lambda: MappingProxyType(dict.fromkeys(Condition, ConditionState.CLEAR))
    )
    safety: SafetyState = SafetyState.STARTING
    started_s: float | None = None
    last_t_s: float | None = None
    last_reply_s: float | None = None
    frozen_ref_c: float | None = None
    frozen_since_s: float | None = None
    rate_anchor_c: float | None = None
    rate_anchor_s: float | None = None
    last_comm_ok_s: float | None = None
    healthy_seen: bool = False
    actions: Actions | None = None

    def holding(self) -> tuple[Condition, ...]:
        """Conditions that are active, acknowledged or latched, in declaration order."""
        return tuple(c for c in Condition if self.conditions[c] in _HOLDING)


class EventKind(Enum):
    """Kinds of interlock events written to the run log."""

    __hash__ = object.__hash__  # members are singletons; the C hash is 2x faster

    RAISED = "raised"
    CLEARED = "cleared"
    LATCHED = "latched"
    ACKNOWLEDGED = "acknowledged"
    SAFETY_CHANGED = "safety-changed"


@dataclass(frozen=True, kw_only=True)
class InterlockEvent:
    """One thing that happened, with its reason.

    Parameters
    ----------
    kind
        What happened.
    t_s
        Clock time, s.
    message
        Human-readable reason (values and thresholds with units).
    condition
        The condition concerned; None only for SAFETY_CHANGED.
    level
        The condition's level; None only for SAFETY_CHANGED.
    safety
        The new overall state; set only for SAFETY_CHANGED.
    """

    kind: EventKind
    t_s: float
    message: str
    condition: Condition | None = None
    level: Level | None = None
    safety: SafetyState | None = None

    def __post_init__(self) -> None:
        overall = self.kind is EventKind.SAFETY_CHANGED
        if overall != (self.safety is not None) or overall == (self.condition is not None):
            raise ValueError("SAFETY_CHANGED events carry a safety state and no condition")
        if (self.condition is None) != (self.level is None):
            raise ValueError("condition events carry the condition's level")


@dataclass(frozen=True, kw_only=True)
class Actions:
    """What the control loop must do after an evaluation.

    Parameters
    ----------
    force
        Outputs to apply instead of the controller's, or None to let control decide.
    alarm
        The most severe holding condition (first in declaration order among equals), or None.
    """

    force: Outputs | None
    alarm: Condition | None

    def apply(self, wanted: Outputs) -> Outputs:
        """Return the outputs to drive: the forced ones if any, else ``wanted``."""
        return wanted if self.force is None else self.force


def _step(
    condition: Condition, latch: bool, state: ConditionState, signal: Signal
) -> ConditionState:
    try:
        return _TRANSITIONS[(latch, state, signal)]
    except KeyError:
        raise IllegalInterlockEvent(condition, state, signal) from None


#: One signal: condition, present?, reason template and its arguments (formatted only when
#: the signal changes the condition's state, so quiet ticks format no text).
_Reason = tuple[Condition, bool, str, tuple[float, ...]]


def _signals(
    old: InterlockState, memory: dict[str, float], readings: Readings, limits: InterlockLimits
) -> list[_Reason]:
    """Each condition's signal this tick; a condition not listed has no new information."""
    t_s = memory["last_t_s"]
    out: list[_Reason] = []
    reply = readings.temperature_c
    valid = reply is not None and limits.sensor_min_c < reply < limits.sensor_max_c
    if reply is not None:
        out.append(
            (
                Condition.SENSOR_OUT_OF_RANGE,
                not valid,
                "probe reads {:.3f} °C, plausible only between {:.3f} and {:.3f} °C",
                (reply, limits.sensor_min_c, limits.sensor_max_c),
            )
        )
    age_s = t_s - memory["last_reply_s"]
    out.append(
        (
            Condition.SENSOR_STALE,
            age_s >= limits.stale_after_s,
            "no probe reply for {:.1f} s (limit {:.1f} s)",
            (age_s, limits.stale_after_s),
        )
    )
    if valid and reply is not None:
        hyst = limits.temperature_hysteresis_c
        high, low = limits.max_temperature_c, limits.min_temperature_c
        hot = old.conditions[Condition.OVER_TEMPERATURE] in _PRESENT
        cold = old.conditions[Condition.UNDER_TEMPERATURE] in _PRESENT
        out.append(
            (
                Condition.OVER_TEMPERATURE,
                reply >= high or (hot and reply > high - hyst),
                "temperature {:.3f} °C, limit {:.3f} °C",
                (reply, high),
            )
        )
        out.append(
            (
                Condition.UNDER_TEMPERATURE,
                reply <= low or (cold and reply < low + hyst),
                "temperature {:.3f} °C, limit {:.3f} °C",
                (reply, low),
            )
        )
        still_s = t_s - memory["frozen_since_s"]
        out.append(
            (
                Condition.SENSOR_FROZEN,
                still_s >= limits.frozen_after_s,
                "probe unchanged within {:g} °C for {:.0f} s (limit {:.0f} s)",
                (limits.frozen_epsilon_c, still_s, limits.frozen_after_s),
            )
        )
        if old.rate_anchor_s is not None and old.rate_anchor_c is not None:
            span_s = t_s - old.rate_anchor_s
            if span_s >= limits.rate_window_s:
                rate = (reply - old.rate_anchor_c) / span_s * 3600.0
                out.append(
                    (
                        Condition.RATE_OF_CHANGE,
                        abs(rate) >= limits.max_rate_c_per_h,
                        "temperature changing at {:+.3f} °C/h over {:.0f} s (limit {:.3f} °C/h)",
                        (rate, span_s, limits.max_rate_c_per_h),
                    )
                )
    if readings.level_ok is not None:
        out.append((Condition.LOW_LEVEL, not readings.level_ok, "water level switch low", ()))
    comm_age_s = t_s - memory["last_comm_ok_s"]
    out.append(
        (
            Condition.COMM_LOSS,
            comm_age_s >= limits.comm_loss_after_s,
            "no good device exchange for {:.1f} s (limit {:.1f} s)",
            (comm_age_s, limits.comm_loss_after_s),
        )
    )
    if readings.e_stop is not None:
        out.append((Condition.E_STOP, readings.e_stop, "emergency stop pressed", ()))
    return out


def _remember(
    state: InterlockState, readings: Readings, limits: InterlockLimits, t_s: float
) -> dict[str, float]:
    """The memory (not the condition states) after this tick's readings."""
    started = state.started_s if state.started_s is not None else t_s
    memory = {
        "started_s": started,
        "last_t_s": t_s,
        "last_reply_s": started if state.last_reply_s is None else state.last_reply_s,
        "last_comm_ok_s": started if state.last_comm_ok_s is None else state.last_comm_ok_s,
        "frozen_ref_c": state.frozen_ref_c,
        "frozen_since_s": state.frozen_since_s,
        "rate_anchor_c": state.rate_anchor_c,
        "rate_anchor_s": state.rate_anchor_s,
    }
    if readings.comm_ok:
        memory["last_comm_ok_s"] = t_s
    reply = readings.temperature_c
    if reply is not None:
        memory["last_reply_s"] = t_s
        if limits.sensor_min_c < reply < limits.sensor_max_c:
            ref = state.frozen_ref_c
            if ref is None or abs(reply - ref) > limits.frozen_epsilon_c:
                memory["frozen_ref_c"], memory["frozen_since_s"] = reply, t_s
            anchor = state.rate_anchor_s
            if anchor is None or t_s - anchor >= limits.rate_window_s:
                memory["rate_anchor_c"], memory["rate_anchor_s"] = reply, t_s
    return memory  # type: ignore[return-value]


def _worst(
    conditions: Mapping[Condition, ConditionState], limits: InterlockLimits
) -> Condition | None:
    worst: Condition | None = None
    for condition in Condition:
        if conditions[condition] in _HOLDING and (
            worst is None
            or _RANK[limits.policies[condition].level] > _RANK[limits.policies[worst].level]
        ):
            worst = condition
    return worst


def _conclude(
    old: InterlockState,
    conditions: Mapping[Condition, ConditionState],
    limits: InterlockLimits,
    t_s: float,
    healthy: bool,
    events: list[InterlockEvent],
) -> tuple[SafetyState, bool, Actions]:
    """Derive safety, healthy_seen and actions from the condition states; add the
    SAFETY_CHANGED event to ``events`` when the safety state changes."""
    worst = _worst(conditions, limits)
    level = limits.policies[worst].level if worst is not None else None
    healthy_seen = old.healthy_seen or (healthy and level is not Level.TRIP)
    if level is Level.TRIP:
        safety = SafetyState.TRIPPED
    elif not healthy_seen:
        safety = SafetyState.STARTING
    else:
        safety = SafetyState.NORMAL if level is None else _SAFETY_OF_LEVEL[level]
    if safety is not old.safety:
        why = f"{worst.value} ({level.value})" if worst is not None and level else "all clear"
        events.append(
            InterlockEvent(
                kind=EventKind.SAFETY_CHANGED,
                t_s=t_s,
                safety=safety,
                message=f"{old.safety.value} -> {safety.value}: {why}",
            )
        )
    force: Outputs | None = None
    if safety is SafetyState.STARTING:
        force = limits.safe_outputs()
    elif safety is SafetyState.TRIPPED:
        safes = [
            limits.policies[c].safe or limits.safe_outputs()
            for c in Condition
            if conditions[c] in _HOLDING and limits.policies[c].level is Level.TRIP
        ]
        force = Outputs(
            heater_pct=min(s.heater_pct for s in safes),
            chiller_pct=min(s.chiller_pct for s in safes),
            lamp_pct=min(s.lamp_pct for s in safes),
            pump_pct=min(s.pump_pct for s in safes),
        )
    return safety, healthy_seen, Actions(force=force, alarm=worst)


def evaluate(
    state: InterlockState, readings: Readings, limits: InterlockLimits, t_s: float
) -> tuple[InterlockState, Actions, tuple[InterlockEvent, ...]]:
    """Evaluate one chamber's interlocks for one tick.

    Parameters
    ----------
    state
        State from the previous evaluation (``InterlockState()`` at the start of a run).
    readings
        What arrived this tick.
    limits
        Thresholds and policies.
    t_s
        Clock time, s, not before the previous evaluation.

    Returns
    -------
    tuple
        ``(new_state, actions, events)``: the new state, what to do with the outputs, and
        the events (raised, cleared, latched, safety changed) with their reasons.
    """
    if not math.isfinite(t_s):
        raise ValueError(f"t_s must be finite, got {t_s!r}")
    if state.last_t_s is not None and t_s < state.last_t_s:
        raise ValueError(f"t_s {t_s!r} is before the previous evaluation at {state.last_t_s!r}")
    temperature = readings.temperature_c
    if temperature is not None and math.isnan(temperature):
        readings = replace(readings, temperature_c=math.inf)  # NaN is an implausible reading
        temperature = math.inf
    memory = _remember(state, readings, limits, t_s)
    conditions: Mapping[Condition, ConditionState] = state.conditions
    events: list[InterlockEvent] = []
    for condition, present, template, args in _signals(state, memory, readings, limits):
        policy = limits.policies[condition]
        before = conditions[condition]
        after = _step(condition, policy.latch, before, Signal.ACTIVE if present else Signal.CLEAR)
        if after is before:
            continue
        if conditions is state.conditions:
            conditions = dict(conditions)
        conditions[condition] = after  # type: ignore[index]
        why = template.format(*args)
        if after in _PRESENT and before not in _PRESENT:
            kind = EventKind.RAISED
        elif after is ConditionState.LATCHED:
            kind, why = EventKind.LATCHED, f"{why}; latched until acknowledged"
        else:
            kind = EventKind.CLEARED
        events.append(
            InterlockEvent(kind=kind, t_s=t_s, condition=condition, level=policy.level, message=why)
        )
    healthy = (
        temperature is not None
        and limits.sensor_min_c < temperature < limits.sensor_max_c
        and readings.comm_ok is not False
        and readings.level_ok is not False
        and readings.e_stop is not True
    )
    if (
        conditions is state.conditions
        and state.actions is not None
        and (state.healthy_seen or not healthy)
    ):
        safety, healthy_seen, actions = state.safety, state.healthy_seen, state.actions
    else:
        conditions = MappingProxyType(dict(conditions))
        safety, healthy_seen, actions = _conclude(state, conditions, limits, t_s, healthy, events)
    new = InterlockState(
        conditions=conditions,
        safety=safety,
        healthy_seen=healthy_seen,
        actions=actions,
        **memory,  # type: ignore[arg-type]
    )
    return new, actions, tuple(events)


def acknowledge(
    state: InterlockState, condition: Condition, limits: InterlockLimits, t_s: float
) -> tuple[InterlockState, Actions, tuple[InterlockEvent, ...]]:
    """Acknowledge one latching condition (an operator action).

    Parameters
    ----------
    state
        Current state.
    condition
        The condition acknowledged.
    limits
        Thresholds and policies.
    t_s
        Clock time, s.

    Returns
    -------
    tuple
        ``(new_state, actions, events)`` as from :func:`evaluate`.

    Raises
    ------
    IllegalInterlockEvent
        When the condition is not latching or has nothing to acknowledge; ``state`` is
        unchanged (it is immutable, and nothing else is touched).
    """
    if not math.isfinite(t_s):
        raise ValueError(f"t_s must be finite, got {t_s!r}")
    policy = limits.policies[condition]
    before = state.conditions[condition]
    after = _step(condition, policy.latch, before, Signal.ACK)
    conditions = dict(state.conditions)
    conditions[condition] = after
    event = InterlockEvent(
        kind=EventKind.ACKNOWLEDGED,
        t_s=t_s,
        condition=condition,
        level=policy.level,
        message=f"{condition.value} acknowledged ({before.value} -> {after.value})",
    )
    frozen = MappingProxyType(conditions)
    events = [event]
    safety, healthy_seen, actions = _conclude(state, frozen, limits, t_s, False, events)
    new = replace(
        state, conditions=frozen, safety=safety, healthy_seen=healthy_seen, actions=actions
    )
    return new, actions, tuple(events)


def transition_table_markdown() -> str:
    """Render the transition table and the level map as Markdown for the docs.

    Returns
    -------
    str
        Two Markdown tables: condition-state transitions (anything not listed is illegal),
        and how the most severe holding level sets the chamber's safety state.
    """
    lines = [
        "| Latching | From | Signal | To |",
        "|---|---|---|---|",
    ]
    for (latch, before, signal), after in _TRANSITIONS.items():
        lines.append(
            f"| {'yes' if latch else 'no'} | {before.value} | {signal.value} | {after.value} |"
        )
    lines += [
        "",
        "| Most severe holding level | Safety state | Outputs |",
        "|---|---|---|",
        "| none (before the first healthy evaluation) | starting | forced safe |",
        "| none | normal | control |",
    ]
    for level, safety in _SAFETY_OF_LEVEL.items():
        outputs = "forced safe" if level is Level.TRIP else "control"
        lines.append(f"| {level.value} | {safety.value} | {outputs} |")
    return "\n".join(lines) + "\n"
