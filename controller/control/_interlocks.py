"""Safety interlocks of one chamber as a pure state machine.

Rules of this module
--------------------
- Everything that decides how a condition's state changes lives in ``_TRANSITIONS``, in
  ``_interlock_table.py`` with the condition states and signals: one table keyed by
  (latching?, state, signal). Code and the docs renderer (:func:`transition_table_markdown`)
  both read it. A signal with no entry is illegal: it raises
  :class:`IllegalInterlockEvent` and the state is left as it was.
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
- A quiet tick is cheap (it runs for every chamber every tick): the per-tick path reads
  ``_NEXT``, the table re-indexed, and formats a reason text only when a signal changes a
  condition's state (:func:`reason_text`, in ``_interlock_reasons.py``). A quiet chamber
  that stays quiet goes a shorter way still (at the top of :func:`evaluate_values`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from types import MappingProxyType

from controller.control._interlock_config import (
    Actions,
    Condition,
    EventKind,
    InterlockEvent,
    InterlockLimits,
    Level,
    Outputs,
    Readings,
    SafetyState,
)
from controller.control._interlock_reasons import reason_text
from controller.control._interlock_table import (
    _HOLDING,
    _NEXT,
    _PRESENT,
    _QUIET,
    _RANK,
    _SAFETY_OF_LEVEL,
    ConditionState,
    IllegalInterlockEvent,
    Signal,
    _step,
    transition_table_markdown,
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
    "evaluate_values",
    "transition_table_markdown",
]


#: Every condition CLEAR. States share this one read-only mapping whenever nothing holds
#: (:func:`_frozen`), so :func:`evaluate_values` tells a quiet chamber by identity alone.
_ALL_CLEAR: Mapping[Condition, ConditionState] = MappingProxyType(
    dict.fromkeys(Condition, ConditionState.CLEAR)
)


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

    conditions: Mapping[Condition, ConditionState] = field(default_factory=lambda: _ALL_CLEAR)
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


def _frozen(conditions: dict[Condition, ConditionState]) -> Mapping[Condition, ConditionState]:
    """A read-only view of a fresh dict of condition states; :data:`_ALL_CLEAR` when all
    are clear."""
    if all(state is ConditionState.CLEAR for state in conditions.values()):
        return _ALL_CLEAR
    return MappingProxyType(conditions)


#: The order in which a tick's signals are applied (and their events listed).
_SIGNAL_ORDER = (
    Condition.SENSOR_OUT_OF_RANGE,
    Condition.SENSOR_STALE,
    Condition.OVER_TEMPERATURE,
    Condition.UNDER_TEMPERATURE,
    Condition.SENSOR_FROZEN,
    Condition.RATE_OF_CHANGE,
    Condition.LOW_LEVEL,
    Condition.COMM_LOSS,
    Condition.E_STOP,
)


def _remember(
    state: InterlockState,
    comm_ok: bool | None,
    reply: float | None,
    limits: InterlockLimits,
    t_s: float,
) -> InterlockState:
    """The next state with the memory this tick's readings leave (times in s, readings in
    °C); ``reply`` is the probe reading with NaN already made implausible (°C, or None: no
    reply). Its conditions, safety, healthy_seen and actions are still ``state``'s: only
    :func:`evaluate_values`, which built it, sets them before anyone else sees it."""
    started = state.started_s if state.started_s is not None else t_s
    last_reply = state.last_reply_s
    last_comm = state.last_comm_ok_s
    frozen_ref, frozen_since = state.frozen_ref_c, state.frozen_since_s
    anchor_c, anchor_s = state.rate_anchor_c, state.rate_anchor_s
    if comm_ok:
        last_comm = t_s
    if reply is not None:
        last_reply = t_s
        if limits.sensor_min_c < reply < limits.sensor_max_c:
            if frozen_ref is None or abs(reply - frozen_ref) > limits.frozen_epsilon_c:
                frozen_ref, frozen_since = reply, t_s
            if anchor_s is None or t_s - anchor_s >= limits.rate_window_s:
                anchor_c, anchor_s = reply, t_s
    # Every field given, none validated by InterlockState: set the frozen instance's
    # attribute dict in one go instead of twelve object.__setattr__ calls (a third of the
    # cost of a quiet tick otherwise).
    new = object.__new__(InterlockState)
    object.__setattr__(
        new,
        "__dict__",
        {
            "conditions": state.conditions,
            "safety": state.safety,
            "started_s": started,
            "last_t_s": t_s,
            "last_reply_s": started if last_reply is None else last_reply,
            "frozen_ref_c": frozen_ref,
            "frozen_since_s": frozen_since,
            "rate_anchor_c": anchor_c,
            "rate_anchor_s": anchor_s,
            "last_comm_ok_s": started if last_comm is None else last_comm,
            "healthy_seen": state.healthy_seen,
            "actions": state.actions,
        },
    )
    return new


def _signals(
    old: InterlockState,
    memory: InterlockState,
    level_ok: bool | None,
    e_stop: bool | None,
    reply: float | None,
    limits: InterlockLimits,
) -> tuple[bool | None, ...]:
    """Each condition's signal this tick, in ``_SIGNAL_ORDER``: True (present), False
    (absent) or None (no new information). No text is made here: see :func:`reason_text`."""
    t_s = memory.last_t_s
    valid = reply is not None and limits.sensor_min_c < reply < limits.sensor_max_c
    stale = t_s - memory.last_reply_s >= limits.stale_after_s
    low = None if level_ok is None else not level_ok
    comm = t_s - memory.last_comm_ok_s >= limits.comm_loss_after_s
    if not valid:
        out_of_range = None if reply is None else True
        return (out_of_range, stale, None, None, None, None, low, comm, e_stop)
    assert reply is not None and memory.frozen_since_s is not None
    hyst = limits.temperature_hysteresis_c
    high, floor = limits.max_temperature_c, limits.min_temperature_c
    # inside the hysteresis band a limit holds only if it was already present
    hot = reply >= high or (
        reply > high - hyst and old.conditions[Condition.OVER_TEMPERATURE] in _PRESENT
    )
    cold = reply <= floor or (
        reply < floor + hyst and old.conditions[Condition.UNDER_TEMPERATURE] in _PRESENT
    )
    frozen = t_s - memory.frozen_since_s >= limits.frozen_after_s
    fast: bool | None = None
    anchor_s, anchor_c = old.rate_anchor_s, old.rate_anchor_c
    if anchor_s is not None and anchor_c is not None:
        span_s = t_s - anchor_s
        if span_s >= limits.rate_window_s:
            fast = abs((reply - anchor_c) / span_s * 3600.0) >= limits.max_rate_c_per_h
    return (False, stale, hot, cold, frozen, fast, low, comm, e_stop)


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
    return evaluate_values(
        state,
        readings.temperature_c,
        readings.level_ok,
        readings.comm_ok,
        readings.e_stop,
        limits,
        t_s,
    )


def evaluate_values(
    state: InterlockState,
    temperature_c: float | None,
    level_ok: bool | None,
    comm_ok: bool | None,
    e_stop: bool | None,
    limits: InterlockLimits,
    t_s: float,
) -> tuple[InterlockState, Actions, tuple[InterlockEvent, ...]]:
    """:func:`evaluate` with the readings given one by one (no :class:`Readings` to build).

    Parameters
    ----------
    state
        State from the previous evaluation.
    temperature_c
        Probe reading, °C, or None (no reply), as :attr:`Readings.temperature_c`.
    level_ok
        Level switch, dimensionless, as :attr:`Readings.level_ok`.
    comm_ok
        Device exchange, dimensionless, as :attr:`Readings.comm_ok`.
    e_stop
        Emergency stop, dimensionless, as :attr:`Readings.e_stop`.
    limits
        Thresholds and policies.
    t_s
        Clock time, s, not before the previous evaluation.

    Returns
    -------
    tuple
        ``(new_state, actions, events)`` as from :func:`evaluate`.
    """
    if not math.isfinite(t_s):
        raise ValueError(f"t_s must be finite, got {t_s!r}")
    if state.last_t_s is not None and t_s < state.last_t_s:
        raise ValueError(f"t_s {t_s!r} is before the previous evaluation at {state.last_t_s!r}")
    # A quiet chamber that stays quiet takes a short way. Quiet: nothing holds (the shared
    # _ALL_CLEAR), a healthy evaluation was seen and actions were decided. It stays quiet
    # when no condition is present this tick; then the full way (_evaluate_full) would
    # change no condition (CLEAR stays CLEAR on CLEAR or on no news), conclude nothing anew
    # (healthy_seen already true: safety and actions are kept) and report no event; only
    # the memory moves. No condition is present when:
    # - the probe replied inside the temperature limits (floor < reply < high; the limits
    #   lie inside the sensor range, so the reply is valid, neither hot nor cold, and the
    #   hysteresis bands do not matter while nothing holds), so it is not stale either
    #   (its reply is this tick's, stale_after_s > 0);
    # - the devices answered (comm_ok; comm_loss_after_s > 0), the level is not reported
    #   low and the E-stop not reported pressed;
    # - the probe is neither frozen nor moving too fast, tested as _signals tests them, on
    #   the memory as _remember moves it.
    # Anything else goes the full way. tests/control/test_fast_paths.py walks both ways
    # through random faults and compares every state, action and event.
    if (
        state.conditions is _ALL_CLEAR
        and state.healthy_seen
        and state.actions is not None
        and comm_ok
        and level_ok is not False
        and not e_stop
        and temperature_c is not None
        and limits.min_temperature_c < temperature_c < limits.max_temperature_c  # NaN fails
    ):
        reply = temperature_c
        frozen_ref, frozen_since = state.frozen_ref_c, state.frozen_since_s
        if frozen_ref is None or abs(reply - frozen_ref) > limits.frozen_epsilon_c:
            frozen_ref, frozen_since = reply, t_s
        assert frozen_since is not None  # set together with frozen_ref
        anchor_c, anchor_s = state.rate_anchor_c, state.rate_anchor_s
        renew = anchor_s is None or t_s - anchor_s >= limits.rate_window_s
        fast = (
            renew
            and anchor_s is not None
            and anchor_c is not None
            and abs((reply - anchor_c) / (t_s - anchor_s) * 3600.0) >= limits.max_rate_c_per_h
        )
        if not fast and t_s - frozen_since < limits.frozen_after_s:
            if renew:
                anchor_c, anchor_s = reply, t_s
            started = state.started_s
            new = object.__new__(InterlockState)
            object.__setattr__(  # as in _remember: every field given, nothing to validate
                new,
                "__dict__",
                {
                    "conditions": _ALL_CLEAR,
                    "safety": state.safety,
                    "started_s": t_s if started is None else started,
                    "last_t_s": t_s,
                    "last_reply_s": t_s,
                    "frozen_ref_c": frozen_ref,
                    "frozen_since_s": frozen_since,
                    "rate_anchor_c": anchor_c,
                    "rate_anchor_s": anchor_s,
                    "last_comm_ok_s": t_s,
                    "healthy_seen": True,
                    "actions": state.actions,
                },
            )
            return new, state.actions, ()
    return _evaluate_full(state, temperature_c, level_ok, comm_ok, e_stop, limits, t_s)


def _evaluate_full(
    state: InterlockState,
    temperature_c: float | None,
    level_ok: bool | None,
    comm_ok: bool | None,
    e_stop: bool | None,
    limits: InterlockLimits,
    t_s: float,
) -> tuple[InterlockState, Actions, tuple[InterlockEvent, ...]]:
    """:func:`evaluate_values` the whole way, any state (arguments as its, t_s checked)."""
    reply = temperature_c
    if reply is not None and math.isnan(reply):
        reply = math.inf  # NaN is an implausible reading
    new = _remember(state, comm_ok, reply, limits, t_s)
    signals = _signals(state, new, level_ok, e_stop, reply, limits)
    policies = limits.policies
    conditions: Mapping[Condition, ConditionState] = state.conditions
    events: list[InterlockEvent] = []
    # a quiet chamber (nothing holds, nothing present) skips the loop: CLEAR stays CLEAR
    quiet = conditions is _ALL_CLEAR and not any(signals)
    for condition, present in () if quiet else zip(_SIGNAL_ORDER, signals, strict=True):
        if present is None:
            continue
        before = conditions[condition]
        if before is _QUIET and not present:
            continue  # CLEAR stays CLEAR on CLEAR, latching or not (checked below the table)
        policy = policies[condition]
        after = _NEXT[policy.latch][before][present]
        if after is before:
            continue
        if after is None:
            raise IllegalInterlockEvent(
                condition, before, Signal.ACTIVE if present else Signal.CLEAR
            )
        if conditions is state.conditions:
            conditions = dict(conditions)
        conditions[condition] = after  # type: ignore[index]
        why = reason_text(condition, state, new, reply, limits)
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
        reply is not None
        and limits.sensor_min_c < reply < limits.sensor_max_c
        and comm_ok is not False
        and level_ok is not False
        and e_stop is not True
    )
    if (
        conditions is state.conditions
        and state.actions is not None
        and (state.healthy_seen or not healthy)
    ):
        safety, healthy_seen, actions = state.safety, state.healthy_seen, state.actions
    else:
        conditions = _frozen(dict(conditions))
        safety, healthy_seen, actions = _conclude(state, conditions, limits, t_s, healthy, events)
    fields = new.__dict__  # the new state is not out yet: its last four fields go in now
    fields["conditions"], fields["safety"] = conditions, safety
    fields["healthy_seen"], fields["actions"] = healthy_seen, actions
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
    frozen = _frozen(conditions)
    events = [event]
    safety, healthy_seen, actions = _conclude(state, frozen, limits, t_s, False, events)
    new = replace(
        state, conditions=frozen, safety=safety, healthy_seen=healthy_seen, actions=actions
    )
    return new, actions, tuple(events)
