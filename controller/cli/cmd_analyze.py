"""``squall analyze LOG [--json FILE] [--csv FILE] [--plots DIR] [--report FILE.html] ...``.

Rules
-----
- Reads a run log (also one still being written: the rows committed when it starts) and
  fits every closed incubation window, pairs light and dark windows into NCP, R and GPP,
  fits their temperature and light responses, compares treatments with controls and tables
  how well each chamber followed the protocol. Without output options it prints a summary.
- A log that cannot be read or a bad option: one located line, exit 2, nothing written.
- On a terminal a progress bar shows the rows read; otherwise the command is quiet apart
  from its summary and the files it wrote.
- Heavy libraries (pandas, scipy, matplotlib) load inside the handler, so building the
  ``squall`` parser stays quick.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from controller.errors import SquallError
from controller.protocol import parse_duration

if TYPE_CHECKING:
    from controller.analysis import Analysis, AnalysisSettings

__all__ = ["register", "settings_from_args"]


def register(sub: Any) -> None:
    """Add the ``analyze`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "analyze",
        help="fit closed windows, metabolism, temperature response and run quality",
        description=(
            "Analyse a run log: fit the O2 slope of every closed incubation window after a "
            "settling time, turn slopes into areal fluxes (NCP from light windows, R from "
            "dark ones, GPP = NCP + R), fit Boltzmann-Arrhenius temperature responses with "
            "the temperature where respiration overtakes gross production, Jassby & Platt "
            "light curves, treatment-versus-control differences, and the run-quality table "
            "(achieved versus programmed conditions)."
        ),
    )
    parser.add_argument("log", metavar="LOG", type=Path, help="run log written by 'squall run'")
    parser.add_argument(
        "--json", metavar="FILE", type=Path, default=None, help="write every table as JSON"
    )
    parser.add_argument(
        "--csv",
        metavar="FILE",
        type=Path,
        default=None,
        help="write the windows table to FILE (e.g. run.csv) and the other tables beside it "
        "(run-quality.csv, run-temperature-fits.csv, ...)",
    )
    parser.add_argument(
        "--plots", metavar="DIR", type=Path, default=None, help="write the figures as PNG"
    )
    parser.add_argument(
        "--report",
        metavar="FILE.html",
        type=Path,
        default=None,
        help="write a self-contained HTML report (figures, tables, protocol, provenance)",
    )
    parser.add_argument(
        "--settle",
        metavar="DURATION",
        default="5min",
        help="settling time skipped at the start of each window, e.g. 5min or PT3M "
        "(default 5min; common practice 2-5 min, longer than the optode's response)",
    )
    parser.add_argument(
        "--band-c",
        metavar="C",
        type=float,
        default=0.5,
        help="half-width of the temperature tolerance band, degrees C (default 0.5)",
    )
    parser.add_argument(
        "--blank",
        metavar="CHAMBER",
        default=None,
        help="chamber holding a seawater blank; its slopes are subtracted from the others'",
    )
    parser.add_argument(
        "--photoperiod-h",
        metavar="H",
        type=float,
        default=None,
        help="light hours per day for daily metabolism (default: measured from the log)",
    )
    parser.set_defaults(handler=_handle)


def settings_from_args(args: argparse.Namespace) -> AnalysisSettings:
    """Analysis settings from the command line, refusing bad values with the option's name.

    Parameters
    ----------
    args
        Parsed arguments of ``squall analyze``.

    Returns
    -------
    AnalysisSettings
        The settings to analyse with.
    """
    from controller.analysis import AnalysisSettings

    try:
        settle_s = parse_duration(args.settle)
    except ValueError as exc:
        raise SquallError(str(exc), field="--settle") from None
    if not (math.isfinite(args.band_c) and args.band_c > 0):
        raise SquallError(f"must be a number above 0, got {args.band_c!r}", field="--band-c")
    hours = args.photoperiod_h
    if hours is not None and not (math.isfinite(hours) and 0 < hours <= 24):
        raise SquallError(f"must be within (0, 24] hours, got {hours!r}", field="--photoperiod-h")
    return AnalysisSettings(
        settle_s=settle_s, band_c=args.band_c, blank=args.blank, photoperiod_h=hours
    )


def _summary(analysis: Analysis) -> list[str]:
    """A few lines for the terminal: windows, pairs, fits and crossings."""
    windows = analysis.windows
    flagged = int((~windows["usable"].astype(bool)).sum()) if not windows.empty else 0
    paired = int((analysis.pairs["dark_window"] >= 0).sum()) if not analysis.pairs.empty else 0
    lines = [
        f"{analysis.log_path}: {analysis.rows_read} sample rows, {len(windows)} closed windows "
        f"({flagged} flagged), {paired} light windows paired with a dark one"
    ]
    fits = analysis.temperature_fits
    wanted = "group" if (fits["unit_kind"] == "group").any() else "chamber"
    for fit in fits[fits["unit_kind"] == wanted].itertuples(index=False):
        if not math.isfinite(fit.ea_ev):
            continue
        label = "R  " if fit.rate == "r" else f"GPP at PAR {fit.par_level:g}"
        lines.append(
            f"  {fit.unit}: {label} Ea {fit.ea_ev:.3f} eV "
            f"[{fit.ea_ci_low_ev:.3f}, {fit.ea_ci_high_ev:.3f}], Q10 {fit.q10:.2f}"
        )
    for c in analysis.crossings[analysis.crossings["unit_kind"] == wanted].itertuples(index=False):
        where = " (extrapolated)" if c.extrapolated else ""
        lines.append(
            f"  {c.unit}: R overtakes GPP at {c.t_cross_c:.1f} °C "
            f"[{c.ci_low_c:.1f}, {c.ci_high_c:.1f}]{where}"
        )
    lines += [f"  note: {n}" for n in analysis.notes]
    return lines


def _check_outputs(args: argparse.Namespace) -> None:
    """Refuse output paths that cannot be written before any work is done."""
    for option, value in (("--json", args.json), ("--csv", args.csv), ("--report", args.report)):
        if value is None:
            continue
        if value.is_dir():
            raise SquallError("is a folder; give a file name", file=value, field=option)
        if not value.parent.is_dir():
            raise SquallError("its folder does not exist", file=value, field=option)
    if args.plots is not None and args.plots.exists() and not args.plots.is_dir():
        raise SquallError("exists and is not a folder", file=args.plots, field="--plots")


def _handle(args: argparse.Namespace) -> int:
    """Analyse the log; write the requested files and print a summary."""
    settings = settings_from_args(args)
    _check_outputs(args)
    from controller.analysis import analyze_log

    with Progress(
        TextColumn("analysing"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn("rows"),
        TimeElapsedColumn(),
        console=Console(file=sys.stderr),
        transient=True,
        disable=not sys.stderr.isatty(),
    ) as bar:
        task = bar.add_task("analyse", total=None)

        def _progress(done: int, total: int) -> None:
            bar.update(task, completed=done, total=total)

        analysis = analyze_log(args.log, settings, progress=_progress)
    for line in _summary(analysis):
        print(line)
    _write_outputs(args, analysis)
    return 0


def _write_outputs(args: argparse.Namespace, analysis: Analysis) -> None:
    from controller.analysis import analysis_images, write_csv_tables, write_json, write_report

    if args.json is not None:
        print(f"wrote {write_json(analysis, args.json)}")
    if args.csv is not None:
        written = write_csv_tables(analysis, args.csv)
        print(f"wrote {written[0]} (and {len(written) - 1} tables beside it)")
    if args.plots is None and args.report is None:
        return
    images = analysis_images(analysis)
    if args.plots is not None:
        args.plots.mkdir(parents=True, exist_ok=True)
        for name, png in images:
            (args.plots / f"{name}.png").write_bytes(png)
        print(f"wrote {len(images)} figures to {args.plots}")
    if args.report is not None:
        print(f"wrote {write_report(analysis, args.report, images)}")
