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
- Loading the site series and working out a design block live in :mod:`._heatwave_design`;
  this module holds the options, ``detect``'s outputs and the handlers.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
from pathlib import Path
from typing import Any

from controller.cli._heatwave_design import (
    CATEGORIES,
    DesignedEvent,
    Site,
    check_design_options,
    design_event,
    kind_of,
    load_site,
    open_for_writing,
    peak_hold_days,
    render_event_block,
    validate_block,
    years_option,
)

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

METHOD = {
    "heatwave": "Hobday et al. (2016) Prog. Oceanogr. 141:227-238; categories Hobday et al. "
    "(2018) Oceanography 31(2):162-173",
    "cold-spell": "Hobday et al. (2016) with the 10th percentile, as Schlegel et al. (2017) "
    "Prog. Oceanogr. 151:189-205; categories Hobday et al. (2018)",
}
"""Method reference written into the JSON, per event kind."""


# -- detect ------------------------------------------------------------------------------------


def _detect_document(site: Site, *, cold: bool, min_days: int, max_gap: int) -> dict[str, Any]:
    """The JSON document of ``heatwave detect``."""
    from controller import __version__

    missing = int(sum(1 for value in site.temps if math.isnan(float(value))))
    return {
        "format": JSON_FORMAT,
        "kind": kind_of(cold),
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
        "method": METHOD[kind_of(cold)],
        "software": f"squall {__version__}",
        "events": [_ordered(event.to_json_dict()) for event in site.events],
    }


def _ordered(event: dict[str, Any]) -> dict[str, Any]:
    """The fixed fields first, in :data:`EVENT_FIELDS` order, then the extras."""
    return {**{key: event[key] for key in EVENT_FIELDS}, **event}


def _write_csv(path: Path, events: list[dict[str, Any]]) -> None:
    """One row per event: the fixed fields first, then the extras."""
    extras = [key for key in (events[0] if events else {}) if key not in EVENT_FIELDS]
    with open_for_writing(path) as handle:
        writer = csv.DictWriter(handle, fieldnames=[*EVENT_FIELDS, *extras])
        writer.writeheader()
        writer.writerows(events)


def _print_table(site: Site, *, cold: bool) -> None:
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
    site = load_site(
        args.series,
        years_option(args.baseline_years),
        cold=args.cold,
        min_days=args.min_days,
        max_gap=args.max_gap,
    )
    document = _detect_document(site, cold=args.cold, min_days=args.min_days, max_gap=args.max_gap)
    if args.json is not None:
        with open_for_writing(args.json) as handle:
            json.dump(document, handle, indent=2, ensure_ascii=False)
            handle.write("\n")
    if args.csv is not None:
        _write_csv(args.csv, document["events"])
    _print_table(site, cold=args.cold)
    return 0


def _design(args: argparse.Namespace) -> int:
    """Run ``squall heatwave design``; return the exit code."""
    check_design_options(args)
    designed = design_event(args)
    header = "Designed with `squall heatwave design`"
    text = render_event_block(DesignedEvent(designed.fields, (header, *designed.notes)))
    validate_block(text, bool(args.cold))
    if args.output is None:
        print(text, end="")
        return 0
    with open_for_writing(args.output) as handle:
        handle.write(text)
    print(f"wrote the {kind_of(args.cold)} block to {args.output}")
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
        "--groups",
        nargs="+",
        default=["treatment"],
        metavar="GROUP",
        help="groups it applies to (default: treatment)",
    )
    design.add_argument(
        "--starts",
        default="exposure",
        metavar="PHASE",
        help="phase (or offset) it starts at (default: exposure)",
    )
    design.add_argument("--name", metavar="TEXT", help="event name shown in plots and logs")
    design.add_argument("-o", "--output", type=Path, metavar="FILE", help="write the block to FILE")
    design.set_defaults(handler=_design)
