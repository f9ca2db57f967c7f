"""``squall schedule add|list|show|move|cancel|check|suggest``: plan experiments on a rig.

Rules
-----
- The store is one file, ``runs/schedule.sqlite`` unless ``--schedule FILE`` says otherwise
  (every subcommand takes it). Commands that only read (``list``, ``show``, ``check``,
  ``suggest``) never create it.
- Times are ISO 8601 with a zone (``2027-07-10T08:00+02:00`` or ``…Z``); a time without a
  zone is refused. Output shows every time in UTC and in the rig's local zone.
- Any refusal (a conflict, an unknown id, a malformed time, an unknown chamber) is one line
  ``FILE:LINE: field: message`` on stderr, exit 2, and the store is unchanged. ``check``
  also lists every conflict on stdout before that line.
- Heavy imports (the protocol compiler, numpy, rich) happen inside the handlers.
"""

from __future__ import annotations

import argparse
import math
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

from controller.errors import SquallError

if TYPE_CHECKING:
    from rich.console import Console

    from controller.rig import Rig
    from controller.schedule import Experiment, ResourcePeak, ScheduleStore

__all__ = ["register"]

_DEFAULT_SCHEDULE = Path("runs") / "schedule.sqlite"


def _path(text: str) -> Path:
    """A file name from the command line (not empty, no NUL byte)."""
    if not text.strip():
        raise argparse.ArgumentTypeError("an empty file name")
    if "\x00" in text:
        raise argparse.ArgumentTypeError("a file name with a NUL byte")
    return Path(text)


def _time(text: str | None, option: str) -> datetime | None:
    """Parse an ISO 8601 time with zone from ``option``; check the years the store accepts."""
    from controller.cli.cmd_check import parse_start
    from controller.schedule import check_start

    try:
        value = parse_start(text)
    except SquallError as exc:
        raise SquallError(exc.message, field=option) from None
    return None if value is None else check_start(value, option)


def _console() -> Console:
    from rich.console import Console

    console = Console(highlight=False, soft_wrap=True, markup=False)
    if not console.is_terminal:  # a pipe or file: tables need not fit an 80-column guess
        console.width = max(console.width, 160)
    return console


def _local_short(moment: datetime, zone: str) -> str:
    """Local clock time (with the date when it differs from the UTC date) and offset."""
    import zoneinfo

    local = moment.astimezone(zoneinfo.ZoneInfo(zone))
    if local.date() == moment.astimezone(UTC).date():
        return f"{local:%H:%M%z}"
    return f"{local:%m-%d %H:%M%z}"


def _zone_of(rig_path: Path, cache: dict[Path, str]) -> str:
    """The rig's local zone (UTC when the rig file cannot be read any more)."""
    from controller.cli.cmd_check import load_rig

    if rig_path not in cache:
        try:
            cache[rig_path] = load_rig(rig_path).maintenance.timezone
        except SquallError:
            cache[rig_path] = "UTC"
    return cache[rig_path]


def _open(args: argparse.Namespace, *, create: bool) -> ScheduleStore | None:
    """The store named by ``--schedule``; ``None`` when it does not exist and ``create`` is off."""
    from controller.schedule import ScheduleStore

    path: Path = args.schedule
    if not create and not path.exists():
        return None
    return ScheduleStore(path)


def _when(moment: datetime, zone: str) -> str:
    from controller.schedule import format_when

    return format_when(moment, zone)


def _summary(experiment: Experiment, zone: str) -> str:
    from controller.schedule import chamber_span, format_span

    return (
        f"{experiment.id} {experiment.title!r} ({experiment.owner}), chambers "
        f"{chamber_span(experiment.chambers)} of rig {experiment.rig_name!r}, "
        f"{format_span(experiment.start_utc, experiment.end_utc, zone)}, "
        f"{experiment.state.value}"
    )


def _print_peaks(
    console: Console, peaks: list[ResourcePeak] | tuple[ResourcePeak, ...], zone: str
) -> None:
    for peak in peaks:
        share = 100.0 * peak.peak_w / peak.capacity_w if peak.capacity_w > 0 else math.nan
        console.print(
            f"  {peak.name}: peak {peak.peak_w:.0f} W of {peak.capacity_w:.0f} W "
            f"({share:.0f} %) at {_when(peak.at_utc, zone)}"
        )


# -- handlers ------------------------------------------------------------------------------


def _add(args: argparse.Namespace) -> int:
    from controller.schedule import check_text_field

    start = _time(args.start, "--start")
    assert start is not None
    owner = check_text_field(args.owner, "--owner", max_len=80)
    note = check_text_field(args.note, "--note", max_len=500, allow_empty=True)
    store = _open(args, create=True)
    assert store is not None
    with store:
        experiment = store.add(
            rig_path=args.rig, protocol_path=args.protocol, start_utc=start, owner=owner, note=note
        )
    _console().print(f"Added {_summary(experiment, _zone_of(experiment.rig_path, {}))}.")
    return 0


def _list(args: argparse.Namespace) -> int:
    from rich.table import Table

    from controller.schedule import LIVE_STATES, chamber_span

    console = _console()
    store = _open(args, create=False)
    if store is None:
        console.print(f"No experiments: {args.schedule} does not exist yet.")
        return 0
    with store:
        experiments = store.experiments(rig_path=args.rig, states=None if args.all else LIVE_STATES)
    if not experiments:
        what = "experiments" if args.all else "live experiments (--all shows past ones too)"
        console.print(f"No {what} in {args.schedule}.")
        return 0
    zones: dict[Path, str] = {}
    rigs = {e.rig_name for e in experiments}
    title = f"Schedule {args.schedule}" + (f", rig {next(iter(rigs))!r}" if len(rigs) == 1 else "")
    table = Table(title=title, title_justify="left", box=None)
    for column in ("id", "state", "start UTC", "local", "end UTC"):
        table.add_column(column, no_wrap=True)
    if len(rigs) > 1:
        table.add_column("rig", overflow="fold")
    for column in ("chambers", "title", "owner"):
        table.add_column(column, overflow="fold")
    for e in experiments:
        row = [
            e.id,
            e.state.value,
            f"{e.start_utc:%Y-%m-%d %H:%M}",
            _local_short(e.start_utc, _zone_of(e.rig_path, zones)),
            f"{e.end_utc:%Y-%m-%d %H:%M}",
        ]
        row += [e.rig_name] if len(rigs) > 1 else []
        table.add_row(*row, chamber_span(e.chambers), e.title, e.owner)
    console.print(table)
    return 0


def _show(args: argparse.Namespace) -> int:
    from rich.table import Table

    from controller.schedule import chamber_span

    store = _open(args, create=False)
    if store is None:
        raise SquallError(
            f"no experiment {args.id!r}: the schedule does not exist yet", file=args.schedule
        )
    with store:
        experiment = store.get(args.id)
        history = store.history(experiment.id)
    zone = _zone_of(experiment.rig_path, {})
    console = _console()
    details = Table(title=f"{experiment.id}: {experiment.title}", title_justify="left",
                    box=None, show_header=False)  # fmt: skip
    details.add_column("what", style="bold")
    details.add_column("value", overflow="fold")
    for name, value in (
        ("state", experiment.state.value),
        ("owner", experiment.owner),
        ("rig", f"{experiment.rig_name!r} ({experiment.rig_path})"),
        ("chambers", chamber_span(experiment.chambers)),
        ("start", _when(experiment.start_utc, zone)),
        ("end", _when(experiment.end_utc, zone)),
        ("protocol", str(experiment.protocol_path)),
        ("snapshot sha256", experiment.protocol_sha256),
        ("run log", str(experiment.log_path) if experiment.log_path else "–"),
        ("note", experiment.note or "–"),
    ):
        details.add_row(name, value)
    console.print(details)
    table = Table(title="History", title_justify="left", box=None)
    for column in ("time UTC", "local", "from", "to"):
        table.add_column(column, no_wrap=True)
    for column in ("by", "reason"):
        table.add_column(column, overflow="fold")
    for entry in history:
        table.add_row(
            f"{entry.time_utc:%Y-%m-%d %H:%M:%S}",
            _local_short(entry.time_utc, zone),
            entry.from_state.value if entry.from_state else "–",
            entry.to_state.value,
            entry.by,
            entry.reason,
        )
    console.print(table)
    return 0


def _move(args: argparse.Namespace) -> int:
    start = _time(args.start, "--start")
    assert start is not None
    store = _open(args, create=False)
    if store is None:
        raise SquallError(
            f"no experiment {args.id!r}: the schedule does not exist yet", file=args.schedule
        )
    with store:
        experiment = store.move(args.id, start)
    _console().print(f"Moved {_summary(experiment, _zone_of(experiment.rig_path, {}))}.")
    return 0


def _cancel(args: argparse.Namespace) -> int:
    from controller.schedule import check_text_field

    reason = check_text_field(args.reason, "--reason", max_len=500)
    store = _open(args, create=False)
    if store is None:
        raise SquallError(
            f"no experiment {args.id!r}: the schedule does not exist yet", file=args.schedule
        )
    with store:
        experiment = store.cancel(args.id, reason=reason)
    _console().print(f"Cancelled {_summary(experiment, _zone_of(experiment.rig_path, {}))}.")
    return 0


def _prepare(args: argparse.Namespace) -> tuple[Any, Rig, list[Any]]:
    """Load the protocol and rig, and the rig's live bookings (without creating a store)."""
    from controller.cli.cmd_check import load_protocol, load_rig

    rig_path = args.rig.resolve()
    rig = load_rig(rig_path)
    loaded = load_protocol(args.protocol)
    store = _open(args, create=False)
    live: list[Any] = []
    if store is not None:
        with store:
            live = store.live_bookings(rig_path)
    return loaded, rig, live


def _check(args: argparse.Namespace) -> int:
    from controller.cli.cmd_check import compile_loaded
    from controller.files import locate
    from controller.schedule import Booking, ScheduleConflict, find_conflicts

    start = _time(args.start, "--start")
    assert start is not None
    loaded, rig, live = _prepare(args)
    compiled = compile_loaded(loaded, start)
    end = start + timedelta(seconds=compiled.duration_s)
    candidate = Booking("this experiment", None, compiled.chambers, start, end, compiled)
    conflicts, peaks = find_conflicts(candidate, live, rig)
    zone = rig.maintenance.timezone
    console = _console()
    if not conflicts:
        console.print(
            f"OK: {loaded.protocol.title!r} fits on rig {rig.name!r} "
            f"from {_when(start, zone)} to {_when(end, zone)}."
        )
        _print_peaks(console, peaks, zone)
        return 0
    console.print(
        f"{len(conflicts)} conflict(s) for {loaded.protocol.title!r} on rig {rig.name!r}:"
    )
    for conflict in conflicts:
        where = ""
        if conflict.field is not None:
            located = locate(
                SquallError("", field=conflict.field), text=loaded.text, file=loaded.path
            )
            where = f" [{conflict.field}, line {located.line}]" if located.line else ""
        console.print(f"  {conflict.kind.value}{where}: {conflict.message}")
    line = None
    if conflicts[0].field is not None:
        line = locate(
            SquallError("", field=conflicts[0].field), text=loaded.text, file=loaded.path
        ).line
    raise ScheduleConflict(conflicts, file=loaded.path, line=line)


def _suggest(args: argparse.Namespace) -> int:
    from controller.cli.cmd_check import compile_loaded
    from controller.schedule import ScheduleConflict, suggest_start

    after = _time(args.after, "--after")
    if after is None:
        now = datetime.now(UTC)
        after = (now + timedelta(minutes=1)).replace(second=0, microsecond=0)
    loaded, rig, live = _prepare(args)
    first = compile_loaded(loaded, after)
    suggestion = suggest_start(
        rig=rig,
        chambers=first.chambers,
        duration_s=first.duration_s,
        live=live,
        after_utc=after,
        compile_at=lambda start: compile_loaded(loaded, start),
    )
    zone = rig.maintenance.timezone
    if suggestion.start_utc is None:
        if not suggestion.conflicts:
            raise SquallError(
                f"no start from {_when(after, zone)} on passes the checks", file=loaded.path
            )
        lead = "fails at any start" if suggestion.regardless_of_time else "no feasible start"
        raise ScheduleConflict(suggestion.conflicts, file=loaded.path, lead=lead)
    console = _console()
    assert suggestion.end_utc is not None
    console.print(
        f"Earliest start for {loaded.protocol.title!r} on rig {rig.name!r}: "
        f"{_when(suggestion.start_utc, zone)} (ends {_when(suggestion.end_utc, zone)})."
    )
    _print_peaks(console, suggestion.peaks, zone)
    start_text = suggestion.start_utc.isoformat(timespec="minutes").replace("+00:00", "Z")
    console.print(
        f"Book it with: squall schedule add {args.protocol} --rig {args.rig} "
        f"--start {start_text} --owner NAME"
    )
    return 0


# -- parser --------------------------------------------------------------------------------


def _common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--schedule",
        type=_path,
        default=_DEFAULT_SCHEDULE,
        metavar="FILE",
        help=f"schedule store (default: {_DEFAULT_SCHEDULE})",
    )


def _protocol_and_rig(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("protocol", type=_path, help="protocol file (TOML)")
    parser.add_argument("--rig", type=_path, required=True, help="rig file (TOML)")


def register(sub: Any) -> None:
    """Add the ``schedule`` command and its subcommands to the ``squall`` parser."""
    parser = sub.add_parser(
        "schedule",
        help="plan experiments on a rig: add, list, show, move, cancel, check, suggest",
        description="Keep the schedule of experiments of a rig. Every experiment is checked "
        "before it is accepted: chambers booked twice or the rig busy (one experiment per rig "
        "at a time), chambers of one bath given different temperatures, heating or cooling "
        "beyond a chamber's, bath's or shared chiller's or heater's capacity, lamp power beyond "
        "the lamp circuit's budget, programs beyond a chamber's limits. A refusal says what "
        "collides and when, and changes nothing (exit 2). Times are ISO 8601 with a zone.",
    )
    actions = parser.add_subparsers(dest="action", metavar="ACTION", parser_class=type(parser))
    actions.required = True

    add = actions.add_parser(
        "add",
        help="check an experiment and put it in the schedule",
        description="Check a protocol against the rig and the schedule at a start time and, "
        "if nothing collides, store it as planned.",
    )
    _protocol_and_rig(add)
    add.add_argument("--start", required=True, metavar="ISO8601", help="start, with zone")
    add.add_argument("--owner", required=True, metavar="NAME", help="who is responsible")
    add.add_argument("--note", default="", metavar="TEXT", help="free text, one line")
    _common(add)
    add.set_defaults(handler=_add)

    lister = actions.add_parser("list", help="list live experiments (--all: every one)",
                                description="List the experiments of the schedule by start "
                                "time: live ones (planned, preflight, running, held), or all "
                                "with --all.")  # fmt: skip
    lister.add_argument("--rig", type=_path, default=None, help="only this rig's experiments")
    lister.add_argument("--all", action="store_true", help="include done, aborted, cancelled")
    _common(lister)
    lister.set_defaults(handler=_list)

    show = actions.add_parser("show", help="one experiment with its history",
                              description="Show one experiment and the history of its "
                              "states.")  # fmt: skip
    show.add_argument("id", help="experiment id, e.g. E0001")
    _common(show)
    show.set_defaults(handler=_show)

    move = actions.add_parser("move", help="give a planned experiment a new start",
                              description="Move a planned (or refused) experiment to a new "
                              "start, after checking everything again.")  # fmt: skip
    move.add_argument("id", help="experiment id, e.g. E0001")
    move.add_argument("--start", required=True, metavar="ISO8601", help="new start, with zone")
    _common(move)
    move.set_defaults(handler=_move)

    cancel = actions.add_parser("cancel", help="take an experiment out before it starts",
                                description="Cancel a planned experiment (a running one is "
                                "stopped through its controller instead).")  # fmt: skip
    cancel.add_argument("id", help="experiment id, e.g. E0001")
    cancel.add_argument("--reason", required=True, metavar="TEXT", help="why, one line")
    _common(cancel)
    cancel.set_defaults(handler=_cancel)

    check = actions.add_parser("check", help="dry run of add: list every conflict",
                               description="Run every check of 'add' without storing "
                               "anything; list each conflict, or the peak loads on shared "
                               "plant and the lamp circuit when there is none.")  # fmt: skip
    _protocol_and_rig(check)
    check.add_argument("--start", required=True, metavar="ISO8601", help="start, with zone")
    _common(check)
    check.set_defaults(handler=_check)

    suggest = actions.add_parser("suggest", help="earliest start at which every check passes",
                                 description="Propose the earliest start, at or after --after "
                                 "(default: now), at which the protocol passes every "
                                 "check.")  # fmt: skip
    _protocol_and_rig(suggest)
    suggest.add_argument("--after", default=None, metavar="ISO8601",
                         help="earliest acceptable start, with zone (default: now)")  # fmt: skip
    _common(suggest)
    suggest.set_defaults(handler=_suggest)
