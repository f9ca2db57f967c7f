"""``squall check PROTOCOL [--rig RIG] [--start ISO8601]``: validate, compile, summarise.

Rules
-----
- Every problem in the protocol, the rig file or a CSV they name is a located
  :class:`~controller.errors.SquallError` (``FILE:LINE: field.path: message``), exit 2.
- The summary fits one screen: groups (role, chambers, peak temperature, daily light integral
  range, degree heating days), phases (start offset, duration), events, and with ``--rig`` the
  rig findings. Any finding of severity "error" makes the exit code 2.
- The helpers here (:func:`load_protocol`, :func:`parse_start`, :func:`resolve_start`,
  :func:`compile_loaded`) are shared by ``preview`` and ``demo``.
"""

from __future__ import annotations

import argparse
import math
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

from controller.errors import SquallError
from controller.files import (
    format_path,
    load_model,
    locate,
    parse_toml,
    read_text,
    validate_data,
)

if TYPE_CHECKING:  # heavy imports are deferred so that `squall --help` stays quick
    from rich.console import Console

    from controller.protocol import CompiledProtocol, Finding, Protocol
    from controller.rig import Rig

__all__ = [
    "LoadedProtocol",
    "compile_loaded",
    "load_protocol",
    "load_rig",
    "locate_finding",
    "parse_start",
    "print_summary",
    "register",
    "resolve_start",
    "run",
]


@dataclass(frozen=True)
class LoadedProtocol:
    """A validated protocol with the file it came from.

    Attributes
    ----------
    path
        The file, as the user named it.
    text
        Its text (to locate later problems).
    protocol
        The validated model.
    data
        The parsed TOML document (to find which key names a CSV file).
    """

    path: Path
    text: str
    protocol: Protocol
    data: Mapping[str, Any]


def load_protocol(path: Path) -> LoadedProtocol:
    """Read and validate a protocol file.

    Parameters
    ----------
    path
        Protocol file (TOML).

    Returns
    -------
    LoadedProtocol
        The validated protocol and its text.

    Raises
    ------
    SquallError
        Located at ``FILE:LINE: field.path`` for any problem.
    """
    from controller.protocol import Protocol

    text = read_text(path)
    data = parse_toml(text, file=path)
    return LoadedProtocol(path, text, validate_data(data, Protocol, text=text, file=path), data)


def load_rig(path: Path) -> Rig:
    """Read and validate a rig file (errors located in it)."""
    from controller.rig import Rig

    return load_model(path, Rig)


def parse_start(text: str | None) -> datetime | None:
    """Parse ``--start``: an ISO 8601 date-time with a zone (``2027-07-10T08:00+02:00``).

    Parameters
    ----------
    text
        As typed, or ``None``.

    Returns
    -------
    datetime or None
        Zone-aware start, or ``None`` when not given.
    """
    if text is None:
        return None
    try:
        value = datetime.fromisoformat(text.strip())
    except ValueError:
        raise SquallError(
            f"{text!r} is not an ISO 8601 date-time; write e.g. 2027-07-10T08:00:00+02:00",
            field="--start",
        ) from None
    if value.tzinfo is None:
        raise SquallError(
            f"{text!r} has no zone; add one, e.g. {value.isoformat()}+00:00 or ...Z",
            field="--start",
        )
    return value


def resolve_start(protocol: Protocol, start: datetime | None) -> tuple[datetime, str]:
    """When elapsed time 0 is, and a phrase saying where that choice came from.

    ``--start`` wins; then the protocol's ``begins`` date-time; a protocol that begins on
    launch is shown from local midnight of ``site.reference_date`` (or of today, local time,
    when it has none).

    Parameters
    ----------
    protocol
        The validated protocol.
    start
        Zone-aware start from ``--start``, or ``None``.

    Returns
    -------
    tuple of (datetime, str)
        Start in UTC, and its description.
    """
    offset: timedelta = protocol.utc_offset
    if start is not None:
        return start.astimezone(UTC), "--start"
    if isinstance(protocol.begins, datetime):
        return protocol.begins.astimezone(UTC), "begins"
    if protocol.site is not None and protocol.site.reference_date is not None:
        day: date = protocol.site.reference_date
        why = "on launch; shown from local midnight of site.reference_date"
    else:
        day = (datetime.now(UTC) + offset).date()
        why = "on launch; shown from local midnight today"
    local_midnight = datetime.combine(day, time())
    return (local_midnight - offset).replace(tzinfo=UTC), why


def compile_loaded(
    loaded: LoadedProtocol, start_utc: datetime, rig: Rig | None = None
) -> CompiledProtocol:
    """Compile a loaded protocol; problems are located in the protocol (or the CSV) file.

    Parameters
    ----------
    loaded
        The loaded protocol.
    start_utc
        Elapsed time 0, zone-aware.
    rig
        Optional rig; its findings are attached to the result.

    Returns
    -------
    CompiledProtocol
        The compiled setpoint channels.
    """
    from controller.protocol import compile_protocol

    try:
        return compile_protocol(
            loaded.protocol,
            start_utc=start_utc,
            base_dir=loaded.path.parent,
            rig=rig,
        )
    except SquallError as exc:
        if exc.file is not None and exc.line is None:
            # A CSV the protocol names cannot be read: point at the key that names it.
            naming = _key_naming(loaded.data, loaded.path.parent, Path(exc.file))
            if naming is not None:
                raise locate(
                    SquallError(exc.message, field=format_path(naming)),
                    text=loaded.text,
                    file=loaded.path,
                ) from None
        raise locate(exc, text=loaded.text, file=loaded.path) from None


def _key_naming(data: Any, base_dir: Path, file: Path) -> tuple[str | int, ...] | None:
    """Path of the first string value in ``data`` that names ``file`` relative to ``base_dir``."""
    stack: list[tuple[tuple[str | int, ...], Any]] = [((), data)]
    target = os.path.normpath(file)
    while stack:
        path, node = stack.pop(0)
        if isinstance(node, Mapping):
            stack.extend(((*path, key), value) for key, value in node.items())
        elif isinstance(node, list):
            stack.extend(((*path, index), value) for index, value in enumerate(node))
        elif isinstance(node, str) and node.strip():
            if os.path.normpath(base_dir / node.strip()) == target:
                return path
    return None


def locate_finding(finding: Finding, loaded: LoadedProtocol) -> str:
    """``FILE:LINE: field: message`` of a rig finding (``FILE: message`` without a field)."""
    if finding.field is None:
        return f"{loaded.path}: {' '.join(finding.message.split())}"
    located = locate(
        SquallError(finding.message, field=finding.field), text=loaded.text, file=loaded.path
    )
    return located.one_line()


# -- summary ------------------------------------------------------------------------------


def _span(values: Sequence[float], unit: str, digits: int = 1) -> str:
    finite = [v for v in values if not math.isnan(v)]
    if not finite:
        return "–"
    low, high = min(finite), max(finite)
    if round(low, digits) == round(high, digits):
        return f"{high:.{digits}f}{unit}"
    return f"{low:.{digits}f}–{high:.{digits}f}{unit}"


def _chambers(ids: Sequence[str]) -> str:
    """``C1–C4`` for a run of consecutive numbered ids sharing a prefix, else a list."""
    parts = [re.fullmatch(r"(.*?)(\d+)", chamber) for chamber in ids]
    if len(ids) > 2 and all(parts):
        prefixes = {m.group(1) for m in parts if m}
        numbers = [int(m.group(2)) for m in parts if m]
        if len(prefixes) == 1 and numbers == list(range(numbers[0], numbers[0] + len(ids))):
            return f"{ids[0]}–{ids[-1]}"
    return ", ".join(ids)


def _at(seconds: float) -> str:
    """Offset from the start, rounded to the minute, as ``+3d 6h`` (``0`` at the start)."""
    from controller.protocol import format_duration

    rounded = round(seconds / 60.0) * 60.0
    return f"+{format_duration(rounded)}" if rounded > 0 else "0"


def print_summary(
    console: Console,
    loaded: LoadedProtocol,
    compiled: CompiledProtocol,
    start_note: str,
    findings: Sequence[Finding] | None = None,
    rig_name: str | None = None,
) -> None:
    """Print the one-screen summary of a compiled protocol (and rig findings, if any).

    Parameters
    ----------
    console
        Where to print.
    loaded
        The protocol as loaded.
    compiled
        Its compiled form.
    start_note
        Where the start time came from.
    findings
        Rig findings, or ``None`` when no rig was given.
    rig_name
        Name of the rig checked against.
    """
    from rich.table import Table
    from rich.text import Text

    from controller.protocol import format_duration, summarize

    protocol = loaded.protocol
    offset = compiled.utc_offset
    local_start = (compiled.start_utc + offset).replace(tzinfo=None)
    sign = "-" if offset < timedelta(0) else "+"
    minutes = abs(int(offset.total_seconds())) // 60
    zone = f"UTC{sign}{minutes // 60:02d}:{minutes % 60:02d}"
    console.print(Text(protocol.title, style="bold"))
    n_events = len(compiled.events)
    console.print(
        f"{loaded.path} · {len(compiled.group_of)} chambers · {len(compiled.phases)} phases · "
        f"{n_events} event{'' if n_events == 1 else 's'} · "
        f"total {format_duration(compiled.duration_s)}",
        soft_wrap=True,
    )
    console.print(
        f"Start {local_start:%Y-%m-%d %H:%M} local ({zone}); {start_note}", soft_wrap=True
    )

    summary = summarize(compiled)
    groups = Table(title="Groups", title_justify="left", box=None, pad_edge=False)
    for column in ("group", "role", "chambers", "T min–peak °C", "DLI mol m⁻² d⁻¹", "DHD °C·d"):
        groups.add_column(column, overflow="fold")
    for group, role in compiled.roles.items():
        chambers = [c for c, g in compiled.group_of.items() if g == group]
        rows = [summary[c] for c in chambers]
        lows = [r.min_temperature_c for r in rows]
        peaks = [r.peak_temperature_c for r in rows]
        groups.add_row(
            group,
            str(role.value if hasattr(role, "value") else role),
            _chambers(chambers),
            "–" if all(math.isnan(v) for v in peaks) else f"{_span(lows, '')}–{_span(peaks, '')}",
            _span([r.dli_min for r in rows] + [r.dli_max for r in rows], ""),
            _span([r.degree_heating_days for r in rows], ""),
        )
    console.print(groups)

    phases = Table(title="Phases", title_justify="left", box=None, pad_edge=False)
    for column in ("#", "phase", "starts at", "duration"):
        phases.add_column(column)
    for number, span in enumerate(compiled.phases, start=1):
        phases.add_row(
            str(number),
            span.name,
            _at(span.t0_s),
            format_duration(span.t1_s - span.t0_s),
        )
    console.print(phases)

    if compiled.events:
        events = Table(title="Events", title_justify="left", box=None, pad_edge=False)
        for column in ("event", "kind", "groups", "from", "to"):
            events.add_column(column, overflow="fold")
        for event in compiled.events:
            events.add_row(
                event.name,
                event.kind,
                ", ".join(event.groups),
                _at(event.t0_s),
                _at(event.t1_s),
            )
        console.print(events)
    if compiled.sampling:
        console.print(f"Sampling reminders: {len(compiled.sampling)}")

    if findings is None:
        console.print("[green]OK[/green]: the protocol is valid and compiles.")
        return
    if not findings:
        console.print(f"[green]OK[/green]: no findings against rig {rig_name!r}.")
        return
    console.print(Text(f"Findings against rig {rig_name!r}:", style="bold"))
    for finding in findings:
        colour = {"error": "red", "warning": "yellow"}.get(str(finding.severity.value), "blue")
        where = f" [{finding.chamber}]" if finding.chamber else ""
        line = Text(f"  {finding.severity.value}{where}: ", style=colour)
        line.append(locate_finding(finding, loaded))
        console.print(line, soft_wrap=True)


def run(args: argparse.Namespace) -> int:
    """Run ``squall check``; return the exit code."""
    from rich.console import Console

    from controller.protocol import Severity, check_against_rig

    start = parse_start(args.start)
    loaded = load_protocol(args.protocol)
    rig = load_rig(args.rig) if args.rig is not None else None
    start_utc, note = resolve_start(loaded.protocol, start)
    compiled = compile_loaded(loaded, start_utc)
    findings: list[Finding] | None = None
    if rig is not None:
        try:
            findings = check_against_rig(compiled, rig)
        except SquallError as exc:
            raise locate(exc, text=loaded.text, file=loaded.path) from None
    console = Console(highlight=False, soft_wrap=False)
    print_summary(console, loaded, compiled, note, findings, rig.name if rig else None)
    errors = [f for f in findings or () if f.severity is Severity.ERROR]
    if errors and rig is not None:
        first = errors[0]
        more = f" (and {len(errors) - 1} more)" if len(errors) > 1 else ""
        message = f"refused by rig {rig.name!r}: {first.message}{more}"
        if first.field is None:
            raise SquallError(message, file=loaded.path)
        raise locate(SquallError(message, field=first.field), text=loaded.text, file=loaded.path)
    return 0


def _positional_path(text: str) -> Path:
    if not text.strip():
        raise argparse.ArgumentTypeError("an empty file name")
    return Path(text)


def register(sub: Any) -> None:
    """Add the ``check`` subcommand to the ``squall`` parser."""
    parser = sub.add_parser(
        "check",
        help="validate a protocol, compile it and print a summary",
        description="Validate a protocol file, compile it to setpoints and print a one-screen "
        "summary. With --rig, also check it against what each chamber can do. Exit 0 when "
        "fine, 2 on any error (printed as FILE:LINE: field.path: message).",
    )
    parser.add_argument("protocol", type=_positional_path, help="protocol file (TOML)")
    parser.add_argument("--rig", type=_positional_path, default=None, help="rig file (TOML)")
    parser.add_argument(
        "--start",
        default=None,
        metavar="ISO8601",
        help="when the run starts, with zone (default: the protocol's 'begins', or local "
        "midnight of site.reference_date)",
    )
    parser.set_defaults(handler=run)
