"""Events: extreme-weather generators overlaid on groups' phase programs.

Rules
-----
- Events are discriminated by ``kind``: ``heatwave``, ``cold-spell``, ``storm``. A compound
  event is two or more events overlapping on the same group; they combine per variable like
  any overlay (temperature anomalies add, light factors multiply, flow takes the larger).
- Heatwave and cold spell take exactly one baseline: ``baseline_c`` (a constant, with
  ``threshold_c`` when ``category`` is used), ``climatology`` (a daily table) or ``series``
  (a site series, Hobday et al. 2016 climatology over ``baseline_years``). They take exactly
  one size: ``category`` (Hobday et al. 2018 multiples of thresh - seas) or
  ``peak_anomaly_c``. A cold spell's ``peak_anomaly_c`` may be written as a negative or a
  positive magnitude; it is always applied downward.
- A storm's flow pulses need ``flow_peak_cm_s``, ``pulse_every`` and ``pulse_duration``
  together (or none of them); the pulse must fit in its period and the ramps in the storm.
- Where an event starts (``starts`` + ``offset``) and whether its groups exist is checked by
  the root model, which knows the phases and groups.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Annotated, Literal, Self

from pydantic import Field, model_validator

from controller._model import FileModel
from controller.protocol._blocks import check_baseline_years, exactly_one
from controller.protocol._durations import Duration, Offset
from controller.protocol._errors import raise_at

__all__ = [
    "Category",
    "ColdSpellEvent",
    "Event",
    "HeatwaveEvent",
    "StormEvent",
]


class Category(StrEnum):
    """Size of a heatwave or cold spell as a Hobday et al. (2018) category.

    The values are the keys of :data:`controller.science.heatwave.CATEGORY_MULTIPLES`
    (1x..4x of thresh - seas); kept here so reading a protocol does not load the science stack.
    """

    MODERATE = "moderate"
    STRONG = "strong"
    SEVERE = "severe"
    EXTREME = "extreme"


class _EventBase(FileModel):
    """Fields every event has: which groups, and when it starts."""

    name: str | None = Field(
        None, min_length=1, max_length=80, description="Name shown in plots and logs."
    )
    groups: list[str] = Field(min_length=1, description="Groups the event is applied to.")
    starts: str = Field(
        min_length=1,
        description="A phase name (the event starts at that phase's start) or a duration from "
        "the start of the experiment, e.g. '4d'.",
    )
    offset: Offset = Field("0s", description="Added to `starts`, e.g. '2d'.")


class _TemperatureExtreme(_EventBase):
    """Shared fields and rules of heatwaves and cold spells."""

    baseline_c: float | None = Field(
        None, ge=-2, le=40, description="Constant climatological mean (seas), °C."
    )
    climatology: str | None = Field(
        None,
        min_length=1,
        description="CSV of a daily climatology (doy, seas_c, thresh_c), relative to the "
        "protocol file.",
    )
    series: str | None = Field(
        None,
        min_length=1,
        description="CSV of a daily site series (date, temperature_c); the Hobday et al. "
        "(2016) climatology and threshold are computed from it.",
    )
    baseline_years: tuple[int, int] | None = Field(
        None, description="First and last year of the baseline period, with series only."
    )
    category: Category | None = Field(
        None, description="Size as a Hobday et al. (2018) category: 1x..4x of (thresh - seas)."
    )
    peak_anomaly_c: float | None = Field(
        None, description="Size as an explicit peak anomaly above (below) the program, °C."
    )
    threshold_c: float | None = Field(
        None,
        ge=-2,
        le=40,
        description="With baseline_c: the percentile threshold (90th for heatwaves, 10th for "
        "cold spells), °C; needed for category.",
    )
    onset_rate_c_per_day: float = Field(
        gt=0, le=48, description="How fast the anomaly builds, °C d-1."
    )
    peak_duration: Duration = Field(description="How long the peak anomaly is held.")
    decline_rate_c_per_day: float = Field(
        gt=0, le=48, description="How fast the anomaly fades, °C d-1."
    )

    @model_validator(mode="after")
    def _exactly_one(self) -> Self:
        what = f"a {self.kind}"  # type: ignore[attr-defined]
        exactly_one(self, ("baseline_c", "climatology", "series"), f"{what} baseline")
        check_baseline_years(self)
        exactly_one(self, ("category", "peak_anomaly_c"), f"{what} size")
        if self.threshold_c is not None and self.baseline_c is None:
            raise_at(
                type(self).__name__,
                ("threshold_c",),
                "threshold_c goes with baseline_c; a climatology or series brings its own "
                "threshold",
            )
        if self.baseline_c is not None and self.category is not None and self.threshold_c is None:
            raise_at(
                type(self).__name__,
                ("category",),
                "a category with baseline_c needs threshold_c as well (the percentile threshold)",
            )
        if self.peak_anomaly_c is not None and not 0 < abs(self.peak_anomaly_c) <= 20:
            raise_at(
                type(self).__name__,
                ("peak_anomaly_c",),
                "peak_anomaly_c must be a size between 0 and 20 °C (not 0)",
            )
        return self


class HeatwaveEvent(_TemperatureExtreme):
    """A marine heatwave: warm anomaly that ramps up, holds its peak, and declines."""

    kind: Literal["heatwave"] = Field(description="Event kind: marine heatwave.")

    @model_validator(mode="after")
    def _threshold_above(self) -> Self:
        if self.baseline_c is not None and self.threshold_c is not None:
            if self.threshold_c <= self.baseline_c:
                raise_at(
                    "HeatwaveEvent",
                    ("threshold_c",),
                    f"threshold_c {self.threshold_c:g} °C must be above baseline_c "
                    f"{self.baseline_c:g} °C (it is the 90th percentile)",
                )
        if self.peak_anomaly_c is not None and self.peak_anomaly_c < 0:
            raise_at(
                "HeatwaveEvent",
                ("peak_anomaly_c",),
                "a heatwave's peak_anomaly_c must be positive; for cooling use a cold-spell",
            )
        return self


class ColdSpellEvent(_TemperatureExtreme):
    """A marine cold spell: the mirror of a heatwave below the 10th percentile."""

    kind: Literal["cold-spell"] = Field(description="Event kind: marine cold spell.")

    @model_validator(mode="after")
    def _threshold_below(self) -> Self:
        if self.baseline_c is not None and self.threshold_c is not None:
            if self.threshold_c >= self.baseline_c:
                raise_at(
                    "ColdSpellEvent",
                    ("threshold_c",),
                    f"threshold_c {self.threshold_c:g} °C must be below baseline_c "
                    f"{self.baseline_c:g} °C (it is the 10th percentile)",
                )
        return self


class StormEvent(_EventBase):
    """A storm: turbid water shades the community, flow pulses, optional cooling."""

    kind: Literal["storm"] = Field(description="Event kind: storm.")
    duration: Duration = Field(description="How long the storm lasts, ramps included.")
    kd_rise_per_m: float = Field(
        0.0,
        ge=0,
        le=20,
        description="Rise of the diffuse attenuation coefficient Kd(PAR), m-1; light is "
        "multiplied by exp(-kd_rise_per_m * site.depth_m).",
    )
    ramp: Offset = Field(
        "0s", description="How long turbidity (and cooling) take to build and to clear."
    )
    flow_peak_cm_s: float | None = Field(
        None, gt=0, le=200, description="Highest flow of the pulses, cm s-1."
    )
    pulse_every: Duration | None = Field(None, description="Time from one pulse start to the next.")
    pulse_duration: Duration | None = Field(None, description="How long each pulse lasts.")
    gustiness: float = Field(
        0.0,
        ge=0,
        le=1,
        description="Seeded random variation of pulse peaks, 0..1: each peak is "
        "flow_peak_cm_s * (1 - gustiness * u), u uniform in [0, 1).",
    )
    seed: int = Field(0, ge=0, description="Seed of the random pulse peaks; same seed, same run.")
    temperature_drop_c: float = Field(
        0.0, ge=0, le=20, description="Cooling by the storm, °C (0 = none)."
    )

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        names = ("flow_peak_cm_s", "pulse_every", "pulse_duration")
        given = [n for n in names if getattr(self, n) is not None]
        if given and len(given) < len(names):
            missing = [n for n in names if n not in given]
            raise_at(
                "StormEvent",
                (given[0],),
                f"flow pulses need flow_peak_cm_s, pulse_every and pulse_duration together; "
                f"missing {', '.join(missing)}",
            )
        if self.pulse_every is not None and self.pulse_duration is not None:
            if self.pulse_duration > self.pulse_every:
                raise_at(
                    "StormEvent",
                    ("pulse_duration",),
                    "pulse_duration must not be longer than pulse_every",
                )
        if 2 * self.ramp > self.duration:
            raise_at(
                "StormEvent",
                ("ramp",),
                "the storm is shorter than its two ramps (turbidity builds over `ramp` and "
                "clears over `ramp`)",
            )
        if self.kd_rise_per_m == 0 and self.flow_peak_cm_s is None and self.temperature_drop_c == 0:
            raise ValueError(
                "this storm changes nothing: give kd_rise_per_m, flow pulses or temperature_drop_c"
            )
        return self


Event = Annotated[
    HeatwaveEvent | ColdSpellEvent | StormEvent,
    Field(discriminator="kind"),
]
"""Any event, chosen by its ``kind``."""
