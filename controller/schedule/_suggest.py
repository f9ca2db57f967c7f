"""The earliest start at which an experiment passes every schedule check.

Rules
-----
- Candidates (v1, one experiment per rig at a time): the requested earliest start itself,
  then the end of every live experiment of the rig that ends later, in time order. Any
  feasible start that is not a candidate lies inside a gap that begins at a candidate, so the
  first candidate that passes every check is the earliest feasible start when the checks
  other than booking do not change with the start time.
- Those other checks (limits, bath programs, heat and lamp power) are judged on the protocol
  compiled for each candidate start, since a protocol without a fixed reference date takes
  its climatology and daylight from the start date.
- A conflict that no start can avoid (an unknown chamber, a program beyond a chamber's
  limits, chambers of one bath given different programs in the protocol itself) ends the
  search at once: the answer says so instead of proposing a time.
- Pure apart from ``compile_at`` (which may read CSV files the protocol names): no clock, no
  store; the caller passes the live bookings.
- :func:`loaded_from_text` and :func:`compile_experiment` turn a stored experiment's protocol
  snapshot back into a compiled protocol (for a move, or for checks that need it); problems
  are located in the file the snapshot was taken from.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING

from controller.schedule._conflicts import find_conflicts
from controller.schedule._models import Booking, Conflict, ConflictKind, Experiment, ResourcePeak

if TYPE_CHECKING:
    from controller.cli.cmd_check import LoadedProtocol
    from controller.protocol import CompiledProtocol
    from controller.rig import Rig

__all__ = ["Suggestion", "compile_experiment", "loaded_from_text", "suggest_start"]

_BOOKING_KINDS = frozenset({ConflictKind.CHAMBER_BOOKED, ConflictKind.RIG_BUSY})


@dataclass(frozen=True)
class Suggestion:
    """What :func:`suggest_start` found.

    Attributes
    ----------
    start_utc
        Earliest feasible start, aware UTC, or ``None`` when there is none.
    end_utc
        End of the experiment from that start, aware UTC, or ``None``.
    conflicts
        When there is no feasible start: the conflicts at the last start tried (no unit).
    regardless_of_time
        Whether those conflicts hold at any start (the protocol itself is at fault) (no unit).
    peaks
        Peak loads on shared resources from the proposed start (no unit).
    tried
        How many candidate starts were judged (no unit).
    """

    start_utc: datetime | None
    end_utc: datetime | None
    conflicts: tuple[Conflict, ...]
    regardless_of_time: bool
    peaks: tuple[ResourcePeak, ...]
    tried: int


def suggest_start(
    *,
    rig: Rig,
    chambers: Sequence[str],
    duration_s: float,
    live: Sequence[Booking],
    after_utc: datetime,
    compile_at: Callable[[datetime], CompiledProtocol],
    label: str = "this experiment",
    latest_utc: datetime | None = None,
) -> Suggestion:
    """Earliest start at or after ``after_utc`` at which every check passes.

    Parameters
    ----------
    rig
        The rig (no unit).
    chambers
        Chamber ids the protocol uses (no unit).
    duration_s
        The protocol's length, s.
    live
        Live experiments of the rig (not compiled: in v1 none may overlap anyway) (no unit).
    after_utc
        Earliest acceptable start, aware.
    compile_at
        Compiles the protocol for a start (aware UTC) → its compiled form.
    label
        How messages name the experiment (no unit).
    latest_utc
        Starts at or after this instant are not proposed; ``None`` = no bound (no unit).

    Returns
    -------
    Suggestion
        The start, or the reason there is none (no unit).
    """
    after = after_utc.astimezone(UTC)
    length = timedelta(seconds=duration_s)
    ends = sorted({b.end_utc for b in live if b.end_utc > after})
    candidates = [after, *ends]
    conflicts: list[Conflict] = []
    tried = 0
    for start in candidates:
        if latest_utc is not None and start >= latest_utc:
            break
        probe = Booking(label, None, tuple(chambers), start, start + length)
        if any(probe.overlaps(other) for other in live):
            continue
        tried += 1
        compiled = compile_at(start)
        booking = Booking(label, None, compiled.chambers, start, start + length, compiled)
        conflicts, peaks = find_conflicts(booking, live, rig)
        if not conflicts:
            return Suggestion(start, start + length, (), False, tuple(peaks), tried)
        own = [c for c in conflicts if c.kind not in _BOOKING_KINDS]
        if own and all(c.time_independent for c in own):
            return Suggestion(None, None, tuple(own), True, (), tried)
    return Suggestion(None, None, tuple(conflicts), False, (), tried)


def loaded_from_text(path: Path, text: str) -> LoadedProtocol:
    """Validate a protocol snapshot as if read from ``path`` (problems located there).

    Parameters
    ----------
    path
        The file the snapshot was taken from (CSV files it names are relative to it) (no unit).
    text
        The snapshot (no unit).

    Returns
    -------
    LoadedProtocol
        The validated protocol (no unit).
    """
    from controller.cli.cmd_check import LoadedProtocol
    from controller.files import parse_toml, validate_data
    from controller.protocol import Protocol

    data = parse_toml(text, file=path)
    return LoadedProtocol(path, text, validate_data(data, Protocol, text=text, file=path), data)


def compile_experiment(
    experiment: Experiment, start_utc: datetime | None = None
) -> CompiledProtocol:
    """Compile an experiment's protocol snapshot (elapsed 0 = its start, or ``start_utc``).

    Parameters
    ----------
    experiment
        A stored experiment (no unit).
    start_utc
        Another start to compile for (aware), e.g. for a move; default its own.

    Returns
    -------
    CompiledProtocol
        The compiled setpoint channels (no unit).
    """
    from controller.cli.cmd_check import compile_loaded

    loaded = loaded_from_text(experiment.protocol_path, experiment.protocol_text)
    return compile_loaded(loaded, start_utc or experiment.start_utc)
