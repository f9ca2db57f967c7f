"""Reason texts of interlock events: the values and limits, with units, behind a signal that
changes a condition's state.

Rule: text only; which signal a reading gives is decided in ``_interlocks.py``, from the same
inputs, and only a signal that changes a condition's state asks for its reason here.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from controller.control._interlock_config import Condition, InterlockLimits

if TYPE_CHECKING:
    from controller.control._interlocks import InterlockState

__all__ = ["reason_text"]


def reason_text(
    condition: Condition,
    old: InterlockState,
    memory: InterlockState,
    reply: float | None,
    limits: InterlockLimits,
) -> str:
    """The reason text of a signal that changes ``condition``'s state (values and limits
    with units), from the same inputs ``_signals`` in ``_interlocks.py`` read."""
    t_s = memory.last_t_s
    match condition:
        case Condition.SENSOR_OUT_OF_RANGE:
            return (
                f"probe reads {reply:.3f} °C, plausible only between "
                f"{limits.sensor_min_c:.3f} and {limits.sensor_max_c:.3f} °C"
            )
        case Condition.SENSOR_STALE:
            age_s = t_s - memory.last_reply_s
            return f"no probe reply for {age_s:.1f} s (limit {limits.stale_after_s:.1f} s)"
        case Condition.OVER_TEMPERATURE:
            return f"temperature {reply:.3f} °C, limit {limits.max_temperature_c:.3f} °C"
        case Condition.UNDER_TEMPERATURE:
            return f"temperature {reply:.3f} °C, limit {limits.min_temperature_c:.3f} °C"
        case Condition.SENSOR_FROZEN:
            assert memory.frozen_since_s is not None
            still_s = t_s - memory.frozen_since_s
            return (
                f"probe unchanged within {limits.frozen_epsilon_c:g} °C for {still_s:.0f} s "
                f"(limit {limits.frozen_after_s:.0f} s)"
            )
        case Condition.RATE_OF_CHANGE:
            assert reply is not None and old.rate_anchor_s is not None
            assert old.rate_anchor_c is not None
            span_s = t_s - old.rate_anchor_s
            rate = (reply - old.rate_anchor_c) / span_s * 3600.0
            return (
                f"temperature changing at {rate:+.3f} °C/h over {span_s:.0f} s "
                f"(limit {limits.max_rate_c_per_h:.3f} °C/h)"
            )
        case Condition.LOW_LEVEL:
            return "water level switch low"
        case Condition.COMM_LOSS:
            comm_age_s = t_s - memory.last_comm_ok_s
            return (
                f"no good device exchange for {comm_age_s:.1f} s "
                f"(limit {limits.comm_loss_after_s:.1f} s)"
            )
        case Condition.E_STOP:
            return "emergency stop pressed"
    raise AssertionError(condition)  # pragma: no cover - every condition is listed
