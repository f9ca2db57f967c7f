"""Program blocks: the building bricks of each variable's program in a phase.

Rules
-----
- Blocks are discriminated by ``kind``. One block union serves all three variables; which
  kinds a variable allows, and the physical range of its values, are checked by
  :func:`program_errors` (called from :class:`~controller.protocol._models.Programs`) so that the
  message names the variable: temperature -2..40 °C, light (PAR) 0..5000 µmol photons m-2 s-1,
  flow 0..200 cm s-1.
- Every block except the last of a phase needs a length: an explicit ``duration``, a ramp (its
  rate or duration gives the length), a step (instant when it has no duration) or a repeat.
  The last block without a duration fills the rest of the phase. Inside a repeat every block
  needs a length.
- Exactly-one-of rules: ramp takes one of ``rate_per_h``/``rate_per_day``/``duration``;
  daily-cycle takes one of ``mean_c``/``mean`` and one of ``amplitude_c``/``amplitude``;
  daylight takes one of ``peak``/``dli_mol_m2_d`` and either ``sunrise`` + ``sunset`` or
  ``source = "sun"``; climatology takes one of ``series``/``table``.
"""

from __future__ import annotations

from datetime import date, datetime
from enum import StrEnum
from typing import Annotated, Any, Literal, Self

from pydantic import Field, model_validator

from controller._model import FileModel
from controller.protocol._durations import ClockTime, Duration
from controller.protocol._errors import Loc, raise_at

__all__ = [
    "VARIABLE_KINDS",
    "VARIABLE_RANGES",
    "Block",
    "ClimatologyBlock",
    "DailyCycleBlock",
    "DaylightBlock",
    "HoldBlock",
    "RampBlock",
    "RepeatBlock",
    "ReplayBlock",
    "StepBlock",
    "Variable",
    "check_baseline_years",
    "exactly_one",
    "iter_leaves",
    "kind_errors",
    "program_errors",
]


class Variable(StrEnum):
    """A controlled variable of a chamber."""

    TEMPERATURE = "temperature"
    LIGHT = "light"
    FLOW = "flow"


VARIABLE_RANGES: dict[Variable, tuple[float, float, str]] = {
    Variable.TEMPERATURE: (-2.0, 40.0, "°C"),
    Variable.LIGHT: (0.0, 5000.0, "µmol photons m-2 s-1"),
    Variable.FLOW: (0.0, 200.0, "cm s-1"),
}
"""Physically sensible range and unit of each variable's values."""

VARIABLE_KINDS: dict[Variable, tuple[str, ...]] = {
    Variable.TEMPERATURE: (
        "hold",
        "step",
        "ramp",
        "daily-cycle",
        "repeat",
        "climatology",
        "replay",
    ),
    Variable.LIGHT: ("hold", "step", "ramp", "daylight", "repeat"),
    Variable.FLOW: ("hold", "step", "ramp", "daily-cycle", "repeat"),
}
"""Block kinds each variable's program may use."""


def exactly_one(model: FileModel, names: tuple[str, ...], what: str) -> None:
    """Raise unless exactly one of the fields ``names`` is given.

    Parameters
    ----------
    model
        The validated model.
    names
        Field names of which exactly one must be set (not ``None``).
    what
        How the message names the model, e.g. ``"a ramp"``.
    """
    given = [name for name in names if getattr(model, name) is not None]
    choices = " or ".join(names) if len(names) == 2 else ", ".join(names[:-1]) + f" or {names[-1]}"
    if not given:
        raise ValueError(f"{what} needs one of {choices}")
    if len(given) > 1:
        raise_at(
            type(model).__name__,
            (given[-1],),
            f"{what} takes only one of {choices}; {' and '.join(given)} are both given",
            getattr(model, given[-1]),
        )


def check_baseline_years(model: FileModel) -> None:
    """Check ``baseline_years`` goes with ``series`` and is ``[first, last]`` in order."""
    years = getattr(model, "baseline_years", None)
    if years is None:
        return
    if getattr(model, "series", None) is None:
        raise_at(type(model).__name__, ("baseline_years",), "baseline_years applies to series only")
    if years[0] > years[1]:
        raise_at(
            type(model).__name__,
            ("baseline_years",),
            "baseline_years must be [first, last] with first <= last",
            list(years),
        )


_VALUE_UNITS = "in the variable's unit: °C, µmol photons m-2 s-1 (PAR) or cm s-1"
_OPTIONAL_DURATION = (
    "How long the block lasts; leave out on the last block of a phase to fill the rest of it."
)


class HoldBlock(FileModel):
    """Hold a constant value."""

    kind: Literal["hold"] = Field(description="Block kind: constant value.")
    value: float = Field(description=f"Value to hold, {_VALUE_UNITS}.")
    duration: Duration | None = Field(None, description=_OPTIONAL_DURATION)


class StepBlock(FileModel):
    """Change instantly to a value, then hold it."""

    kind: Literal["step"] = Field(description="Block kind: instant change, then hold.")
    to: float = Field(description=f"Value after the step, {_VALUE_UNITS}.")
    duration: Duration | None = Field(
        None,
        description="How long to hold after the step; without it the step is instant "
        "(or, as the last block, holds to the end of the phase).",
    )


class RampBlock(FileModel):
    """Change linearly from the current value to ``to``."""

    kind: Literal["ramp"] = Field(description="Block kind: linear change from the current value.")
    to: float = Field(description=f"Value at the end of the ramp, {_VALUE_UNITS}.")
    rate_per_h: float | None = Field(
        None, gt=0, description="Speed of the change, variable's unit per hour (h-1)."
    )
    rate_per_day: float | None = Field(
        None, gt=0, description="Speed of the change, variable's unit per day (d-1)."
    )
    duration: Duration | None = Field(None, description="How long the ramp takes.")

    @model_validator(mode="after")
    def _one_speed(self) -> Self:
        exactly_one(self, ("rate_per_h", "rate_per_day", "duration"), "a ramp")
        return self


class DailyCycleBlock(FileModel):
    """A 24 h sinusoid peaking at ``warmest_at`` local time (temperature or flow)."""

    kind: Literal["daily-cycle"] = Field(description="Block kind: 24 h sinusoid.")
    mean_c: float | None = Field(None, description="Daily mean temperature, °C.")
    mean: float | None = Field(None, description="Daily mean, variable's unit (e.g. cm s-1).")
    amplitude_c: float | None = Field(None, ge=0, description="Half the peak-to-trough range, °C.")
    amplitude: float | None = Field(
        None, ge=0, description="Half the peak-to-trough range, variable's unit."
    )
    warmest_at: ClockTime = Field(
        description="Local clock time HH:MM of the daily maximum (trough 12 h later)."
    )
    duration: Duration | None = Field(None, description=_OPTIONAL_DURATION)

    @model_validator(mode="after")
    def _one_each(self) -> Self:
        exactly_one(self, ("mean_c", "mean"), "a daily-cycle")
        exactly_one(self, ("amplitude_c", "amplitude"), "a daily-cycle")
        return self

    @property
    def mean_value(self) -> float:
        """Daily mean in the variable's unit."""
        return self.mean_c if self.mean_c is not None else float(self.mean)  # type: ignore[arg-type]

    @property
    def amplitude_value(self) -> float:
        """Amplitude (half range) in the variable's unit."""
        if self.amplitude_c is not None:
            return self.amplitude_c
        return float(self.amplitude)  # type: ignore[arg-type]


class DaylightBlock(FileModel):
    """A daily light curve: half-sine between sunrise and sunset, or following the sun."""

    kind: Literal["daylight"] = Field(description="Block kind: daily light curve.")
    peak: float | None = Field(
        None, gt=0, description="Highest PAR of the day, µmol photons m-2 s-1."
    )
    dli_mol_m2_d: float | None = Field(
        None, gt=0, le=200, description="Daily light integral to deliver, mol photons m-2 d-1."
    )
    sunrise: ClockTime | None = Field(None, description="Local clock time HH:MM lights come up.")
    sunset: ClockTime | None = Field(None, description="Local clock time HH:MM lights go out.")
    source: Literal["sun"] | None = Field(
        None,
        description='"sun": PAR follows sin(sun elevation) at the site and date, zero at night '
        "(needs [site]).",
    )
    duration: Duration | None = Field(None, description=_OPTIONAL_DURATION)

    @model_validator(mode="after")
    def _one_each(self) -> Self:
        exactly_one(self, ("peak", "dli_mol_m2_d"), "daylight")
        if self.source == "sun":
            for name in ("sunrise", "sunset"):
                if getattr(self, name) is not None:
                    raise_at(
                        "DaylightBlock", (name,), f'daylight with source = "sun" takes no {name}'
                    )
        else:
            if self.sunrise is None or self.sunset is None:
                raise ValueError('daylight needs both sunrise and sunset, or source = "sun"')
            if self.sunrise >= self.sunset:
                raise_at(
                    "DaylightBlock",
                    ("sunset",),
                    f"sunrise {self.sunrise:%H:%M} must come before sunset {self.sunset:%H:%M} "
                    "on the same day",
                )
        return self


class ClimatologyBlock(FileModel):
    """Follow the site's seasonal climatology (Hobday et al. 2016 ``seas``)."""

    kind: Literal["climatology"] = Field(description="Block kind: follow the seasonal mean.")
    series: str | None = Field(
        None,
        min_length=1,
        description="CSV of a daily site temperature series (date, temperature_c), relative to "
        "the protocol file; the climatology is computed from it.",
    )
    table: str | None = Field(
        None,
        min_length=1,
        description="CSV of a daily climatology (doy, seas_c, thresh_c), relative to the "
        "protocol file.",
    )
    baseline_years: tuple[int, int] | None = Field(
        None, description="First and last year of the baseline period (with series only)."
    )
    duration: Duration | None = Field(None, description=_OPTIONAL_DURATION)

    @model_validator(mode="after")
    def _one_source(self) -> Self:
        exactly_one(self, ("series", "table"), "a climatology block")
        check_baseline_years(self)
        return self


class ReplayBlock(FileModel):
    """Replay a recorded temperature series, interpolated linearly between its points."""

    kind: Literal["replay"] = Field(description="Block kind: replay a recorded series.")
    series: str = Field(
        min_length=1, description="CSV of the recorded series, relative to the protocol file."
    )
    column: str | None = Field(
        None, min_length=1, description="Temperature column to use, if the CSV has several."
    )
    offset_c: float = Field(0.0, ge=-20, le=20, description="Added to every value, °C.")
    scale: float = Field(
        1.0,
        ge=0,
        le=10,
        description="Multiplies departures from the replayed stretch's mean, dimensionless "
        "(1 = as recorded, 2 = twice the variability).",
    )
    from_: date | datetime | None = Field(
        None,
        alias="from",
        description="Date (or ISO 8601 datetime) in the series where replay begins; default "
        "its first record.",
    )
    duration: Duration | None = Field(None, description=_OPTIONAL_DURATION)


class RepeatBlock(FileModel):
    """Run the inner blocks ``times`` times."""

    kind: Literal["repeat"] = Field(description="Block kind: repeat inner blocks.")
    times: int = Field(ge=1, le=100_000, description="How many times to run the blocks.")
    blocks: list[Block] = Field(min_length=1, description="The blocks to repeat, in order.")


Block = Annotated[
    HoldBlock
    | StepBlock
    | RampBlock
    | DailyCycleBlock
    | DaylightBlock
    | RepeatBlock
    | ClimatologyBlock
    | ReplayBlock,
    Field(discriminator="kind"),
]
"""Any program block, chosen by its ``kind``."""

RepeatBlock.model_rebuild()


def _has_length(block: Any) -> bool:
    return block.kind in ("ramp", "repeat") or getattr(block, "duration", None) is not None


def _block_errors(
    variable: Variable, block: Any, loc: Loc, *, inside_repeat: bool
) -> list[tuple[Loc, str]]:
    errors: list[tuple[Loc, str]] = []
    lo, hi, unit = VARIABLE_RANGES[variable]
    if block.kind not in VARIABLE_KINDS[variable]:
        errors.append(((*loc, "kind"), _kind_message(variable, block.kind)))
        return errors

    def check(name: str, value: float | None) -> None:
        if value is not None and not lo <= value <= hi:
            errors.append(
                (
                    (*loc, name),
                    f"{variable.value} value {value:g} {unit} is outside {lo:g}..{hi:g} {unit}",
                )
            )

    if block.kind == "hold":
        check("value", block.value)
    elif block.kind in ("step", "ramp"):
        check("to", block.to)
    elif block.kind == "daily-cycle":
        mean_name = "mean_c" if block.mean_c is not None else "mean"
        top, bottom = (
            block.mean_value + block.amplitude_value,
            block.mean_value - block.amplitude_value,
        )
        if bottom < lo or top > hi:
            errors.append(
                (
                    (*loc, mean_name),
                    f"daily-cycle swings over {bottom:g}..{top:g} {unit}, outside the "
                    f"{variable.value} range {lo:g}..{hi:g} {unit}",
                )
            )
    elif block.kind == "daylight" and block.peak is not None:
        check("peak", block.peak)
    elif block.kind == "repeat":
        errors.extend(_sequence_errors(variable, block.blocks, (*loc, "blocks"), True))
        if all(inner.kind == "step" and inner.duration is None for inner in block.blocks):
            errors.append(((*loc, "blocks"), "a repeat needs at least one block that takes time"))
    if inside_repeat and not _has_length(block) and block.kind != "step":
        errors.append(
            (
                (*loc, "duration"),
                f"a {block.kind} block inside a repeat needs a duration",
            )
        )
    return errors


def _sequence_errors(
    variable: Variable, blocks: list[Any], loc: Loc, inside_repeat: bool
) -> list[tuple[Loc, str]]:
    errors: list[tuple[Loc, str]] = []
    for index, block in enumerate(blocks):
        errors.extend(_block_errors(variable, block, (*loc, index), inside_repeat=inside_repeat))
        last = index == len(blocks) - 1
        if not inside_repeat and not last and not _has_length(block) and block.kind != "step":
            errors.append(
                (
                    (*loc, index, "duration"),
                    f"this {block.kind} block is followed by others, so it needs a duration "
                    "(only the last block of a phase may fill the rest)",
                )
            )
    return errors


def program_errors(variable: Variable, blocks: list[Any]) -> list[tuple[Loc, str]]:
    """Check one variable's program: allowed kinds, value ranges, block lengths.

    Parameters
    ----------
    variable
        The variable the program drives.
    blocks
        Its blocks in order (already validated block models).

    Returns
    -------
    list of (loc, message)
        Problems found, each with its location relative to the program list (dimensionless
        path of indices and keys); empty when the program is fine.
    """
    return _sequence_errors(variable, blocks, (), False)


def kind_errors(variable: Variable, raw_blocks: Any) -> list[tuple[Loc, str]]:
    """Check block kinds of a raw (not yet validated) program against the variable.

    Runs before the blocks are validated, so that a light program written with a temperature
    block gets one clear message instead of a list of the block's field errors.

    Parameters
    ----------
    variable
        The variable the program drives.
    raw_blocks
        The program as read from the file (list of tables).

    Returns
    -------
    list of (loc, message)
        One entry per block whose ``kind`` the variable does not allow (dimensionless paths).
    """
    errors: list[tuple[Loc, str]] = []
    if not isinstance(raw_blocks, list):
        return errors
    allowed = VARIABLE_KINDS[variable]
    every = {kind for kinds in VARIABLE_KINDS.values() for kind in kinds}
    for index, raw in enumerate(raw_blocks):
        if not isinstance(raw, dict) or not isinstance(raw.get("kind"), str):
            continue
        kind = raw["kind"]
        if kind not in every:
            errors.append(
                (
                    (index, "kind"),
                    f"unknown block kind {kind!r}; {variable.value} programs use "
                    f"{', '.join(allowed)}",
                )
            )
        elif kind not in allowed:
            errors.append(((index, "kind"), _kind_message(variable, kind)))
        elif kind == "repeat":
            errors.extend(
                ((index, "blocks", *loc), message)
                for loc, message in kind_errors(variable, raw.get("blocks"))
            )
    return errors


def _kind_message(variable: Variable, kind: str) -> str:
    hint = {
        "daily-cycle": "; a daily-cycle is for temperature and flow, light uses 'daylight'",
        "daylight": "; daylight is for light",
        "climatology": "; climatology is for temperature",
        "replay": "; replay is for temperature",
    }.get(kind, "")
    allowed = ", ".join(VARIABLE_KINDS[variable])
    return f"a {variable.value} program cannot use kind {kind!r}; allowed: {allowed}{hint}"


def iter_leaves(blocks: list[Any]) -> list[Any]:
    """Flatten repeats (one pass of each, in order) to the primitive blocks they contain.

    Parameters
    ----------
    blocks
        Program blocks.

    Returns
    -------
    list
        Non-repeat blocks in program order.
    """
    leaves: list[Any] = []
    for block in blocks:
        if block.kind == "repeat":
            leaves.extend(iter_leaves(block.blocks))
        else:
            leaves.append(block)
    return leaves
