"""Interlock settings given in the rig file (``[chambers.interlocks]``).

Rules of this module
--------------------
- Every setting is optional and overrides one value the runtime would otherwise derive from
  the chamber's limits and the run's settings (trip limits a margin outside the operating
  range, time limits a few ticks long): see ``controller.runtime._settings``. A chamber
  without the table keeps the derived values.
- What the file alone decides is checked when the rig is read, each problem at its key: the
  trip limits enclose the chamber's operating limits (a protocol may hold a chamber at its
  limit), the probe's plausible range encloses the trip limits, the rate limit is above the
  chamber's ramp limit, and the conditions that protect people and hardware (E-stop, low
  level, over-temperature) stay trips. What depends on the run too (a derived trip limit
  against a given plausible range, a time limit against the tick) is checked by
  :meth:`ChamberInterlocks.apply` when a run is planned.
- Interlocks are per chamber even in a shared bath: each chamber has its own probe, level
  switch and E-stop and is judged on its own limits, and one chamber's trip makes the whole
  bath's heating safe (the decider takes the lowest forced heater and chiller of the bath's
  chambers). So chambers of one bath may give different settings; the strictest trips first.
- Policies: the rig file sets each condition's level and latching; a run's own policy
  overrides (``RunSettings.policies``) win over the file's, which win over
  :func:`~controller.control.default_policies`. The interlocks have no per-condition delay:
  the time-based conditions carry their times (``stale_after_s``, ``frozen_after_s``,
  ``comm_loss_after_s``, ``rate_window_s``) and a temperature limit trips on the first
  reading past it.
"""

from __future__ import annotations

import dataclasses
import itertools
from collections.abc import Mapping
from typing import TYPE_CHECKING, Self

from pydantic import Field, ValidationInfo, model_validator

from controller._model import FileModel
from controller.control import Condition, ConditionPolicy, InterlockLimits, Level, default_policies
from controller.errors import SquallError
from controller.rig._control import raise_at

if TYPE_CHECKING:
    from controller.rig._models import ChamberLimits

__all__ = [
    "ChamberInterlocks",
    "ConditionSetting",
    "InterlockConditions",
    "check_interlocks_against_limits",
    "derived_limits",
    "merged_policies",
]

#: Conditions whose level the rig file may not lower below a trip.
_ALWAYS_TRIP = frozenset({"e_stop", "low_level", "over_temperature"})

#: Rig key -> InterlockLimits field.
_LIMIT_FIELDS = {
    "under_temperature_c": "min_temperature_c",
    "over_temperature_c": "max_temperature_c",
    "sensor_min_c": "sensor_min_c",
    "sensor_max_c": "sensor_max_c",
    "max_rate_c_per_h": "max_rate_c_per_h",
    "rate_window_s": "rate_window_s",
    "hysteresis_c": "temperature_hysteresis_c",
    "stale_after_s": "stale_after_s",
    "frozen_after_s": "frozen_after_s",
    "frozen_epsilon_c": "frozen_epsilon_c",
    "comm_loss_after_s": "comm_loss_after_s",
    "safe_pump_pct": "safe_pump_pct",
}

#: Time limits and the fewest ticks each must span, so one missed reply does not trip.
_MIN_TICKS = {
    "stale_after_s": 2.0,
    "comm_loss_after_s": 2.0,
    "frozen_after_s": 3.0,
    "rate_window_s": 1.0,
}

#: The temperature thresholds from coldest to warmest, as rig keys.
_ORDER = ("sensor_min_c", "under_temperature_c", "over_temperature_c", "sensor_max_c")


class ConditionSetting(FileModel):
    """How one interlock condition is handled (a key of ``[chambers.interlocks.conditions]``)."""

    level: Level | None = Field(
        None,
        description="'warning' (logged), 'alarm' (someone is called) or 'trip' (outputs made "
        "safe); absent = the default.",
    )
    latched: bool | None = Field(
        None,
        description="Whether the condition holds after it goes until an operator "
        "acknowledges it; absent = the default.",
    )


class InterlockConditions(FileModel):
    """Per-condition policy overrides (``[chambers.interlocks.conditions]``).

    By default every condition trips and latches except a stale probe, an implausible
    reading and communication loss (they clear by themselves) and the rate of change (an
    alarm). E-stop, low level and over-temperature stay trips whatever is given.
    """

    over_temperature: ConditionSetting | None = Field(
        None, description="Probe at or above over_temperature_c (level stays 'trip')."
    )
    under_temperature: ConditionSetting | None = Field(
        None, description="Probe at or below under_temperature_c."
    )
    sensor_stale: ConditionSetting | None = Field(
        None, description="No probe reply for stale_after_s."
    )
    sensor_out_of_range: ConditionSetting | None = Field(
        None, description="Probe reading outside sensor_min_c … sensor_max_c."
    )
    sensor_frozen: ConditionSetting | None = Field(
        None, description="Probe reading unchanged for frozen_after_s."
    )
    rate_of_change: ConditionSetting | None = Field(
        None, description="Temperature changing faster than max_rate_c_per_h."
    )
    low_level: ConditionSetting | None = Field(
        None, description="Level switch open (a leak; level stays 'trip')."
    )
    comm_loss: ConditionSetting | None = Field(
        None, description="No good exchange with the devices for comm_loss_after_s."
    )
    e_stop: ConditionSetting | None = Field(
        None, description="Emergency stop pressed (level stays 'trip')."
    )

    @model_validator(mode="after")
    def _protective_conditions_trip(self) -> Self:
        for name in sorted(_ALWAYS_TRIP):
            setting: ConditionSetting | None = getattr(self, name)
            if setting is not None and setting.level not in (None, Level.TRIP):
                raise_at(
                    (name, "level"),
                    f"{name} protects people or hardware and must stay a trip",
                    setting.level.value,
                )
        return self

    def policies(self) -> dict[Condition, ConditionPolicy]:
        """The policies of the conditions this table sets, over the defaults.

        Returns
        -------
        dict
            Condition to policy, only for conditions given here (level and latching from the
            table where given, else the default; the default safe state is kept).
        """
        defaults = default_policies()
        out: dict[Condition, ConditionPolicy] = {}
        for name in type(self).model_fields:
            setting: ConditionSetting | None = getattr(self, name)
            if setting is None:
                continue
            condition = Condition[name.upper()]
            base = defaults[condition]
            out[condition] = dataclasses.replace(
                base,
                level=setting.level if setting.level is not None else base.level,
                latch=setting.latched if setting.latched is not None else base.latch,
            )
        return out


class ChamberInterlocks(FileModel):
    """A chamber's interlock settings (``[chambers.interlocks]``); each key absent = derived.

    The derived values (``controller.runtime``): trip limits the run's trip margin (1 °C by
    default) outside the chamber's limits, plausible range at least −5 … 60 °C and 5 °C
    outside the trip limits, rate limit max(3 × max_ramp_c_per_h, 6 °C h⁻¹) over 300 s or
    three ticks, stale after 30 s or three ticks, frozen after 900 s or ten ticks,
    communication lost after 10 s or two ticks, safe pump 30 %.
    """

    under_temperature_c: float | None = Field(
        None,
        ge=-10,
        le=60,
        description="Under-temperature trip: a probe reading at or below it trips, °C; "
        "below the chamber's limits.min_temperature_c.",
    )
    over_temperature_c: float | None = Field(
        None,
        ge=-10,
        le=60,
        description="Over-temperature trip: a probe reading at or above it trips, °C; above "
        "the chamber's limits.max_temperature_c.",
    )
    sensor_min_c: float | None = Field(
        None,
        ge=-60,
        le=100,
        description="Lowest plausible probe reading, °C; below the under-temperature trip.",
    )
    sensor_max_c: float | None = Field(
        None,
        ge=-60,
        le=150,
        description="Highest plausible probe reading, °C; above the over-temperature trip.",
    )
    max_rate_c_per_h: float | None = Field(
        None,
        gt=0,
        le=600,
        description="Fastest plausible temperature change, °C h⁻¹; above the chamber's "
        "limits.max_ramp_c_per_h.",
    )
    rate_window_s: float | None = Field(
        None, gt=0, le=86400, description="Time base of the rate-of-change check, s."
    )
    hysteresis_c: float | None = Field(
        None,
        ge=0,
        le=5,
        description="How far inside a temperature trip the reading must come back to clear, °C.",
    )
    stale_after_s: float | None = Field(
        None, gt=0, le=86400, description="Probe silence that counts as a stale probe, s."
    )
    frozen_after_s: float | None = Field(
        None,
        gt=0,
        le=7 * 86400,
        description="Time without change after which the probe counts as frozen, s.",
    )
    frozen_epsilon_c: float | None = Field(
        None, ge=0, le=1, description="Change that counts as movement of the probe, °C."
    )
    comm_loss_after_s: float | None = Field(
        None,
        gt=0,
        le=86400,
        description="Time without a good exchange with the devices that counts as "
        "communication loss, s.",
    )
    safe_pump_pct: float | None = Field(
        None,
        ge=0,
        le=100,
        description="Pump drive while tripped, % (keeps water moving over the community).",
    )
    conditions: InterlockConditions | None = Field(
        None, description="Level and latching of individual conditions."
    )

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        given = [(k, getattr(self, k)) for k in _ORDER if getattr(self, k) is not None]
        for (low_key, low), (key, value) in itertools.pairwise(given):
            if value <= low:
                raise_at((key,), f"must be above {low_key} ({low:g} °C)", value)
        return self

    def policies(self) -> dict[Condition, ConditionPolicy]:
        """Policies set by ``[chambers.interlocks.conditions]`` (empty without it).

        Returns
        -------
        dict
            Condition to policy for the conditions the file sets.
        """
        return {} if self.conditions is None else self.conditions.policies()

    def apply(self, derived: InterlockLimits, *, period_s: float, where: str) -> InterlockLimits:
        """The derived limits with this table's values put in.

        Parameters
        ----------
        derived
            Limits the runtime derived for the chamber (°C, °C h⁻¹, s, %; policies already
            merged as wanted).
        period_s
            Control tick period of the run, s.
        where
            Dotted path of this table in the rig file (no unit), for errors.

        Returns
        -------
        InterlockLimits
            The limits with every given value replacing the derived one.

        Raises
        ------
        SquallError
            A given time limit spans fewer ticks than it must (two for a stale probe and
            communication loss, three for a frozen probe, one for the rate window), or a given
            threshold does not fit a derived one (e.g. ``sensor_max_c`` below the derived
            over-temperature trip), located at the given key.
        """
        for key, ticks in _MIN_TICKS.items():
            value = getattr(self, key)
            if value is not None and value < ticks * period_s:
                raise SquallError(
                    f"{value:g} s is shorter than {ticks:g} tick(s) of this run "
                    f"({ticks * period_s:g} s at {period_s:g} s per tick), so a single "
                    "missed reply would set it off",
                    field=f"{where}.{key}",
                )
        values = {
            field: getattr(self, key)
            for key, field in _LIMIT_FIELDS.items()
            if getattr(self, key) is not None
        }
        effective = {
            key: values.get(_LIMIT_FIELDS[key], getattr(derived, _LIMIT_FIELDS[key]))
            for key in _ORDER
        }
        for low_key, key in itertools.pairwise(_ORDER):
            if effective[key] <= effective[low_key]:
                blamed, other = (key, low_key) if getattr(self, key) is not None else (low_key, key)
                raise SquallError(
                    f"{blamed} {effective[blamed]:g} °C does not fit the derived {other} "
                    f"({effective[other]:g} °C, from the chamber's limits and the run's trip "
                    f"margin): {key} must be above {low_key}; give {other} too",
                    field=f"{where}.{blamed}",
                )
        return dataclasses.replace(derived, **values)


def check_interlocks_against_limits(
    value: ChamberInterlocks | None, info: ValidationInfo
) -> ChamberInterlocks | None:
    """Check a chamber's interlock settings against its operating limits.

    Used as an after-validator of ``Chamber.interlocks`` (declared after ``limits``, so the
    validated limits are at hand); each problem is reported at its key.

    Parameters
    ----------
    value
        The chamber's ``[chambers.interlocks]``, or None (no unit).
    info
        Pydantic's validation info; ``info.data["limits"]`` are the chamber's limits (°C,
        °C h⁻¹), absent when they failed their own validation.

    Returns
    -------
    ChamberInterlocks or None
        ``value`` unchanged.
    """
    limits: ChamberLimits | None = info.data.get("limits")
    if value is None or limits is None:
        return value
    low, high = limits.min_temperature_c, limits.max_temperature_c
    for key, bound, word in (
        ("sensor_min_c", low, "below"),
        ("under_temperature_c", low, "below"),
        ("over_temperature_c", high, "above"),
        ("sensor_max_c", high, "above"),
    ):
        given = getattr(value, key)
        if given is not None and (given >= bound if word == "below" else given <= bound):
            edge = "min" if word == "below" else "max"
            raise_at(
                (key,),
                f"must be {word} the chamber's limits.{edge}_temperature_c ({bound:g} °C): a "
                "protocol may hold the chamber at its limit",
                given,
            )
    rate = value.max_rate_c_per_h
    if rate is not None and rate <= limits.max_ramp_c_per_h:
        raise_at(
            ("max_rate_c_per_h",),
            f"must be above the chamber's limits.max_ramp_c_per_h "
            f"({limits.max_ramp_c_per_h:g} °C/h), or every ramp at that rate sets it off",
            rate,
        )
    return value


def merged_policies(
    table: ChamberInterlocks | None, run: Mapping[Condition, ConditionPolicy]
) -> dict[Condition, ConditionPolicy]:
    """Policy overrides of one chamber: the rig file's, then the run's on top.

    Parameters
    ----------
    table
        The chamber's ``[chambers.interlocks]`` or None (no unit).
    run
        The run's own overrides (no unit).

    Returns
    -------
    dict
        Condition to policy (missing conditions keep the defaults).
    """
    out = {} if table is None else table.policies()
    out.update(run)
    return out


def derived_limits(
    limits: ChamberLimits,
    *,
    trip_margin_c: float,
    period_s: float,
    policies: Mapping[Condition, ConditionPolicy],
) -> InterlockLimits:
    """The interlock limits a chamber gets without ``[chambers.interlocks]``.

    Parameters
    ----------
    limits
        The chamber's operating limits (°C, °C h⁻¹).
    trip_margin_c
        Distance of the temperature trips outside the operating limits, °C.
    period_s
        Control tick period, s.
    policies
        Policy overrides (no unit).

    Returns
    -------
    InterlockLimits
        Trips ``trip_margin_c`` outside the limits; plausible range at least −5 … 60 °C and
        5 °C outside the trips; rate limit max(3 × max_ramp_c_per_h, 6 °C h⁻¹) over
        max(300 s, 3 ticks); stale after max(30 s, 3 ticks); frozen after max(900 s, 10
        ticks); communication lost after max(10 s, 2 ticks).
    """
    low = limits.min_temperature_c - trip_margin_c
    high = limits.max_temperature_c + trip_margin_c
    return InterlockLimits(
        min_temperature_c=low,
        max_temperature_c=high,
        max_rate_c_per_h=max(3.0 * limits.max_ramp_c_per_h, 6.0),
        sensor_min_c=min(-5.0, low - 5.0),
        sensor_max_c=max(60.0, high + 5.0),
        rate_window_s=max(300.0, 3.0 * period_s),
        stale_after_s=max(30.0, 3.0 * period_s),
        frozen_after_s=max(900.0, 10.0 * period_s),
        comm_loss_after_s=max(10.0, 2.0 * period_s),
        policies=policies,
    )
