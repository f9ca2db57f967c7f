"""What a rig shares between chambers and what keeps it trustworthy: shared heating and cooling
plant, the lamp circuit's power budget, actuator ratings, calibration dates and maintenance
intervals.

Rule: these tables describe the facility, not the physics. The scheduler reads them to refuse
experiments that together ask more of a chiller, heater or lamp circuit than it has, and to
derive operator tasks (calibrations, cleaning, daily checks); ``squall serve`` reads the
calibration dates in its preflight. Cross-references (which thermal nodes a plant serves) are
checked by :class:`controller.rig.Rig`.
"""

from __future__ import annotations

import datetime as dt
import zoneinfo
from enum import StrEnum
from typing import Annotated, Self

from pydantic import Field, field_validator, model_validator

from controller._model import FileModel
from controller.rig._control import DriveCurve, check_curve_rows

__all__ = [
    "ChamberCalibration",
    "ChamberLamp",
    "ChamberPump",
    "Maintenance",
    "Plant",
    "PlantKind",
    "Power",
]


class PlantKind(StrEnum):
    """What a shared plant unit does to the thermal nodes it serves."""

    CHILLER = "chiller"
    HEATER = "heater"


class Plant(FileModel):
    """A chiller or heater shared by several thermal nodes (baths or own-water chambers).

    The nodes' own heaters and chillers (``heater_max_w``, ``chiller_max_w`` of their thermal
    description) draw on this unit; together they may not need more than ``capacity_w`` at any
    time of the schedule.
    """

    id: str = Field(
        min_length=1,
        max_length=32,
        pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$",
        description="Plant identifier (letters, digits, '_', '.', '-').",
    )
    kind: PlantKind = Field(description="'chiller' (removes heat) or 'heater' (adds heat).")
    capacity_w: float = Field(
        gt=0, le=1_000_000, description="Heat the unit moves at full output, W."
    )
    serves: list[str] = Field(
        min_length=1,
        description="Thermal nodes served: bath ids, or ids of chambers with their own water.",
    )

    @field_validator("serves")
    @classmethod
    def _unique(cls, value: list[str]) -> list[str]:
        if len(set(value)) != len(value):
            raise ValueError("a node is named twice")
        return value


class Power(FileModel):
    """Electrical budgets of the rack (the ``[power]`` table)."""

    lamp_budget_w: float | None = Field(
        None,
        gt=0,
        le=1_000_000,
        description="Electrical power the lamp circuit may deliver to all lamps at once, W; "
        "absent = not checked.",
    )


class ChamberLamp(FileModel):
    """A chamber's lamp as the facility sees it (the ``[chambers.lamp]`` table).

    ``drive_pct_par`` is the lamp's measured curve (``hardware-notes/calibration.md``): PAR at
    the community against drive. When it is given, the runtime drives the lamp by inverting
    it (linear interpolation between rows); without it, by the straight line from 0 to the
    chamber's ``limits.max_par`` at 100 %.
    """

    rated_w: float | None = Field(
        None,
        gt=0,
        le=100_000,
        description="Electrical power at full drive, W; needed when [power] lamp_budget_w is set.",
    )
    drive_pct_par: (
        list[
            tuple[
                Annotated[float, Field(ge=0, le=100)],
                Annotated[float, Field(ge=0, le=5000)],
            ]
        ]
        | None
    ) = Field(
        None,
        description="Measured lamp curve: rows [drive %, PAR at the community in µmol photons "
        "m⁻² s⁻¹], from 0 % to 100 %, PAR rising with drive (a flat start is allowed); "
        "absent = linear up to limits.max_par.",
    )

    @field_validator("drive_pct_par")
    @classmethod
    def _monotone(cls, value: list[tuple[float, float]] | None) -> list[tuple[float, float]] | None:
        if value is not None:
            check_curve_rows(value, "PAR")
        return value

    def curve(self) -> DriveCurve | None:
        """The lamp's drive curve, or None when the table is not given.

        Returns
        -------
        DriveCurve or None
            Drive in % against PAR in µmol photons m⁻² s⁻¹.
        """
        return None if self.drive_pct_par is None else DriveCurve.from_rows(self.drive_pct_par)


class ChamberPump(FileModel):
    """A chamber's flow pump as the facility sees it (the ``[chambers.pump]`` table).

    ``drive_pct_flow_cm_s`` is the pump's measured curve; a flat start is the pump's dead band
    (it does not turn below some drive). Given, it replaces the straight line from 0 to the
    chamber's ``limits.max_flow_cm_s`` at 100 % as the feed-forward of the flow.
    """

    rated_w: float | None = Field(
        None, gt=0, le=100_000, description="Electrical power at full drive, W."
    )
    drive_pct_flow_cm_s: (
        list[
            tuple[
                Annotated[float, Field(ge=0, le=100)],
                Annotated[float, Field(ge=0, le=200)],
            ]
        ]
        | None
    ) = Field(
        None,
        description="Measured pump curve: rows [drive %, flow over the community in cm s⁻¹], "
        "from 0 % to 100 %, flow rising with drive after a flat start (the dead band); "
        "absent = linear up to limits.max_flow_cm_s.",
    )

    @field_validator("drive_pct_flow_cm_s")
    @classmethod
    def _monotone(cls, value: list[tuple[float, float]] | None) -> list[tuple[float, float]] | None:
        if value is not None:
            check_curve_rows(value, "flow")
        return value

    def curve(self) -> DriveCurve | None:
        """The pump's drive curve, or None when the table is not given.

        Returns
        -------
        DriveCurve or None
            Drive in % against flow in cm s⁻¹.
        """
        return (
            None
            if self.drive_pct_flow_cm_s is None
            else DriveCurve.from_rows(self.drive_pct_flow_cm_s)
        )


class ChamberCalibration(FileModel):
    """When a chamber's sensors and lamp were last calibrated or cleaned (local dates).

    Update these after each procedure of ``hardware-notes/calibration.md``; ``squall serve``
    refuses to start a run on a chamber whose calibration is older than the rig's
    ``[maintenance]`` limits allow.
    """

    optode_on: dt.date | None = Field(
        None, description="Last two-point optode calibration (ISO 8601 date)."
    )
    lamp_on: dt.date | None = Field(
        None, description="Last lamp PAR calibration against a quantum sensor (ISO 8601 date)."
    )
    probes_on: dt.date | None = Field(
        None,
        description="Last temperature/PAR/flow probe check against a reference (ISO 8601 date).",
    )
    cleaned_on: dt.date | None = Field(
        None, description="Last cleaning of the optode spot and probes (ISO 8601 date)."
    )


class Maintenance(FileModel):
    """How fresh calibrations must be and how often people must look after the rack (the
    ``[maintenance]`` table). Absent limits are not checked."""

    timezone: str = Field(
        "UTC",
        description="IANA time zone of the lab's local times (daily checks, calendar), "
        "e.g. 'Etc/GMT-1'.",
    )
    optode_max_age_d: float | None = Field(
        None, gt=0, le=3650, description="Oldest optode calibration a run may start on, days."
    )
    lamp_max_age_d: float | None = Field(
        None, gt=0, le=3650, description="Oldest lamp calibration a run may start on, days."
    )
    probes_max_age_d: float | None = Field(
        None, gt=0, le=3650, description="Oldest probe check a run may start on, days."
    )
    cleaning_interval_d: float | None = Field(
        None, gt=0, le=3650, description="Sensors are cleaned at least this often, days."
    )
    daily_check_at: dt.time | None = Field(
        None,
        description="Local time of the daily walk-round (water level, leaks, fouling) while a "
        "run is on, HH:MM; absent = no daily check task.",
    )
    daily_check_minutes: float = Field(
        15.0, gt=0, le=600, description="Time set aside for the daily check, minutes."
    )

    @field_validator("timezone")
    @classmethod
    def _zone(cls, value: str) -> str:
        try:
            zoneinfo.ZoneInfo(value)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"{value!r} is not an IANA time zone name") from None
        return value

    @model_validator(mode="after")
    def _naive_time(self) -> Self:
        if self.daily_check_at is not None and self.daily_check_at.tzinfo is not None:
            raise ValueError("daily_check_at is a local time; the zone is 'timezone'")
        return self
