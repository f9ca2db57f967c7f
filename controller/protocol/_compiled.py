"""The compiled form of a protocol: immutable setpoint channels and the spans that label them.

Rule: everything here is a frozen dataclass holding plain numbers, strings and
:class:`~controller.protocol._channel.Channel` tables; times are s from the experiment start
(``start_utc``). Mappings are read-only views. Variable keys follow the run table's column
names: ``temperature_c`` (°C), ``par`` (µmol photons m-2 s-1), ``flow_cm_s`` (cm s-1).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime, timedelta
from enum import StrEnum

from controller.protocol._blocks import Variable
from controller.protocol._channel import Channel
from controller.protocol._models import GroupRole

__all__ = [
    "VARIABLE_KEYS",
    "CompiledProtocol",
    "EventSpan",
    "Finding",
    "Mark",
    "PhaseSpan",
    "SamplingMark",
    "Severity",
    "Source",
]

VARIABLE_KEYS: dict[Variable, str] = {
    Variable.TEMPERATURE: "temperature_c",
    Variable.LIGHT: "par",
    Variable.FLOW: "flow_cm_s",
}
"""Key of each variable in compiled channels, samples and the run table."""


class Severity(StrEnum):
    """How serious a finding is: an error refuses the run, a warning is worth reading."""

    ERROR = "error"
    WARNING = "warning"
    INFO = "info"


@dataclass(frozen=True)
class Finding:
    """One result of checking a compiled protocol against a rig.

    Attributes
    ----------
    severity
        Error, warning or info.
    chamber
        Chamber concerned, or ``None`` for the whole protocol.
    field
        Dotted path in the protocol file the finding points at (``phases.1.groups.warmed.
        temperature.0``), or ``None`` when no single field is to blame.
    message
        What is wrong, in words for the person running the experiment.
    """

    severity: Severity
    chamber: str | None
    field: str | None
    message: str


@dataclass(frozen=True)
class PhaseSpan:
    """A phase on the timeline: ``name`` from ``t0_s`` to ``t1_s`` (s)."""

    name: str
    t0_s: float
    t1_s: float


@dataclass(frozen=True)
class EventSpan:
    """An event on the timeline.

    Attributes
    ----------
    name
        Event name (the file's ``name`` or ``"<kind> <n>"``).
    kind
        ``heatwave``, ``cold-spell`` or ``storm``.
    groups
        Groups it applies to.
    t0_s, t1_s
        Start and end, s from the experiment start.
    field
        Its path in the file, ``events.<i>``.
    """

    name: str
    kind: str
    groups: tuple[str, ...]
    t0_s: float
    t1_s: float
    field: str


@dataclass(frozen=True)
class Mark:
    """A named sub-phase of an event for plots (``onset``, ``peak``, ``decline``; ``build``,
    ``storm``, ``clear``), from ``t0_s`` to ``t1_s`` (s)."""

    event: str
    name: str
    t0_s: float
    t1_s: float


@dataclass(frozen=True)
class SamplingMark:
    """A sampling reminder at ``t_s`` (s): ``what`` to sample; ``field`` is its path."""

    t_s: float
    what: str
    field: str


@dataclass(frozen=True)
class Source:
    """Which written block or event drives a stretch of one group's variable.

    Attributes
    ----------
    group
        Group name.
    variable
        Variable key (``temperature_c``, ``par``, ``flow_cm_s``).
    t0_s, t1_s
        Stretch, s from the experiment start.
    field
        Dotted path of the block (or event) in the protocol file.
    """

    group: str
    variable: str
    t0_s: float
    t1_s: float
    field: str


@dataclass(frozen=True)
class CompiledProtocol:
    """A protocol compiled to per-chamber setpoint channels.

    Attributes
    ----------
    title
        The protocol's title.
    start_utc
        When elapsed time 0 is, UTC (zone-aware).
    utc_offset
        Local clock minus UTC of the experiment.
    scenario_start_local
        Local date and clock time the start represents (``site.reference_date`` if given,
        with the start's local clock time), naive; sun position and climatology use it.
    duration_s
        Length of the experiment, s; channels hold their last value afterwards.
    phases, events, marks, sampling
        Spans and marks on the timeline, in time order.
    group_of
        Group of each chamber, in file order.
    roles
        Role of each group.
    channels
        ``chamber -> variable key -> Channel``; a variable no phase gives is absent.
    programs
        ``group -> variable key -> Channel`` of the phase programs before events.
    baselines
        ``group -> Channel`` of the climatological baseline (``seas``, °C) of the group's
        first heatwave or cold spell, for groups that have one.
    sources
        What drives each stretch of each group's variable (for pointing findings at fields).
    findings
        Rig findings when a rig was given to the compiler, else empty.
    """

    title: str
    start_utc: datetime
    utc_offset: timedelta
    scenario_start_local: datetime
    duration_s: float
    phases: tuple[PhaseSpan, ...]
    events: tuple[EventSpan, ...]
    marks: tuple[Mark, ...]
    sampling: tuple[SamplingMark, ...]
    group_of: Mapping[str, str]
    roles: Mapping[str, GroupRole]
    channels: Mapping[str, Mapping[str, Channel]]
    programs: Mapping[str, Mapping[str, Channel]]
    baselines: Mapping[str, Channel]
    sources: tuple[Source, ...]
    findings: tuple[Finding, ...] = ()

    @property
    def chambers(self) -> tuple[str, ...]:
        """Chamber ids in file order."""
        return tuple(self.group_of)

    def source_at(self, group: str, variable: str, t_s: float) -> str | None:
        """Path of the block or event driving ``variable`` of ``group`` at ``t_s`` (s).

        Events win over blocks (they are the later overlay); among blocks the one that starts
        last wins, so at a boundary the block that begins there is named (right-continuous,
        like the channels) and inside a repeat the inner block is named.
        ``None`` if nothing is recorded.
        """
        best: Source | None = None
        for source in self.sources:
            if source.group != group or source.variable != variable:
                continue
            if not source.t0_s <= t_s <= source.t1_s:
                continue
            if best is None:
                best = source
                continue
            event, best_event = source.field.startswith("events"), best.field.startswith("events")
            if (event, source.t0_s) > (best_event, best.t0_s):
                best = source
        return best.field if best is not None else None
