"""Shared steps of ``squall heatwave``: loading a site, and designing a protocol event block.

Rule: this module serves :mod:`controller.cli.cmd_heatwave` only. It imports nothing heavy at
module level (numpy, pandas and the science and protocol modules load inside the functions),
so building the ``squall`` parser stays quick. Errors are one-line
:class:`~controller.errors.SquallError` naming the CLI option or the file.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from controller.errors import SquallError

if TYPE_CHECKING:
    from controller.science.heatwave import Climatology, ExtremeEvent

__all__ = [
    "CATEGORIES",
    "DesignedEvent",
    "Site",
    "check_design_options",
    "design_event",
    "kind_of",
    "load_site",
    "open_for_writing",
    "peak_hold_days",
    "render_event_block",
    "validate_block",
    "years_option",
]

CATEGORIES = ("moderate", "strong", "severe", "extreme")
"""Hobday et al. (2018) category names, I to IV."""

_DAY_S = 86_400.0
_RATE_DECIMALS = 3
_OPTION_OF = {
    "baseline_years": "--baseline-years",
    "min_duration_days": "--min-days",
    "max_gap_days": "--max-gap",
    "baseline_c": "--baseline-c",
    "threshold_c": "--threshold-c",
    "category": "--category",
    "peak_anomaly_c": "--peak-anomaly-c",
    "onset_rate_c_per_day": "--onset-rate",
    "peak_duration": "--peak-duration",
    "decline_rate_c_per_day": "--decline-rate",
    "series": "--series",
    "groups": "--groups",
    "starts": "--starts",
    "name": "--name",
}


# -- the site series -----------------------------------------------------------------------------


@dataclass(frozen=True)
class Site:
    """A loaded site series with its climatology and events.

    Attributes
    ----------
    path
        The series file, as the user named it.
    dates
        Every calendar day from the first to the last date (pandas.DatetimeIndex).
    temps
        Daily mean temperature on each day, °C (numpy array; NaN where missing).
    clim
        Climatology and percentile threshold over the baseline, °C.
    baseline_years
        First and last baseline year used, inclusive.
    events
        The heatwaves (or cold spells) found, in time order.
    """

    path: Path
    dates: Any  # pandas.DatetimeIndex, every calendar day from first to last
    temps: Any  # numpy.ndarray, °C, NaN where missing
    clim: Climatology
    baseline_years: tuple[int, int]
    events: list[ExtremeEvent]


def _as_option(exc: SquallError, path: Path) -> SquallError:
    """Name the CLI option for errors about an argument, else the series file."""
    if exc.file is not None:
        return exc
    if exc.field in _OPTION_OF:
        return SquallError(exc.message, field=_OPTION_OF[exc.field])
    return SquallError(exc.message, file=path, field=exc.field)


def load_site(
    path: Path,
    baseline_years: tuple[int, int] | None,
    *,
    cold: bool,
    min_days: int,
    max_gap: int,
) -> Site:
    """Read a series, build its climatology and find its events (Hobday et al. 2016).

    Parameters
    ----------
    path
        Series CSV (``date``, ``temperature_c`` in °C).
    baseline_years
        First and last baseline year, or ``None`` for every year of the series.
    cold
        Cold spells (10th percentile) instead of heatwaves (90th).
    min_days
        Shortest run past the threshold that counts, days.
    max_gap
        Longest gap joining two runs, days.

    Returns
    -------
    Site
        The series, its climatology and its events.

    Raises
    ------
    SquallError
        Naming the file (and line) or the CLI option at fault.
    """
    from controller.science import heatwave as hw

    dates, temps = hw.load_series_csv(path)
    try:
        days, filled = hw.daily_series(dates, temps)
        clim = hw.climatology(
            days, filled, baseline_years=baseline_years, percentile=10.0 if cold else 90.0
        )
        events = hw.detect(
            days, filled, clim, min_duration_days=min_days, max_gap_days=max_gap, cold=cold
        )
    except SquallError as exc:
        raise _as_option(exc, path) from None
    years = baseline_years or (int(days[0].year), int(days[-1].year))
    return Site(path, days, filled, clim, (int(years[0]), int(years[1])), events)


def kind_of(cold: bool) -> str:
    """The protocol's event kind: ``"cold-spell"`` or ``"heatwave"``."""
    return "cold-spell" if cold else "heatwave"


def open_for_writing(path: Path) -> Any:
    """Open a file for writing UTF-8 text; an unwritable path is the user's error.

    Parameters
    ----------
    path
        File to create or overwrite.

    Returns
    -------
    typing.TextIO
        The open file (use it in a ``with`` block).
    """
    try:
        return path.open("w", encoding="utf-8", newline="")
    except OSError as exc:
        raise SquallError(f"cannot write the file: {exc.strerror or exc}", file=path) from None


def years_option(values: list[int] | None) -> tuple[int, int] | None:
    """``--baseline-years Y0 Y1`` as a tuple of years (``None`` when not given)."""
    return None if values is None else (int(values[0]), int(values[1]))


# -- design block ------------------------------------------------------------------------------


@dataclass(frozen=True)
class DesignedEvent:
    """One event block ready to print, with the notes that explain its numbers.

    Attributes
    ----------
    fields
        The event's keys and values in protocol field names, in print order.
    notes
        Comment lines (without ``#``) printed above the block.
    """

    fields: dict[str, Any]
    notes: tuple[str, ...]


def peak_hold_days(
    duration_days: float, peak_c: float, spread_c: float, onset_c_per_day: float,
    decline_c_per_day: float,
) -> float:  # fmt: skip
    """Peak hold that makes a trapezoid spend ``duration_days`` past the threshold.

    Parameters
    ----------
    duration_days
        Days the detected event spent past the threshold, d.
    peak_c
        Size of the designed anomaly, °C (> 0, a magnitude for cold spells).
    spread_c
        Distance of the threshold from the climatology, °C (> 0, a magnitude).
    onset_c_per_day, decline_c_per_day
        Rates of the designed rise and fall, °C/d (> 0).

    Returns
    -------
    float
        ``duration − (peak − spread)/onset − (peak − spread)/decline``, d; may be negative
        when the ramps alone already stay past the threshold longer.
    """
    above = max(peak_c - spread_c, 0.0)
    return float(duration_days - above / onset_c_per_day - above / decline_c_per_day)


def _toml_value(value: Any) -> str:
    """TOML literal of a str, int, float, bool or a list of them."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        text = repr(value)
        return text if any(c in text for c in ".en") else f"{text}.0"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(item) for item in value) + "]"
    return json.dumps(str(value), ensure_ascii=False)


def render_event_block(event: DesignedEvent) -> str:
    """The ``[[events]]`` TOML text of a designed event, comments first.

    Parameters
    ----------
    event
        The fields (protocol names) and notes.

    Returns
    -------
    str
        TOML text ending in a newline.
    """
    lines = [f"# {line}" for note in event.notes for line in textwrap.wrap(note, 96) or [""]]
    lines.append("[[events]]")
    lines.extend(f"{key} = {_toml_value(value)}" for key, value in event.fields.items())
    return "\n".join(lines) + "\n"


def validate_block(text: str, cold: bool) -> None:
    """Parse printed TOML back and validate it with the protocol's event model.

    Parameters
    ----------
    text
        The ``[[events]]`` block as printed.
    cold
        Validate as a cold spell instead of a heatwave.

    Raises
    ------
    SquallError
        The model's first complaint, naming the CLI option that set the field.
    """
    import tomllib

    from pydantic import ValidationError

    from controller.protocol import ColdSpellEvent, HeatwaveEvent

    model = ColdSpellEvent if cold else HeatwaveEvent
    try:
        model.model_validate(tomllib.loads(text)["events"][0])
    except ValidationError as exc:
        first = exc.errors()[0]
        key = str(first["loc"][0]) if first["loc"] else ""
        message = str(first["msg"]).removeprefix("Value error, ")
        raise SquallError(message, field=_OPTION_OF.get(key, key or None)) from None
    except SquallError as exc:
        raise SquallError(exc.message, field=_OPTION_OF.get(exc.field or "", exc.field)) from None


def _spread_on(clim: Climatology, day: dt.date, cold: bool) -> tuple[float, float, float]:
    """Climatology, threshold and their distance (a magnitude, °C) on a calendar day."""
    seas, thresh = clim.at([day])
    spread = (float(seas[0]) - float(thresh[0])) if cold else (float(thresh[0]) - float(seas[0]))
    return float(seas[0]), float(thresh[0]), spread


def _parse_date(text: str | None) -> dt.date | None:
    if text is None:
        return None
    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        raise SquallError(f"{text!r} is not a date such as 2027-07-10", field="--date") from None


def _parse_peak_duration(text: str | None) -> float | None:
    if text is None:
        return None
    from controller.protocol import parse_duration

    try:
        seconds = parse_duration(text)
    except ValueError as exc:
        raise SquallError(str(exc), field="--peak-duration") from None
    if seconds <= 0:
        raise SquallError("the peak must last longer than 0", field="--peak-duration")
    return seconds


def check_design_options(args: argparse.Namespace) -> None:
    """Refuse option combinations argparse cannot express, naming the options.

    Parameters
    ----------
    args
        Parsed ``heatwave design`` options.
    """
    if args.from_event is not None and args.series is None:
        raise SquallError(
            "--from-event needs --series, the series to take it from", field="--from-event"
        )
    if args.series is None and args.baseline_c is None:
        raise SquallError(
            "give a baseline: --series CSV (with --baseline-years) or --baseline-c and "
            "--threshold-c",
            field="--series",
        )
    if args.threshold_c is not None and args.baseline_c is None:
        raise SquallError("--threshold-c goes with --baseline-c", field="--threshold-c")
    if args.baseline_years is not None and args.series is None:
        raise SquallError("--baseline-years goes with --series", field="--baseline-years")
    if args.category is not None and args.baseline_c is not None and args.threshold_c is None:
        raise SquallError(
            "a category on a constant baseline needs --threshold-c (the percentile threshold)",
            field="--threshold-c",
        )
    if args.from_event is None:
        if args.category is None and args.peak_anomaly_c is None:
            raise SquallError("give a size: --category or --peak-anomaly-c", field="--category")
        for option, value in (
            ("--onset-rate", args.onset_rate),
            ("--peak-duration", args.peak_duration),
            ("--decline-rate", args.decline_rate),
        ):
            if value is None:
                raise SquallError(
                    f"{option} is required (or take it from --from-event)", field=option
                )
    if args.from_event is not None and args.from_event < 1:
        raise SquallError("events are numbered from 1", field="--from-event")


def _series_text(series: Path, output: Path | None) -> str:
    """How the block names the series: relative to the file it is written to, if any."""
    import os

    if output is None or series.is_absolute():
        return series.as_posix()
    relative = os.path.relpath(series.resolve(), output.resolve().parent)
    return Path(relative).as_posix()


def _pick_event(site: Site, number: int, kind: str) -> ExtremeEvent:
    """The ``number``-th (1-based) event of a site, as ``heatwave detect`` numbers them."""
    count = len(site.events)
    if number > count:
        label = kind.replace("-", " ")
        found = f"{count} {label}{'' if count == 1 else 's'}" if count else f"no {label}"
        choose = f"; choose 1..{count}" if count else ""
        raise SquallError(
            f"{site.path} has {found} with these options{choose}", field="--from-event"
        )
    return site.events[number - 1]


def _rate(given: float | None, measured: float, option: str, number: int) -> float:
    """A rate from its option, else the detected event's, rounded; it must be positive."""
    rate = given if given is not None else round(measured, _RATE_DECIMALS)
    if given is None and rate <= 0:
        raise SquallError(
            f"event {number} has no measurable rate (it touches an end of the series); "
            f"give {option}",
            field=option,
        )
    return float(rate)


def _size_notes(
    category: str | None, peak: float | None, spread: float | None,
    spread_range: tuple[float, float] | None,
) -> list[str]:  # fmt: skip
    """Explain the peak anomaly a category stands for."""
    if category is None:
        return []
    multiple = CATEGORIES.index(category) + 1
    roman = ("I", "II", "III", "IV")[multiple - 1]
    if peak is not None:
        return [
            f"Peak anomaly: {multiple} x (threshold − climatology) = {peak:.2f} °C "
            f"(Hobday et al. 2018 category {roman})."
        ]
    if spread_range is None:
        return []
    low, high = (multiple * value for value in spread_range)
    return [
        f"Peak anomaly: {multiple} x (threshold − climatology), {low:.2f} to {high:.2f} °C over "
        "the year: the compiler takes the calendar day the event starts (--date shows one)."
    ]


def design_event(args: argparse.Namespace) -> DesignedEvent:
    """Work out the event block from the options (and the series, if given).

    Parameters
    ----------
    args
        Parsed ``heatwave design`` options (checked by :func:`check_design_options`).

    Returns
    -------
    DesignedEvent
        Fields in protocol names (rates °C/d, sizes °C, durations as text) and notes.
    """
    from controller.protocol import format_duration

    cold = bool(args.cold)
    kind = kind_of(cold)
    label = kind.replace("-", " ")
    notes: list[str] = []
    day = _parse_date(args.date)
    hold_s = _parse_peak_duration(args.peak_duration)
    category: str | None = args.category
    size_c = None if args.peak_anomaly_c is None else abs(float(args.peak_anomaly_c))
    onset: float | None = args.onset_rate
    decline: float | None = args.decline_rate
    site: Site | None = None
    picked: ExtremeEvent | None = None
    if args.series is not None:
        site = load_site(
            args.series,
            years_option(args.baseline_years),
            cold=cold,
            min_days=args.min_days,
            max_gap=args.max_gap,
        )
    if site is not None and args.from_event is not None:
        number = int(args.from_event)
        picked = _pick_event(site, number, kind)
        if category is None and size_c is None:
            category = str(picked.category.value)
        onset = _rate(onset, picked.rate_onset_c_per_day, "--onset-rate", number)
        decline = _rate(decline, picked.rate_decline_c_per_day, "--decline-rate", number)
        day = day or picked.start
        notes.append(
            f"Modelled on {label} {number} of {site.path}: {picked.start} to {picked.end} "
            f"({picked.duration_days} d), max {picked.intensity_max_c:+.2f} °C, "
            f"{picked.category.value}; onset {picked.rate_onset_c_per_day:.3f} °C/d, decline "
            f"{picked.rate_decline_c_per_day:.3f} °C/d (Hobday et al. 2016)."
        )
    fields: dict[str, Any] = {
        "kind": kind,
        "name": args.name or (f"{category} {label}" if category else label),
        "groups": list(args.groups),
        "starts": args.starts,
    }
    spread: float | None = None
    spread_range: tuple[float, float] | None = None
    if site is not None:
        fields["series"] = _series_text(site.path, args.output)
        fields["baseline_years"] = list(site.baseline_years)
        if day is not None:
            seas, thresh, spread = _spread_on(site.clim, day, cold)
            notes.append(
                f"On {day}: climatology {seas:.2f} °C, {site.clim.percentile:g}th-percentile "
                f"threshold {thresh:.2f} °C (baseline {site.baseline_years[0]}–"
                f"{site.baseline_years[1]})."
            )
        else:
            gaps = site.clim.thresh_c - site.clim.seas_c
            gaps = -gaps if cold else gaps
            spread_range = (float(gaps.min()), float(gaps.max()))
    else:
        fields["baseline_c"] = float(args.baseline_c)
        if args.threshold_c is not None:
            fields["threshold_c"] = float(args.threshold_c)
            spread = abs(float(args.threshold_c) - float(args.baseline_c))
    peak: float | None
    if size_c is None:
        assert category is not None  # a size is required without --from-event
        fields["category"] = category
        peak = None if spread is None else (CATEGORIES.index(category) + 1) * spread
        notes.extend(_size_notes(category, peak, spread, spread_range))
    else:
        peak = size_c
        fields["peak_anomaly_c"] = -size_c if cold else size_c
    assert onset is not None and decline is not None  # required without --from-event
    if hold_s is None and picked is not None and peak is not None and spread is not None:
        hold_days = peak_hold_days(picked.duration_days, peak, spread, onset, decline)
        hold_s = max(round(hold_days * 24.0), 1) * 3600.0
        shortest = (
            " (the ramps alone take longer: shortest hold, 1 h)" if hold_days < 1 / 24 else ""
        )
        notes.append(
            f"Peak held {hold_s / _DAY_S:.2f} d so that the event spends "
            f"{picked.duration_days} d past the threshold, as the detected one did{shortest}."
        )
    assert hold_s is not None  # required without --from-event; derived with it
    fields["onset_rate_c_per_day"] = float(onset)
    fields["peak_duration"] = format_duration(hold_s)
    fields["decline_rate_c_per_day"] = float(decline)
    if peak is not None:
        rise, fall = peak / onset, peak / decline
        notes.append(
            f"Shape: {rise:.2f} d onset, {hold_s / _DAY_S:.2f} d at the peak, {fall:.2f} d "
            f"decline, {rise + hold_s / _DAY_S + fall:.2f} d in all: the phases from `starts` "
            "on must hold it."
        )
    notes.append("Set `groups` and `starts` to your protocol's group and phase names.")
    return DesignedEvent(fields=fields, notes=tuple(notes))
