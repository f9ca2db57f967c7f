"""A small protocol-shaped model family used to test the loader independently of the real one.

It has what the loader must cope with: nested tables, dicts of tables, arrays of tables,
a discriminated union of blocks in arrays of inline tables, a plain union, aliases, literals
and a model validator.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Annotated, Literal, Self

from pydantic import AliasChoices, Field, model_validator

from controller._model import FileModel
from controller.errors import SquallError

__all__ = ["Doc", "Group", "Hold", "Phase", "Programs", "Ramp", "Role", "Site"]


class Hold(FileModel):
    """Constant value."""

    kind: Literal["hold"]
    value: float = Field(ge=-100, le=1000)
    duration: str | None = None


class Ramp(FileModel):
    """Linear change."""

    kind: Literal["ramp"]
    to: float
    rate_per_h: float | None = Field(None, gt=0)
    start: str | None = Field(None, alias="from")


class Cycle(FileModel):
    """Daily cycle with an alternative key for the mean."""

    kind: Literal["daily-cycle"]
    mean_c: float = Field(validation_alias=AliasChoices("mean_c", "mean"))
    amplitude_c: float = 0.0


Block = Annotated[Hold | Ramp | Cycle, Field(discriminator="kind")]


class Programs(FileModel):
    """Programs per variable."""

    temperature: list[Block] | None = None
    light: list[Block] | None = None


class Phase(FileModel):
    """One phase."""

    name: str
    duration: str
    programs: Programs | None = None
    groups: dict[str, Programs] = Field(default_factory=dict)


class Role(StrEnum):
    """Role of a group."""

    TREATMENT = "treatment"
    CONTROL = "control"


class Group(FileModel):
    """Treatment or control."""

    role: Role
    chambers: list[str] = Field(min_length=1)


class Site(FileModel):
    """Where."""

    name: str
    latitude_deg: float = Field(ge=-90, le=90)


class Doc(FileModel):
    """The root."""

    format: Literal["toy/1"]
    title: str
    begins: Literal["on-launch"] | int = "on-launch"
    site: Site | None = None
    groups: dict[str, Group]
    phases: list[Phase] = Field(min_length=1)

    @model_validator(mode="after")
    def _known_groups(self) -> Self:
        for k, phase in enumerate(self.phases):
            for name in phase.groups:
                if name not in self.groups:
                    raise SquallError(f"no group named {name!r}", field=f"phases.{k}.groups.{name}")
        return self
