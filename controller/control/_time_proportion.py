"""Time-proportioning: an on/off heater driven at a mean duty by switching it within a cycle.

Rule: pure functions of the duty, the cycle and the time given; nothing here reads a clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from controller.control._pid import _finite

__all__ = ["TimeProportionState", "time_proportion", "time_proportion_step"]


def _on_time_s(duty_pct: float, cycle_s: float, min_switch_s: float) -> float:
    if _finite(cycle_s, "cycle_s") <= 0:
        raise ValueError(f"cycle_s must be above 0, got {cycle_s!r}")
    if not 0.0 <= _finite(min_switch_s, "min_switch_s") <= cycle_s / 2:
        raise ValueError("min_switch_s must be between 0 and half of cycle_s")
    on_s = min(100.0, max(0.0, _finite(duty_pct, "duty_pct"))) / 100.0 * cycle_s
    if on_s < min_switch_s:
        return 0.0
    if cycle_s - on_s < min_switch_s:
        return cycle_s
    return on_s


def time_proportion(
    duty_pct: float, cycle_s: float, t_in_cycle_s: float, min_switch_s: float = 0.0
) -> bool:
    """Whether an on/off heater is on at a point of its cycle (time-proportioning).

    Parameters
    ----------
    duty_pct
        Wanted mean drive, %, clipped to 0–100.
    cycle_s
        Cycle length, s, above 0 (a contactor wants tens of seconds, a solid-state relay
        can cycle in a second or two; common practice).
    t_in_cycle_s
        Time since the cycle began, s; taken modulo ``cycle_s``, so clock time works too.
    min_switch_s
        Shortest on or off pulse, s, 0 to ``cycle_s / 2``: shorter pulses are dropped
        (drive 0 % or 100 % for that cycle) to spare the relay.

    Returns
    -------
    bool
        True while the heater should be on: the first ``duty_pct`` % of each cycle.
    """
    on_s = _on_time_s(duty_pct, cycle_s, min_switch_s)
    return _finite(t_in_cycle_s, "t_in_cycle_s") % cycle_s < on_s


@dataclass(frozen=True, kw_only=True)
class TimeProportionState:
    """Cycle bookkeeping of :func:`time_proportion_step`.

    Parameters
    ----------
    cycle_start_s
        Clock time the current cycle began, s; None before the first call.
    on_s
        On time latched for the current cycle, s.
    """

    cycle_start_s: float | None = None
    on_s: float = 0.0


def time_proportion_step(
    state: TimeProportionState,
    duty_pct: float,
    cycle_s: float,
    t_s: float,
    min_switch_s: float = 0.0,
) -> tuple[TimeProportionState, bool]:
    """Time-proportioning that latches the duty at the start of each cycle.

    Unlike :func:`time_proportion`, a duty that changes mid-cycle takes effect at the next
    cycle, so the relay switches at most twice per cycle.

    Parameters
    ----------
    state
        Previous state (``TimeProportionState()`` to start).
    duty_pct
        Wanted mean drive, %, clipped to 0–100.
    cycle_s
        Cycle length, s, above 0.
    t_s
        Clock time now, s, not before the previous call.
    min_switch_s
        Shortest on or off pulse, s, 0 to ``cycle_s / 2``.

    Returns
    -------
    tuple
        New state, and whether the heater is on now.
    """
    t_s = _finite(t_s, "t_s")
    start = state.cycle_start_s
    on_s = state.on_s
    if start is not None and t_s < start:
        raise ValueError(f"t_s {t_s!r} is before the current cycle start {start!r}")
    if start is None or t_s - start >= cycle_s:
        start = t_s if start is None else start + math.floor((t_s - start) / cycle_s) * cycle_s
        on_s = _on_time_s(duty_pct, cycle_s, min_switch_s)
    return TimeProportionState(cycle_start_s=start, on_s=on_s), t_s - start < on_s
