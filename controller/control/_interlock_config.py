"""The interlocks' vocabulary: conditions, levels, limits, readings, outputs, and what an
evaluation reports (safety states, events, actions).

Rule: these types validate themselves when built, so an impossible limit set (a trip limit
outside the probe's plausible range, a negative delay) or an inconsistent event cannot reach
or leave the state machine in ``_interlocks.py``, which decides every transition.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import Enum
from types import MappingProxyType

__all__ = [
    "Actions",
    "Condition",
    "ConditionPolicy",
    "EventKind",
    "InterlockEvent",
    "InterlockLimits",
    "Level",
    "Outputs",
    "Readings",
    "SafetyState",
    "default_policies",
]


class Level(Enum):
    """How serious a condition is: WARNING logs, ALARM calls someone, TRIP makes safe."""

    __hash__ = object.__hash__  # members are singletons; the C hash is 2x faster

    WARNING = "warning"
    ALARM = "alarm"
    TRIP = "trip"


class Condition(Enum):
    """Everything the interlocks watch; the value is the code written to the run log."""

    __hash__ = object.__hash__  # members are singletons; the C hash is 2x faster

    OVER_TEMPERATURE = "over-temperature"
    UNDER_TEMPERATURE = "under-temperature"
    SENSOR_STALE = "sensor-stale"
    SENSOR_OUT_OF_RANGE = "sensor-out-of-range"
    SENSOR_FROZEN = "sensor-frozen"
    RATE_OF_CHANGE = "rate-of-change"
    LOW_LEVEL = "low-level"
    COMM_LOSS = "comm-loss"
    E_STOP = "e-stop"


def _pct(value: float, name: str) -> None:
    if not (math.isfinite(value) and 0.0 <= value <= 100.0):
        raise ValueError(f"{name} must be between 0 and 100 %, got {value!r}")


@dataclass(frozen=True, kw_only=True)
class Outputs:
    """Drives of one chamber's actuators.

    Parameters
    ----------
    heater_pct
        Heater drive, %, 0–100.
    chiller_pct
        Chiller drive, %, 0–100.
    lamp_pct
        Lamp drive, %, 0–100.
    pump_pct
        Pump drive, %, 0–100.
    """

    heater_pct: float
    chiller_pct: float
    lamp_pct: float
    pump_pct: float

    def __post_init__(self) -> None:
        for name in ("heater_pct", "chiller_pct", "lamp_pct", "pump_pct"):
            _pct(getattr(self, name), name)

    @classmethod
    def unchecked(
        cls, heater_pct: float, chiller_pct: float, lamp_pct: float, pump_pct: float
    ) -> Outputs:
        """Outputs built without the range check, for a loop's hot path.

        Only for drives the caller already holds within 0–100 %: clipped to that range, or
        taken from outputs that were checked when built. Anything else builds
        :class:`Outputs` normally.

        Parameters
        ----------
        heater_pct, chiller_pct, lamp_pct, pump_pct
            Drives, %, each 0–100.

        Returns
        -------
        Outputs
            Equal to ``Outputs(heater_pct=..., ...)`` with the same drives.
        """
        out = object.__new__(cls)
        fields = out.__dict__  # filled in place: a frozen instance refuses attribute writes
        fields["heater_pct"] = heater_pct
        fields["chiller_pct"] = chiller_pct
        fields["lamp_pct"] = lamp_pct
        fields["pump_pct"] = pump_pct
        return out


@dataclass(frozen=True, kw_only=True)
class ConditionPolicy:
    """How one condition is handled.

    Parameters
    ----------
    level
        WARNING, ALARM or TRIP.
    latch
        Whether the condition holds after it goes until an operator acknowledges it.
    safe
        Outputs forced while this condition holds at TRIP level; None means the limits'
        default safe state (heaters, chiller and lamps off, pumps at the safe flow).
    """

    level: Level
    latch: bool
    safe: Outputs | None = None


def default_policies() -> dict[Condition, ConditionPolicy]:
    """The default level, latching and safe state of every condition.

    Returns
    -------
    dict
        Condition to policy. Every condition trips except the rate of change (an alarm:
        the hard limits still guard). A leak also stops the pumps so they do not run dry
        or pump water out.
    """
    leak_safe = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)
    return {
        Condition.OVER_TEMPERATURE: ConditionPolicy(level=Level.TRIP, latch=True),
        Condition.UNDER_TEMPERATURE: ConditionPolicy(level=Level.TRIP, latch=True),
        Condition.SENSOR_STALE: ConditionPolicy(level=Level.TRIP, latch=False),
        Condition.SENSOR_OUT_OF_RANGE: ConditionPolicy(level=Level.TRIP, latch=False),
        Condition.SENSOR_FROZEN: ConditionPolicy(level=Level.TRIP, latch=True),
        Condition.RATE_OF_CHANGE: ConditionPolicy(level=Level.ALARM, latch=True),
        Condition.LOW_LEVEL: ConditionPolicy(level=Level.TRIP, latch=True, safe=leak_safe),
        Condition.COMM_LOSS: ConditionPolicy(level=Level.TRIP, latch=False),
        Condition.E_STOP: ConditionPolicy(level=Level.TRIP, latch=True),
    }


@dataclass(frozen=True, kw_only=True)
class InterlockLimits:
    """Thresholds and policies of one chamber's interlocks.

    Parameters
    ----------
    min_temperature_c
        Under-temperature trip limit, °C.
    max_temperature_c
        Over-temperature trip limit, °C; above ``min_temperature_c``.
    max_rate_c_per_h
        Fastest plausible temperature change, °C h⁻¹, above 0 (set it well above the
        chamber's ramp limit).
    sensor_min_c
        Lowest plausible probe reading, °C; below ``min_temperature_c``.
    sensor_max_c
        Highest plausible probe reading, °C; above ``max_temperature_c``.
    temperature_hysteresis_c
        How far inside a temperature limit the reading must come back to clear, °C, ≥ 0.
    rate_window_s
        Time base of the rate-of-change check, s, above 0.
    stale_after_s
        Probe age at which the reading is stale, s, above 0.
    frozen_after_s
        Time without change beyond ``frozen_epsilon_c`` after which the probe is frozen, s.
    frozen_epsilon_c
        Change that counts as movement, °C, ≥ 0 (0: any change).
    comm_loss_after_s
        Time without a good exchange with the devices that counts as communication loss, s.
    safe_pump_pct
        Pump drive of the default safe state, %, 0–100 (keeps water moving over the
        community while heat and light are off).
    policies
        Per-condition overrides of :func:`default_policies`; missing conditions keep the
        defaults.
    """

    min_temperature_c: float
    max_temperature_c: float
    max_rate_c_per_h: float
    sensor_min_c: float = -5.0
    sensor_max_c: float = 60.0
    temperature_hysteresis_c: float = 0.2
    rate_window_s: float = 60.0
    stale_after_s: float = 30.0
    frozen_after_s: float = 900.0
    frozen_epsilon_c: float = 0.0
    comm_loss_after_s: float = 10.0
    safe_pump_pct: float = 30.0
    policies: Mapping[Condition, ConditionPolicy] = field(default_factory=dict)

    def __post_init__(self) -> None:
        values = [
            self.sensor_min_c,
            self.min_temperature_c,
            self.max_temperature_c,
            self.sensor_max_c,
        ]
        if not all(math.isfinite(v) for v in values) or sorted(set(values)) != values:
            raise ValueError(
                "need sensor_min_c < min_temperature_c < max_temperature_c < sensor_max_c"
            )
        for name in (
            "max_rate_c_per_h",
            "rate_window_s",
            "stale_after_s",
            "frozen_after_s",
            "comm_loss_after_s",
        ):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"{name} must be above 0, got {value!r}")
        for name in ("temperature_hysteresis_c", "frozen_epsilon_c"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be 0 or more, got {value!r}")
        _pct(self.safe_pump_pct, "safe_pump_pct")
        merged = default_policies()
        merged.update(self.policies)
        object.__setattr__(self, "policies", MappingProxyType(merged))

    def safe_outputs(self) -> Outputs:
        """The default safe state: heaters, chiller and lamps off, pumps at the safe flow."""
        return Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=self.safe_pump_pct)


@dataclass(frozen=True, kw_only=True)
class Readings:
    """What arrived from one chamber's devices this tick.

    Parameters
    ----------
    temperature_c
        Probe reading, °C; None when the probe did not answer this tick.
    level_ok
        Level switch: True normal, False low (leak); None when not read or not fitted.
    comm_ok
        True when every device of the chamber answered this tick; False when one did not;
        None when not polled. Only True refreshes the comm-loss timer, so a runtime that
        polls less often than every tick must pass True on ticks after a good poll.
    e_stop
        True while the emergency stop is pressed; None when not read or not fitted.
    """

    temperature_c: float | None = None
    level_ok: bool | None = None
    comm_ok: bool | None = None
    e_stop: bool | None = None


class SafetyState(Enum):
    """The chamber's overall interlock state."""

    __hash__ = object.__hash__  # members are singletons; the C hash is 2x faster

    STARTING = "starting"  # no healthy evaluation yet: outputs safe
    NORMAL = "normal"
    WARNING = "warning"
    ALARM = "alarm"
    TRIPPED = "tripped"  # a trip-level condition holds: outputs safe


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
