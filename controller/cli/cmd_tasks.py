"""``squall tasks [--rig RIG] [--schedule FILE] [--from ISO] [--days N] [--ics FILE]``: what
people must do for the scheduled experiments, and when.

Rules
-----
- Tasks come from the live experiments of the schedule (planned, preflight, running, held),
  their protocol snapshots and the rig files as they stand now: run start and end, the
  protocols' sampling times, calibrations and cleaning before the start or due during the
  run, daily checks (see :mod:`controller.schedule._tasks`). Without ``--rig`` every rig in
  the schedule is covered.
- The window starts at ``--from`` (ISO 8601 with a zone; default now) and lasts ``--days``
  days (default 7); a task is listed when it starts inside it.
- ``--ics FILE`` also writes the tasks as an iCalendar file (RFC 5545) with times in the
  rig's zone; with several rigs in the window the calendar is written in UTC.
- The command only reads the schedule: a missing schedule file is refused (exit 2) and
  never created. Bad input (malformed ``--from``, unknown rig, bad ``--days``) is one line,
  exit 2.
"""

from __future__ import annotations

import argparse
import math
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

from controller.errors import SquallError

if TYPE_CHECKING:
    from controller.rig import Rig
    from controller.schedule._tasks import OperatorTask

__all__ = ["register"]

_DEFAULT_SCHEDULE = Path("runs") / "schedule.sqlite"


def register(sub: Any) -> None:
    """Add the ``tasks`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser (no unit).
    """
    parser = sub.add_parser(
        "tasks",
        help="list the operator tasks of the scheduled experiments (and export a calendar)",
        description=(
            "List what people must do for the live experiments of the schedule: run starts "
            "and ends, sampling times from the protocols, calibrations and cleaning due "
            "before or during a run (from the rig's calibration dates and [maintenance] "
            "limits), and daily checks at the rig's local time. --ics writes them as an "
            "iCalendar file for a calendar program."
        ),
    )
    parser.add_argument("--rig", metavar="RIG", type=Path, default=None, help="only this rig")
    parser.add_argument(
        "--schedule",
        metavar="FILE",
        type=Path,
        default=_DEFAULT_SCHEDULE,
        help=f"schedule store (default {_DEFAULT_SCHEDULE})",
    )
    parser.add_argument(
        "--from",
        dest="from_",
        metavar="ISO8601",
        default=None,
        help="start of the window, with a zone (default now)",
    )
    parser.add_argument(
        "--days", metavar="N", type=float, default=7.0, help="length of the window in days"
    )
    parser.add_argument(
        "--ics", metavar="FILE", type=Path, default=None, help="also write an iCalendar file"
    )
    parser.set_defaults(handler=_handle)


def _window(args: argparse.Namespace) -> tuple[datetime, datetime]:
    from controller.cli.cmd_check import parse_start

    try:
        start = parse_start(args.from_)
    except SquallError as exc:
        raise SquallError(exc.message, field="--from") from None
    if start is None:
        start = datetime.now(UTC).replace(second=0, microsecond=0)
    days = args.days
    if not (math.isfinite(days) and 0 < days <= 3660):
        raise SquallError(f"must be a number of days above 0 (at most 3660), got {days!r}",
                          field="--days")  # fmt: skip
    start = start.astimezone(UTC)
    return start, start + timedelta(days=days)


def _rigs(args: argparse.Namespace, rig_paths: list[Path]) -> dict[Path, Rig]:
    from controller.files import load_model
    from controller.rig import Rig

    if args.rig is not None:
        path = Path(args.rig).resolve()
        return {path: load_model(path, Rig)}
    return {path: load_model(path, Rig) for path in rig_paths}


def _collect(args: argparse.Namespace) -> tuple[list[tuple[OperatorTask, Rig]], datetime, datetime]:
    from controller.schedule import LIVE_STATES, ScheduleStore
    from controller.schedule._tasks import schedule_tasks

    start, end = _window(args)
    schedule: Path = args.schedule
    if not schedule.is_file():
        raise SquallError(
            "no schedule here; add experiments with 'squall schedule add' first", file=schedule
        )
    found: list[tuple[OperatorTask, Rig]] = []
    with ScheduleStore(schedule) as store:
        live = store.experiments(states=LIVE_STATES)
        paths = sorted({e.rig_path for e in live})
        for path, rig in _rigs(args, paths).items():
            tasks = schedule_tasks(store, rig, path, start_utc=start, end_utc=end)
            found += [(task, rig) for task in tasks]
    found.sort(key=lambda pair: (pair[0].start_utc, pair[0].kind.value, pair[0].title))
    return found, start, end


def _handle(args: argparse.Namespace) -> int:
    """Print the tasks in the window; write the calendar when asked."""
    import zoneinfo

    from rich.console import Console
    from rich.table import Table

    from controller.schedule._tasks import chamber_list

    found, start, end = _collect(args)
    console = Console(highlight=False, soft_wrap=True)
    if not console.is_terminal:
        console.width = max(console.width, 160)
    window = f"{start:%Y-%m-%d %H:%M} to {end:%Y-%m-%d %H:%M} UTC"
    if not found:
        console.print(f"No operator tasks from {window}.")
    else:
        table = Table(title=f"Operator tasks from {window}", title_justify="left", box=None)
        for column in ("start UTC", "local", "min", "kind", "exp"):
            table.add_column(column, no_wrap=True)
        for column in ("chambers", "task"):
            table.add_column(column, overflow="fold")
        for task, rig in found:
            local = task.start_utc.astimezone(zoneinfo.ZoneInfo(rig.maintenance.timezone))
            table.add_row(
                f"{task.start_utc:%Y-%m-%d %H:%M}",
                f"{local:%H:%M%z}",
                f"{task.minutes:g}",
                task.kind.value,
                task.experiment_id or "",
                chamber_list(task.chambers),
                task.title,
            )
        console.print(table)
    if args.ics is not None:
        _write_ics(args.ics, found)
        console.print(f"calendar: {args.ics} ({len(found)} events)")
    return 0


def _write_ics(path: Path, found: list[tuple[OperatorTask, Rig]]) -> None:
    from controller.schedule._ical import to_icalendar

    rigs = {rig.name: rig for _, rig in found}
    if len(rigs) == 1:
        rig = next(iter(rigs.values()))
        zone, name = rig.maintenance.timezone, f"squall tasks: {rig.name}"
    else:
        zone, name = "UTC", "squall tasks"
    data = to_icalendar([task for task, _ in found], timezone=zone, calendar_name=name)
    try:
        path.write_bytes(data)
    except OSError as exc:
        raise SquallError(f"cannot write the calendar: {exc.strerror}", file=path) from None
