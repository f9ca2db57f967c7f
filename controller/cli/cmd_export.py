"""``squall export LOG -o FILE.parquet|FILE.csv``: write a run log's run table.

The table has one row per chamber per logged tick with the columns fixed by the design
page's contract (``time`` in UTC, ``elapsed_s``, ``chamber``, ``phase``, measurements,
setpoints, outputs, ``incubation``, ``alarm``). The log may still be being written; the
export then holds every row committed when it started.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

from controller.storage._contract import EXPORT_COLUMNS

__all__ = ["register"]


def register(sub: Any) -> None:
    """Add the ``export`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "export",
        help="write a run log's table to Parquet or CSV",
        description=(
            "Write the run table of a run log: one row per chamber per logged tick, columns "
            + ", ".join(EXPORT_COLUMNS)
            + ". The output's extension chooses the format (.parquet or .csv); CSV times "
            "are ISO 8601 UTC."
        ),
    )
    parser.add_argument("log", metavar="LOG", type=Path, help="run log written by 'squall run'")
    parser.add_argument(
        "-o",
        "--output",
        metavar="FILE",
        type=Path,
        required=True,
        help="output file, FILE.parquet or FILE.csv (replaced if it exists)",
    )
    parser.set_defaults(handler=_handle)


def _handle(args: argparse.Namespace) -> int:
    """Run the export; print where the table went."""
    with Progress(
        TextColumn("exporting"),
        BarColumn(),
        MofNCompleteColumn(),
        transient=True,
        disable=not sys.stderr.isatty(),
    ) as bar:
        task = bar.add_task("export", total=None)

        def _progress(done: int, total: int) -> None:
            bar.update(task, completed=done, total=total)

        from controller.storage import export  # deferred: pandas and pyarrow load only here

        rows = export(args.log, args.output, progress=_progress)
    print(f"wrote {rows} rows to {args.output}")
    return 0
