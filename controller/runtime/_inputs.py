"""A run's inputs: protocol and rig validated, compiled and checked, and its run log.

Rules of this module
--------------------
- Every problem in the protocol, the rig, a CSV they name, the log path or the protocol's fit
  to the rig is a :class:`~controller.errors.SquallError` located in its file (exit 2 at the
  CLI), raised before anything is created on disk.
- The run's start: ``start_utc`` if given, else the protocol's ``begins``, else now (to the
  second).
- A log is never overwritten; the default is ``runs/<protocol stem>-<UTC launch time>.sqlite``
  in the working folder. A new log opens with its launch record (:mod:`._launch`).
- A resumed run's protocol and rig are the text its log keeps (errors name ``LOG:protocol``
  and ``LOG:rig``), compiled from the run's original start.
- The stored rig text has its inline broker passwords redacted (:mod:`._redact`); a resumed
  run takes them from the rig file it was launched with.
"""

from __future__ import annotations

import dataclasses
import logging
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from types import MappingProxyType

from controller.control import IncubationSettings
from controller.errors import SquallError
from controller.files import locate, parse_toml, read_text, validate_data
from controller.protocol import CompiledProtocol, Protocol, Severity, compile_protocol
from controller.rig import Rig
from controller.runtime._launch import (
    LaunchRecord,
    append_windows,
    interrupted_windows,
    launch_audit,
)
from controller.runtime._redact import redact_rig_text, restore_telemetry
from controller.runtime._settings import ControlPlan, incubation_settings
from controller.storage import (
    ChamberRecord,
    ClockKind,
    ResumePoint,
    RunLogReader,
    RunLogWriter,
    RunMeta,
)

__all__ = [
    "RunInputs",
    "create_run_log",
    "default_log_path",
    "inputs_from_text",
    "load_run_inputs",
    "open_resumed",
    "resumed_inputs",
]

_log = logging.getLogger(__name__)


@dataclass(frozen=True, kw_only=True)
class RunInputs:
    """A protocol and a rig, validated, compiled and checked against each other.

    Attributes
    ----------
    protocol_path, rig_path
        The files as named.
    protocol_text, rig_text
        Their text (stored in the run log).
    rig
        The validated rig.
    compiled
        The protocol compiled from the run's start (rig findings attached).
    incubation
        Closed-incubation cycle settings of the chambers that cycle.
    """

    protocol_path: Path
    rig_path: Path
    protocol_text: str
    rig_text: str
    rig: Rig
    compiled: CompiledProtocol
    incubation: Mapping[str, IncubationSettings] = field(
        default_factory=lambda: MappingProxyType({})
    )


def load_run_inputs(
    protocol_path: Path, rig_path: Path, start_utc: datetime | None = None
) -> RunInputs:
    """Read, validate, compile and check a protocol against a rig.

    Parameters
    ----------
    protocol_path
        Protocol file (TOML).
    rig_path
        Rig file (TOML).
    start_utc
        Elapsed time 0, aware; default the protocol's ``begins``, else now (whole seconds).

    Returns
    -------
    RunInputs
        Everything a run needs from the two files.

    Raises
    ------
    SquallError
        Located in the protocol or rig file: invalid files, CSVs that do not cover the
        protocol, a protocol the rig cannot run (the first error finding, with the count of
        the others), or incubation settings that contradict each other.
    """
    protocol_path, rig_path = Path(protocol_path), Path(rig_path)
    return inputs_from_text(
        protocol_text=read_text(protocol_path),
        protocol_file=protocol_path,
        protocol_dir=protocol_path.parent,
        rig_text=read_text(rig_path),
        rig_file=rig_path,
        start_utc=start_utc,
    )


def inputs_from_text(
    *,
    protocol_text: str,
    protocol_file: Path,
    protocol_dir: Path,
    rig_text: str,
    rig_file: Path,
    start_utc: datetime | None = None,
) -> RunInputs:
    """Validate, compile and check a protocol's and a rig's text (e.g. as a run log keeps it).

    Parameters
    ----------
    protocol_text, rig_text
        The files' text.
    protocol_file, rig_file
        Where the texts came from: named in errors and kept as the run's paths.
    protocol_dir
        Folder that the protocol's relative CSV paths are relative to.
    start_utc
        Elapsed time 0, aware; default the protocol's ``begins``, else now (whole seconds).

    Returns
    -------
    RunInputs
        As :func:`load_run_inputs`.
    """
    rig = validate_data(parse_toml(rig_text, file=rig_file), Rig, text=rig_text, file=rig_file)
    protocol = validate_data(
        parse_toml(protocol_text, file=protocol_file),
        Protocol,
        text=protocol_text,
        file=protocol_file,
    )
    if start_utc is None:
        if isinstance(protocol.begins, datetime):
            start_utc = protocol.begins
        else:
            start_utc = datetime.now(UTC).replace(microsecond=0)
    elif start_utc.tzinfo is None or start_utc.utcoffset() is None:
        raise SquallError("the start time needs a zone (e.g. 2027-07-10T08:00:00+00:00)")
    try:
        compiled = compile_protocol(
            protocol, start_utc=start_utc.astimezone(UTC), base_dir=protocol_dir, rig=rig
        )
    except SquallError as exc:
        raise locate(exc, text=protocol_text, file=protocol_file) from None
    errors = [f for f in compiled.findings if f.severity is Severity.ERROR]
    if errors:
        first = errors[0]
        more = f" (and {len(errors) - 1} more; see 'squall check')" if len(errors) > 1 else ""
        problem = SquallError(
            f"the rig {rig.name!r} cannot run this protocol: {first.message}{more}",
            field=first.field,
        )
        if first.field is None:
            raise SquallError(problem.message, file=protocol_file)
        raise locate(problem, text=protocol_text, file=protocol_file)
    try:
        incubation = incubation_settings(protocol, rig, compiled.chambers)
    except SquallError as exc:
        if protocol.incubation is not None:
            raise locate(exc, text=protocol_text, file=protocol_file) from None
        raise locate(exc, text=rig_text, file=rig_file) from None
    return RunInputs(
        protocol_path=protocol_file,
        rig_path=rig_file,
        protocol_text=protocol_text,
        rig_text=rig_text,
        rig=rig,
        compiled=compiled,
        incubation=MappingProxyType(incubation),
    )


def default_log_path(protocol_path: Path, launched_utc: datetime | None = None) -> Path:
    """``runs/<protocol stem>-<UTC launch time>.sqlite`` in the working folder.

    Parameters
    ----------
    protocol_path
        The protocol file.
    launched_utc
        Launch time, aware; default now.

    Returns
    -------
    Path
        The default log path (relative).
    """
    when = launched_utc or datetime.now(UTC)
    stamp = when.astimezone(UTC).strftime("%Y%m%dT%H%M%SZ")
    return Path("runs") / f"{Path(protocol_path).stem}-{stamp}.sqlite"


def create_run_log(
    inputs: RunInputs,
    plan: ControlPlan,
    log_path: Path,
    *,
    clock_kind: ClockKind,
    commit_interval_s: float,
) -> RunLogWriter:
    """Create the run log of a run (simulated or on hardware), its folder if needed.

    Parameters
    ----------
    inputs
        Protocol and rig (their text is stored in the log).
    plan
        The control plan; its chambers are the run's.
    log_path
        The log file; an existing file is never overwritten.
    clock_kind
        Real or virtual clock.
    commit_interval_s
        Commit interval in clock time, s.

    Returns
    -------
    RunLogWriter
        The open writer (the control loop finishes it).
    """
    path = Path(log_path)
    if path.exists():
        raise SquallError("a file already exists there; refusing to overwrite it", file=path)
    meta = RunMeta(
        run_id=path.stem,
        protocol_text=inputs.protocol_text,
        rig_text=redact_rig_text(inputs.rig_text),  # inline broker passwords stay out
        start_utc_s=inputs.compiled.start_utc.timestamp(),
        clock_kind=clock_kind,
        chambers=tuple(
            ChamberRecord(
                chamber=c.id,
                water_volume_l=c.water_volume_l,
                sediment_area_m2=c.sediment_area_m2,
                bath=c.bath,
            )
            for c in inputs.rig.chambers
            if c.id in plan.chambers
        ),
    )
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise SquallError(f"cannot create the log folder: {exc.strerror}", file=path) from exc
    writer = RunLogWriter(path, meta=meta, commit_interval_s=commit_interval_s)
    launch = LaunchRecord(
        protocol_path=Path(inputs.protocol_path).resolve(),
        rig_path=Path(inputs.rig_path).resolve(),
        period_s=plan.settings.period_s,
        simulated=clock_kind is ClockKind.VIRTUAL,
    )
    try:
        writer.record_audit(launch_audit(launch, meta.start_utc_s))
    except BaseException:
        writer.close()
        raise
    return writer


def resumed_inputs(log_path: Path, meta: RunMeta, launch: LaunchRecord) -> RunInputs:
    """The protocol and rig of an interrupted run, from the text its log keeps.

    Parameters
    ----------
    log_path
        The run log (named in errors: ``LOG:protocol`` and ``LOG:rig``).
    meta
        The log's metadata (protocol and rig text, start).
    launch
        The launch record (folder of the protocol's relative CSV paths).

    Returns
    -------
    RunInputs
        Compiled from the run's original start.
    """
    inputs = inputs_from_text(
        protocol_text=meta.protocol_text,
        protocol_file=Path(f"{log_path}:protocol"),
        protocol_dir=launch.protocol_path.parent,
        rig_text=meta.rig_text,
        rig_file=Path(f"{log_path}:rig"),
        start_utc=meta.start_time,
    )
    # the log keeps no inline broker password: it comes back from the launched rig file
    rig, off = restore_telemetry(inputs.rig, launch.rig_path)
    if off is not None:
        _log.warning("%s: %s", log_path, off)
    return inputs if rig is inputs.rig else dataclasses.replace(inputs, rig=rig)


def open_resumed(
    log_path: Path, inputs: RunInputs, plan: ControlPlan, commit_interval_s: float
) -> tuple[RunLogWriter, ResumePoint]:
    """Open an interrupted log for writing and record the windows the interruption cut.

    Parameters
    ----------
    log_path
        The run log.
    inputs
        The run's protocol and rig (from the log).
    plan
        The control plan (its incubation cycles).
    commit_interval_s
        Commit interval in clock time, s.

    Returns
    -------
    tuple
        The open writer and where the run stopped.
    """
    writer = RunLogWriter.resume(log_path, commit_interval_s=commit_interval_s)
    try:
        point = writer.resume_point
        assert point is not None
        with RunLogReader(log_path) as reader:
            windows = interrupted_windows(reader, point, plan.incubation)
        append_windows(writer, windows)
    except BaseException:
        writer.close()
        raise
    return writer, point
