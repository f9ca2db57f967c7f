"""Rig file models (TOML). Grows with the control runtime; the fields here are relied on by
``squall check --rig`` and by the simulator.

Rule: a chamber that names a ``bath`` shares one water body (one thermal node) with every other
chamber naming the same bath, so all of them must be given the same temperature program.
"""

from __future__ import annotations

from typing import Self

from pydantic import Field, model_validator

from controller._model import FileModel

__all__ = ["Chamber", "ChamberLimits", "Rig"]


class ChamberLimits(FileModel):
    """What a chamber can physically do; protocols beyond these are refused."""

    min_temperature_c: float = Field(
        0.0, ge=-5, le=50, description="Lowest water temperature the chamber can hold, °C."
    )
    max_temperature_c: float = Field(
        35.0, ge=-5, le=50, description="Highest water temperature the chamber can hold, °C."
    )
    max_ramp_c_per_h: float = Field(
        2.0, gt=0, le=60, description="Fastest temperature change the chamber can follow, °C h⁻¹."
    )
    max_par: float = Field(
        1500.0,
        ge=0,
        le=5000,
        description="Highest PAR the lamps deliver at the community, µmol photons m⁻² s⁻¹.",
    )
    max_flow_cm_s: float = Field(
        30.0, ge=0, le=200, description="Highest flow the pump delivers over the community, cm s⁻¹."
    )

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.min_temperature_c >= self.max_temperature_c:
            raise ValueError("min_temperature_c must be below max_temperature_c")
        return self


class Chamber(FileModel):
    """One incubation chamber."""

    id: str = Field(
        min_length=1,
        max_length=32,
        pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$",
        description="Chamber identifier used by protocols (letters, digits, '_', '.', '-').",
    )
    water_volume_l: float = Field(
        gt=0, le=10000, description="Water volume net of organisms and sediment, L."
    )
    sediment_area_m2: float = Field(
        gt=0, le=100, description="Planar area of the enclosed community, m²."
    )
    bath: str | None = Field(
        None,
        description="Shared water bath this chamber sits in; chambers in one bath share one "
        "temperature program.",
    )
    limits: ChamberLimits = Field(default_factory=ChamberLimits)


class Rig(FileModel):
    """A rack of chambers and the hardware behind them."""

    name: str = Field(min_length=1, description="Human-readable rig name.")
    chambers: list[Chamber] = Field(min_length=1, description="Every chamber of the rig.")

    @model_validator(mode="after")
    def _unique_ids(self) -> Self:
        seen: set[str] = set()
        for chamber in self.chambers:
            if chamber.id in seen:
                raise ValueError(f"chamber id {chamber.id!r} appears twice")
            seen.add(chamber.id)
        return self

    def chamber(self, chamber_id: str) -> Chamber:
        """Return the chamber with this id; raise ``KeyError`` if there is none."""
        for chamber in self.chambers:
            if chamber.id == chamber_id:
                return chamber
        raise KeyError(chamber_id)
