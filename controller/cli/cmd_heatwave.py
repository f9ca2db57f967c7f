"""``squall heatwave detect`` and ``squall heatwave design``: site events in, protocol events out.

Rules
-----
- ``detect`` finds marine heatwaves (Hobday et al. 2016; categories Hobday et al. 2018) or,
  with ``--cold``, cold spells (Schlegel et al. 2017) in a daily site series, prints a table
  and writes them as JSON (``--json``) and CSV (``--csv``). The science is
  :mod:`controller.science.heatwave`; this module only reads options and writes files.
- ``design`` prints (or writes, ``-o``) one ``[[events]]`` block for a protocol file, in the
  protocol's own field names. What it prints is parsed back and validated with the protocol's
  event model before it is shown, so a block that would not load is never printed.
- ``design --from-event N`` copies the N-th event that ``detect`` lists (same series, baseline
  and options) into the block: its category, onset and decline rates, and a peak hold chosen
  so that the designed event spends as many days past the threshold as the detected one.
- Every problem with the input is a one-line :class:`~controller.errors.SquallError` naming the
  option or the file, exit 2. numpy, pandas and the science modules load inside the handlers.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import json
import math
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from controller.errors import SquallError

if TYPE_CHECKING:  # heavy imports are deferred so that `squall --help` stays quick
    from controller.science.heatwave import Climatology, ExtremeEvent

__all__ = [
    "CATEGORIES",
    "EVENT_FIELDS",
    "JSON_FORMAT",
    "METHOD",
    "DesignedEvent",
    "peak_hold_days",
    "register",
    "render_event_block",
]

JSON_FORMAT = "squall-extreme-events/1"
"""Value of the ``format`` key of the JSON that ``heatwave detect`` writes."""

EVENT_FIELDS = (
    "start",
    "end",
    "duration_days",
    "intensity_max_c",
    "intensity_mean_c",
    "intensity_cumulative_c_days",
    "rate_onset_c_per_day",
    "rate_decline_c_per_day",
    "category",
)
"""Fields every event of the JSON and CSV output has (more may follow them)."""

CATEGORIES = ("moderate", "strong", "severe", "extreme")
"""Hobday et al. (2018) category names, I to IV."""

METHOD = {
    "heatwave": "Hobday et al. (2016) Prog. Oceanogr. 141:227-238; categories Hobday et al. "
    "(2018) Oceanography 31(2):162-173",
    "cold-spell": "Hobday et al. (2016) with the 10th percentile, as Schlegel et al. (2017) "
    "Prog. Oceanogr. 151:189-205; categories Hobday et al. (2018)",
}
"""Method reference written into the JSON, per event kind."""

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


# -- shared steps ------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Site:
    """A loaded series with its climatology and events."""

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


def _load_site(
    path: Path,
    baseline_years: tuple[int, int] | None,
    *,
    cold: bool,
    min_days: int,
    max_gap: int,
) -> _Site:
    """Read a series, build its climatology and find its events; errors name option or file."""
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
    return _Site(path, days, filled, clim, (int(years[0]), int(years[1])), events)


def _kind(cold: bool) -> str:
    return "cold-spell" if cold else "heatwave"


def _open_for_writing(path: Path) -> Any:
    """Open a file for writing text; an unwritable path is the user's error."""
    try:
        return path.open("w", encoding="utf-8", newline="")
    except OSError as exc:
        raise SquallError(f"cannot write the file: {exc.strerror or exc}", file=path) from None


# -- detect ------------------------------------------------------------------------------------


def _detect_document(site: _Site, *, cold: bool, min_days: int, max_gap: int) -> dict[str, Any]:
    """The JSON document of ``heatwave detect``."""
    from controller import __version__

    missing = int(sum(1 for value in site.temps if math.isnan(float(value))))
    return {
        "format": JSON_FORMAT,
        "kind": _kind(cold),
        "series": str(site.path),
        "series_first_date": site.dates[0].date().isoformat(),
        "series_last_date": site.dates[-1].date().isoformat(),
        "series_days": len(site.dates),
        "missing_days": missing,
        "baseline_years": list(site.baseline_years),
        "percentile": site.clim.percentile,
        "window_half_width_days": 5,
        "smooth_width_days": 31,
        "min_duration_days": min_days,
        "max_gap_days": max_gap,
        "method": METHOD[_kind(cold)],
        "software": f"squall {__version__}",
        "events": [_ordered(event.to_json_dict()) for event in site.events],
    }


def _ordered(event: dict[str, Any]) -> dict[str, Any]:
    """The fixed fields first, in :data:`EVENT_FIELDS` order, then the extras."""
    return {**{key: event[key] for key in EVENT_FIELDS}, **event}


def _write_csv(path: Path, events: list[dict[str, Any]]) -> None:
    """One row per event: the fixed fields first, then the extras."""
    extras = [key for key in (events[0] if events else {}) if key not in EVENT_FIELDS]
    with _open_for_writing(path) as handle:
        writer = csv.DictWriter(handle, fieldnames=[*EVENT_FIELDS, *extras])
        writer.writeheader()
        writer.writerows(events)


def _print_table(site: _Site, *, cold: bool) -> None:
    """A compact numbered table of the events, the numbers ``design --from-event`` takes."""
    from rich.console import Console
    from rich.table import Table

    console = Console(highlight=False, soft_wrap=False)
    kind = "cold spells" if cold else "marine heatwaves"
    y0, y1 = site.baseline_years
    title = (
        f"{len(site.events)} {kind} in {site.path} ({site.dates[0].date()} to "
        f"{site.dates[-1].date()}; baseline {y0}–{y1}, {site.clim.percentile:g}th percentile)"
    )
    table = Table(
        title=title,
        title_justify="left",
        caption="intensities °C (cumulative °C·d), rates °C/d",
        caption_justify="left",
        box=None,
        pad_edge=False,
    )
    for header in ("#", "start", "end", "days", "max", "mean", "cum", "onset", "decline"):
        table.add_column(
            header, justify="left" if header in {"start", "end"} else "right", no_wrap=True
        )
    table.add_column("category", no_wrap=True)
    for number, event in enumerate(site.events, start=1):
        table.add_row(
            str(number),
            event.start.isoformat(),
            event.end.isoformat(),
            str(event.duration_days),
            f"{event.intensity_max_c:.2f}",
            f"{event.intensity_mean_c:.2f}",
            f"{event.intensity_cumulative_c_days:.1f}",
            f"{event.rate_onset_c_per_day:.3f}",
            f"{event.rate_decline_c_per_day:.3f}",
            str(event.category.value),
        )
    console.print(table)
    if y1 - y0 + 1 < 30:
        console.print(
            f"note: the baseline spans {y1 - y0 + 1} years; Hobday et al. (2016) recommend "
            "at least 30"
        )


def _detect(args: argparse.Namespace) -> int:
    """Run ``squall heatwave detect``; return the exit code."""
    site = _load_site(
        args.series,
        _years(args.baseline_years),
        cold=args.cold,
        min_days=args.min_days,
        max_gap=args.max_gap,
    )
    document = _detect_document(site, cold=args.cold, min_days=args.min_days, max_gap=args.max_gap)
    if args.json is not None:
        with _open_for_writing(args.json) as handle:
            json.dump(document, handle, indent=2, ensure_ascii=False)
            handle.write("\n")
    if args.csv is not None:
        _write_csv(args.csv, document["events"])
    _print_table(site, cold=args.cold)
    return 0


def _years(values: list[int] | None) -> tuple[int, int] | None:
    return None if values is None else (int(values[0]), int(values[1]))


# -- design ------------------------------------------------------------------------------------


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


def _validate_block(text: str, cold: bool) -> None:
    """Parse printed TOML back and validate it with the protocol's event model."""
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


def _check_design_options(args: argparse.Namespace) -> None:
    """Option combinations argparse cannot express, reported with the options' names."""
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


def _pick_event(site: _Site, number: int, kind: str) -> ExtremeEvent:
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


def _design_event(args: argparse.Namespace) -> DesignedEvent:
    """Work out the event block from the options (and the series, if given)."""
    from controller.protocol import format_duration

    cold = bool(args.cold)
    kind = _kind(cold)
    label = kind.replace("-", " ")
    notes: list[str] = []
    day = _parse_date(args.date)
    hold_s = _parse_peak_duration(args.peak_duration)
    category: str | None = args.category
    size_c = None if args.peak_anomaly_c is None else abs(float(args.peak_anomaly_c))
    onset: float | None = args.onset_rate
    decline: float | None = args.decline_rate
    site: _Site | None = None
    picked: ExtremeEvent | None = None
    if args.series is not None:
        site = _load_site(
            args.series,
            _years(args.baseline_years),
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


def _design(args: argparse.Namespace) -> int:
    """Run ``squall heatwave design``; return the exit code."""
    _check_design_options(args)
    designed = _design_event(args)
    header = "Designed with `squall heatwave design`"
    text = render_event_block(DesignedEvent(designed.fields, (header, *designed.notes)))
    _validate_block(text, bool(args.cold))
    if args.output is None:
        print(text, end="")
        return 0
    with _open_for_writing(args.output) as handle:
        handle.write(text)
    print(f"wrote the {_kind(args.cold)} block to {args.output}")
    return 0


# -- parser ------------------------------------------------------------------------------------


def _whole_number(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    return value


def _add_series_options(parser: argparse.ArgumentParser) -> None:
    """Baseline, kind and run-joining options shared by detect and design."""
    parser.add_argument(
        "--baseline-years",
        nargs=2,
        type=int,
        metavar=("Y0", "Y1"),
        help="first and last year of the climatology baseline (default: every year of the "
        "series; Hobday et al. 2016 recommend 30 years)",
    )
    parser.add_argument(
        "--cold",
        action="store_true",
        help="cold spells (below the 10th percentile) instead of heatwaves (above the 90th)",
    )
    parser.add_argument(
        "--min-days",
        type=_whole_number,
        default=5,
        metavar="N",
        help="shortest run of days past the threshold that counts, days (default 5)",
    )
    parser.add_argument(
        "--max-gap",
        type=_whole_number,
        default=2,
        metavar="N",
        help="longest gap that still joins two runs into one event, days (default 2)",
    )


def register(sub: Any) -> None:
    """Add the ``heatwave`` subcommand and its two actions to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "heatwave",
        help="find marine heatwaves and cold spells in a site series; design protocol events",
        description=(
            "Marine heatwaves (Hobday et al. 2016, categories Hobday et al. 2018) and cold "
            "spells: find them in a daily site series (CSV with columns date, temperature_c), "
            "or turn one into an [[events]] block for a protocol file."
        ),
    )
    actions = parser.add_subparsers(
        dest="heatwave_action", metavar="ACTION", parser_class=type(parser)
    )
    actions.required = True

    detect = actions.add_parser(
        "detect",
        help="list the events of a daily site series",
        description=(
            "Find marine heatwaves (or cold spells with --cold) in a daily series: climatology "
            "and percentile threshold from an 11-day window pooled over the baseline years, "
            "smoothed over 31 days; runs of at least --min-days past the threshold, joined "
            "across gaps of at most --max-gap days. Prints a numbered table; --json and --csv "
            "write the events with their metrics."
        ),
    )
    detect.add_argument("series", type=Path, metavar="SERIES.csv", help="daily site series")
    detect.add_argument("--json", type=Path, metavar="FILE", help="write the events as JSON")
    detect.add_argument("--csv", type=Path, metavar="FILE", help="write the events as CSV")
    _add_series_options(detect)
    detect.set_defaults(handler=_detect)

    design = actions.add_parser(
        "design",
        help="print a protocol [[events]] block for a heatwave or cold spell",
        description=(
            "Print a ready-to-paste [[events]] block (protocol field names) for a heatwave or, "
            "with --cold, a cold spell: its size as a category or a peak anomaly, its baseline "
            "from a site series or constants, and its onset rate, peak hold and decline rate. "
            "With --from-event N the N-th event that 'heatwave detect' lists for the same "
            "series and options gives the category, rates and peak hold."
        ),
    )
    size = design.add_mutually_exclusive_group()
    size.add_argument(
        "--category", choices=CATEGORIES, help="size as a Hobday et al. (2018) category"
    )
    size.add_argument(
        "--peak-anomaly-c",
        type=float,
        metavar="X",
        help="size as a peak anomaly from the baseline, °C (a magnitude; cold spells go down)",
    )
    base = design.add_mutually_exclusive_group()
    base.add_argument("--series", type=Path, metavar="CSV", help="daily site series")
    base.add_argument(
        "--baseline-c", type=float, metavar="B", help="constant climatological mean, °C"
    )
    design.add_argument(
        "--threshold-c",
        type=float,
        metavar="T",
        help="with --baseline-c: the percentile threshold, °C (needed for --category)",
    )
    _add_series_options(design)
    design.add_argument(
        "--onset-rate", type=float, metavar="R", help="rise of the anomaly, °C per day"
    )
    design.add_argument(
        "--peak-duration", metavar="D", help="how long the peak is held, e.g. 4d or P4DT12H"
    )
    design.add_argument(
        "--decline-rate", type=float, metavar="R", help="fall of the anomaly, °C per day"
    )
    design.add_argument(
        "--date",
        metavar="YYYY-MM-DD",
        help="calendar day the event starts on, to work out its size from the series",
    )
    design.add_argument(
        "--from-event",
        type=_whole_number,
        metavar="N",
        help="copy the N-th event (as numbered by 'heatwave detect') of --series",
    )
    design.add_argument(
        "--groups", nargs="+", default=["treatment"], metavar="GROUP", help="groups it applies to"
    )
    design.add_argument(
        "--starts", default="exposure", metavar="PHASE", help="phase (or offset) it starts at"
    )
    design.add_argument("--name", metavar="TEXT", help="event name shown in plots and logs")
    design.add_argument("-o", "--output", type=Path, metavar="FILE", help="write the block to FILE")
    design.set_defaults(handler=_design)
