"""The interlocks' transition table, its states and signals, and its rendering for the docs.

Rule: everything that decides how a condition's state changes lives in ``_TRANSITIONS``: one
table keyed by (latching?, state, signal). :mod:`controller.control._interlocks` evaluates
with it (through ``_NEXT``, the same table re-indexed) and the docs renderer
(:func:`transition_table_markdown`) prints it. A signal with no entry is illegal: it raises
:class:`IllegalInterlockEvent` and the state is left as it was.
"""

from __future__ import annotations

from collections.abc import Mapping
from enum import Enum
from types import MappingProxyType

from controller.control._interlock_config import Condition, Level, SafetyState

__all__ = [
    "ConditionState",
    "IllegalInterlockEvent",
    "Signal",
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


def _step(
    condition: Condition, latch: bool, state: ConditionState, signal: Signal
) -> ConditionState:
    try:
        return _TRANSITIONS[(latch, state, signal)]
    except KeyError:
        raise IllegalInterlockEvent(condition, state, signal) from None


#: ``_TRANSITIONS`` re-indexed (derived, never edited): ``_NEXT[latching][state]`` is (next
#: state on CLEAR, next state on ACTIVE), None where the table has no entry.
_NEXT: tuple[Mapping[ConditionState, tuple[ConditionState | None, ConditionState | None]], ...]
_NEXT = tuple(
    MappingProxyType(
        {
            state: (
                _TRANSITIONS.get((latch, state, Signal.CLEAR)),
                _TRANSITIONS.get((latch, state, Signal.ACTIVE)),
            )
            for state in ConditionState
        }
    )
    for latch in (False, True)
)

#: A condition in this state that gets CLEAR stays in it whether it latches or not.
_QUIET = ConditionState.CLEAR
assert all(_NEXT[latch][_QUIET][False] is _QUIET for latch in (0, 1)), "table changed"


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
