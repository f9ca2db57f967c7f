"""Extreme-event generators: heatwaves, cold spells and storms as overlay channels.

Rules
-----
- An event compiles to up to three overlays on its groups' programs, zero (or one) outside
  its span: a temperature anomaly (°C, added), a light factor (dimensionless, multiplied) and
  a flow (cm s-1, the larger of program and event wins). The compiler combines them.
- Heatwave (Hobday et al. 2016 definition, Hobday et al. 2018 categories): the peak anomaly
  is ``peak_anomaly_c`` or n·(thresh - seas) with n = 1, 2, 3, 4 for moderate, strong, severe,
  extreme, taken on the calendar day the event starts. The anomaly rises linearly at
  ``onset_rate_c_per_day`` from 0 to the peak, holds it for ``peak_duration``, and falls at
  ``decline_rate_c_per_day`` back to 0. Marks: ``onset``, ``peak``, ``decline``.
- Cold spell: the same shape below the program, from the 10th-percentile threshold (Schlegel
  et al. 2017); a climatology table must then carry a threshold below its mean.
- Storm: ΔKd ramps linearly 0 -> ``kd_rise_per_m`` over ``ramp``, holds, and ramps back over
  ``ramp`` at the end; the light factor is exp(-ΔKd·depth) (Beer–Lambert), tessellated to
  0.001. Flow pulses start every ``pulse_every`` from the storm start, last
  ``pulse_duration`` (cut at the storm end) and peak at flow_peak·(1 - gustiness·u) with u
  from ``numpy.random.default_rng(seed)`` (same seed, same pulses). A temperature drop
  follows the ΔKd shape. Marks: ``build``, ``peak``, ``clear``.
- An event that would run past the end of the experiment is an error at ``events.<i>``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta

import numpy as np
import pandas as pd

from controller.errors import SquallError
from controller.protocol._channel import Channel, concat, constant
from controller.protocol._compiled import EventSpan, Mark
from controller.protocol._events import ColdSpellEvent, HeatwaveEvent, StormEvent
from controller.protocol._series import SeriesFiles
from controller.protocol._shapes import DAY_S, shading_ramp
from controller.science.heatwave import CATEGORY_MULTIPLES, Climatology

__all__ = ["SHADING_TOL", "EventEffect", "compile_event", "seas_channel"]

SHADING_TOL = 1e-3
"""Largest deviation of the tessellated storm light factor from exp(-ΔKd·z), dimensionless."""


@dataclass
class EventEffect:
    """What one event adds to its groups.

    Attributes
    ----------
    span
        The event on the timeline.
    anomaly
        Temperature anomaly to add, °C, or ``None``.
    factor
        Light factor to multiply, dimensionless, or ``None``.
    flow
        Flow competing with the program (larger wins), cm s-1, or ``None``.
    baseline
        Climatological baseline temperature (seas), °C, over the whole experiment, for
        heatwaves and cold spells.
    marks
        Named sub-phases.
    """

    span: EventSpan
    anomaly: Channel | None = None
    factor: Channel | None = None
    flow: Channel | None = None
    baseline: Channel | None = None
    marks: list[Mark] = field(default_factory=list)


def seas_channel(
    clim: Climatology, scenario_start_local: datetime, t0_s: float, t1_s: float
) -> Channel:
    """The climatological mean (seas) as a channel: one breakpoint at each local noon.

    Parameters
    ----------
    clim
        Daily climatology.
    scenario_start_local
        Local date and time elapsed 0 represents (naive).
    t0_s, t1_s
        Interval to cover, s from the experiment start.

    Returns
    -------
    Channel
        seas, °C, linear between local noons, covering ``[t0_s, t1_s]``.
    """
    midnight = datetime.combine(scenario_start_local.date(), datetime.min.time())
    first = (midnight - scenario_start_local).total_seconds() + DAY_S / 2
    first -= DAY_S * np.ceil((first - t0_s) / DAY_S)
    count = int(np.ceil((t1_s - first) / DAY_S)) + 1
    noons = first + DAY_S * np.arange(count, dtype=np.float64)
    dates = pd.DatetimeIndex(
        [scenario_start_local + timedelta(seconds=float(t)) for t in noons]
    ).normalize()
    seas, _ = clim.at(dates)
    return Channel(noons, np.asarray(seas, dtype=float))


def _calendar_day(scenario_start_local: datetime, t_s: float) -> pd.DatetimeIndex:
    return pd.DatetimeIndex([scenario_start_local + timedelta(seconds=t_s)]).normalize()


def _temperature_extreme(
    event: HeatwaveEvent | ColdSpellEvent,
    span: EventSpan,
    files: SeriesFiles,
    scenario_start_local: datetime,
    duration_s: float,
) -> EventEffect:
    where = span.field
    heat = event.kind == "heatwave"
    direction = 1.0 if heat else -1.0
    if event.baseline_c is not None:
        baseline = constant(event.baseline_c, 0.0, duration_s)
        seas_day = event.baseline_c
        thresh_day = event.threshold_c
    else:
        clim = files.climatology(
            table=event.climatology,
            series=event.series,
            baseline_years=event.baseline_years,
            percentile=90.0 if heat else 10.0,
            where=f"{where}.{'climatology' if event.climatology else 'series'}",
        )
        baseline = seas_channel(clim, scenario_start_local, 0.0, duration_s)
        seas, thresh = clim.at(_calendar_day(scenario_start_local, span.t0_s))
        seas_day, thresh_day = float(seas[0]), float(thresh[0])
    if event.category is not None:
        spread = direction * (float(thresh_day) - seas_day)  # type: ignore[arg-type]
        if spread <= 0:
            side = "above" if heat else "below"
            raise SquallError(
                f"on {_calendar_day(scenario_start_local, span.t0_s)[0].date()} the threshold "
                f"({thresh_day:g} °C) is not {side} the climatological mean ({seas_day:g} °C), "
                f"so a {event.kind} category has no size; check the climatology",
                field=f"{where}.category",
            )
        peak = CATEGORY_MULTIPLES[event.category.value] * spread
    else:
        peak = abs(float(event.peak_anomaly_c))  # type: ignore[arg-type]
    t0 = span.t0_s
    t1 = t0 + peak / event.onset_rate_c_per_day * DAY_S
    t2 = t1 + event.peak_duration
    t3 = t2 + peak / event.decline_rate_c_per_day * DAY_S
    _check_end(span, t3, duration_s)
    anomaly = Channel(np.array([t0, t1, t2, t3]), direction * np.array([0.0, peak, peak, 0.0]))
    marks = [
        Mark(span.name, "onset", t0, t1),
        Mark(span.name, "peak", t1, t2),
        Mark(span.name, "decline", t2, t3),
    ]
    span = EventSpan(span.name, span.kind, span.groups, t0, t3, span.field)
    return EventEffect(span, anomaly=anomaly, baseline=baseline, marks=marks)


def _check_end(span: EventSpan, end_s: float, duration_s: float) -> None:
    if end_s > duration_s + 1e-6:
        raise SquallError(
            f"{span.kind} {span.name!r} runs until {end_s / DAY_S:.3g} d after the start, past "
            f"the end of the experiment ({duration_s / DAY_S:.3g} d); lengthen the phases or "
            "shorten the event",
            field=span.field,
        )


def _trapezoid(t0: float, t1: float, ramp: float, level: float) -> Channel:
    return Channel(np.array([t0, t0 + ramp, t1 - ramp, t1]), np.array([0.0, level, level, 0.0]))


def _storm(
    event: StormEvent, span: EventSpan, depth_m: float | None, duration_s: float
) -> EventEffect:
    t0, t1, ramp = span.t0_s, span.t0_s + event.duration, event.ramp
    _check_end(span, t1, duration_s)
    span = EventSpan(span.name, span.kind, span.groups, t0, t1, span.field)
    effect = EventEffect(span)
    if event.kd_rise_per_m > 0 and depth_m is not None:
        kd_z = event.kd_rise_per_m * depth_m
        low = float(np.exp(-kd_z))
        if ramp > 0:
            pieces = [
                shading_ramp(kd_z, t0, t0 + ramp, True, SHADING_TOL),
                shading_ramp(kd_z, t1 - ramp, t1, False, SHADING_TOL),
            ]
        else:
            pieces = [
                Channel(np.array([t0, t0]), np.array([1.0, low])),
                Channel(np.array([t1, t1]), np.array([low, 1.0])),
            ]
        effect.factor = concat(pieces)
    if event.temperature_drop_c > 0:
        effect.anomaly = _trapezoid(t0, t1, ramp, -event.temperature_drop_c)
    if event.flow_peak_cm_s is not None:
        every, length = float(event.pulse_every), float(event.pulse_duration)  # type: ignore[arg-type]
        starts = t0 + every * np.arange(int(np.ceil((t1 - t0) / every - 1e-9)))
        starts = starts[starts < t1]
        u = np.random.default_rng(event.seed).random(starts.size)
        peaks = event.flow_peak_cm_s * (1.0 - event.gustiness * u)
        ends = np.minimum(starts + length, t1)
        times = np.column_stack((starts, starts, ends, ends)).ravel()
        values = np.column_stack((np.zeros_like(peaks), peaks, peaks, np.zeros_like(peaks))).ravel()
        effect.flow = Channel(times, values) if times.size else constant(0.0, t0)
    if ramp > 0:
        effect.marks = [
            Mark(span.name, "build", t0, t0 + ramp),
            Mark(span.name, "peak", t0 + ramp, t1 - ramp),
            Mark(span.name, "clear", t1 - ramp, t1),
        ]
    else:
        effect.marks = [Mark(span.name, "peak", t0, t1)]
    return effect


def compile_event(
    event: HeatwaveEvent | ColdSpellEvent | StormEvent,
    span: EventSpan,
    *,
    files: SeriesFiles,
    scenario_start_local: datetime,
    duration_s: float,
    depth_m: float | None,
) -> EventEffect:
    """Compile one event into its overlays.

    Parameters
    ----------
    event
        The validated event.
    span
        Its name, kind, groups, start (``t0_s``, s) and field path; the end is filled in here.
    files
        CSV reader for climatologies and series, relative to the protocol file.
    scenario_start_local
        Local date and time elapsed 0 represents (naive).
    duration_s
        Length of the experiment, s.
    depth_m
        Depth of the community, m (storm shading), if the site gives it.

    Returns
    -------
    EventEffect
        The event's overlays, baseline and marks, and its span with the end time.
    """
    if isinstance(event, StormEvent):
        return _storm(event, span, depth_m, duration_s)
    return _temperature_extreme(event, span, files, scenario_start_local, duration_s)
