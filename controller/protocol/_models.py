"""The protocol file (TOML) as pydantic models: ``Protocol`` is the root.

Rules
-----
- Models are frozen and forbid unknown keys (:class:`controller._model.FileModel`); every
  field carries a description with its unit, so ``Protocol.model_json_schema()`` serves editors.
- Everything that can be checked without reading CSV files is checked here, with the error at
  the field to change: each chamber in one group only, phase names unique, groups named by
  phases and events exist, ``starts``/``at`` name a phase or a duration inside the experiment,
  a variable is given from the first phase on (or never) and does not start with a ramp,
  sun-driven daylight and storm shading have the site data they need.
- What needs numbers from CSV files or ramp arithmetic (do a phase's blocks fit in it?) is
  checked by the compiler, which raises :class:`controller.errors.SquallError` with the path.
- A variable missing from a phase continues the previous phase's last block: holds and ramps
  keep their final value; daily cycles, daylight, climatology and replay keep running.
"""

from __future__ import annotations

from datetime import date
from enum import StrEnum
from typing import Annotated, Any, Literal, Self

from pydantic import AwareDatetime, Field, ValidationError, model_validator

from controller._model import FileModel
from controller.protocol._blocks import (
    Block,
    Variable,
    iter_leaves,
    kind_errors,
    program_errors,
)
from controller.protocol._durations import Duration, Offset, UtcOffset, parse_duration
from controller.protocol._errors import Loc, raise_errors, tidy_validation_error
from controller.protocol._events import Event

__all__ = [
    "FORMAT",
    "Group",
    "GroupRole",
    "Incubation",
    "Phase",
    "Programs",
    "Protocol",
    "Sampling",
    "Site",
]

FORMAT = "squall-protocol/1"
"""The one format string this version reads."""

_NAME = r"^[A-Za-z0-9][A-Za-z0-9_.-]*$"
ChamberId = Annotated[
    str,
    Field(
        min_length=1,
        max_length=32,
        pattern=_NAME,
        description="Chamber identifier as in the rig file (letters, digits, '_', '.', '-').",
    ),
]
GroupName = Annotated[str, Field(min_length=1, max_length=40, pattern=_NAME)]


class GroupRole(StrEnum):
    """Role of a group in the design."""

    TREATMENT = "treatment"
    CONTROL = "control"


class Site(FileModel):
    """The place (and date) the experiment represents."""

    name: str | None = Field(None, min_length=1, description="Site name, for reports.")
    latitude_deg: float = Field(ge=-90, le=90, description="Latitude, degrees north (-90..90).")
    longitude_deg: float = Field(
        ge=-180, le=180, description="Longitude, degrees east (-180..180)."
    )
    depth_m: float | None = Field(
        None, gt=0, le=200, description="Depth of the community, m (Beer–Lambert in storms)."
    )
    salinity: float | None = Field(None, ge=0, le=45, description="Practical salinity, PSS-78.")
    reference_date: date | None = Field(
        None,
        description="Calendar date the experiment represents (climatology day of year, sun "
        "position); default the local date of the start.",
    )


class Group(FileModel):
    """A treatment or control: chambers that get the same program."""

    role: GroupRole = Field(description='"treatment" or "control".')
    chambers: list[ChamberId] = Field(min_length=1, description="Replicate chambers.")
    label: str | None = Field(None, min_length=1, description="Label for plots.")

    @model_validator(mode="after")
    def _unique(self) -> Self:
        seen: set[str] = set()
        errors: list[tuple[Loc, str]] = []
        for index, chamber in enumerate(self.chambers):
            if chamber in seen:
                errors.append((("chambers", index), f"chamber {chamber!r} is listed twice"))
            seen.add(chamber)
        raise_errors("Group", errors, self.chambers)
        return self


class Programs(FileModel):
    """Programs of the three controlled variables; a missing one continues as before."""

    temperature: list[Block] | None = Field(
        None, min_length=1, description="Water temperature program, blocks in °C."
    )
    light: list[Block] | None = Field(
        None, min_length=1, description="Light program, PAR in µmol photons m-2 s-1."
    )
    flow: list[Block] | None = Field(
        None, min_length=1, description="Flow program, cm s-1 over the community."
    )

    @model_validator(mode="before")
    @classmethod
    def _kinds(cls, data: Any) -> Any:
        if isinstance(data, dict):
            errors: list[tuple[Loc, str]] = []
            for variable in Variable:
                errors.extend(
                    ((variable.value, *loc), message)
                    for loc, message in kind_errors(variable, data.get(variable.value))
                )
            raise_errors("Programs", errors)
        return data

    @model_validator(mode="after")
    def _per_variable(self) -> Self:
        errors: list[tuple[Loc, str]] = []
        for variable in Variable:
            blocks = getattr(self, variable.value)
            if blocks is not None:
                errors.extend(
                    ((variable.value, *loc), message)
                    for loc, message in program_errors(variable, blocks)
                )
        raise_errors("Programs", errors)
        return self

    def get(self, variable: Variable) -> list[Any] | None:
        """Blocks of one variable, or ``None`` when the phase leaves it as it was."""
        return getattr(self, variable.value)


class Phase(FileModel):
    """A named stretch of the timeline with a program per variable."""

    name: str = Field(min_length=1, max_length=60, description="Phase name, unique.")
    duration: Duration = Field(description="How long the phase lasts.")
    programs: Programs | None = Field(None, description="Programs for every group.")
    groups: dict[GroupName, Programs] = Field(
        default_factory=dict, description="Per-group programs overriding `programs` variables."
    )

    def program_for(self, group: str, variable: Variable) -> tuple[list[Any] | None, Loc]:
        """The blocks a group gets for a variable in this phase, and where they are written.

        Parameters
        ----------
        group
            Group name.
        variable
            Controlled variable.

        Returns
        -------
        (blocks or None, loc)
            ``None`` when the phase does not set the variable for that group; ``loc`` is the
            path of the program relative to the phase.
        """
        override = self.groups.get(group)
        if override is not None and override.get(variable) is not None:
            return override.get(variable), ("groups", group, variable.value)
        if self.programs is not None and self.programs.get(variable) is not None:
            return self.programs.get(variable), ("programs", variable.value)
        return None, ()


class Sampling(FileModel):
    """A reminder for operators: take samples at a time (an operator task in the schedule)."""

    at: str = Field(
        min_length=1,
        description="'phase+offset' (e.g. 'exposure+2d'), a phase name, or a duration from "
        "the start (ISO 8601 'P3DT6H' or short '3d 6h').",
    )
    what: str = Field(min_length=1, description="What to sample.")
    chambers: list[ChamberId] | None = Field(
        None,
        min_length=1,
        description="Chambers to sample; default every chamber of the protocol.",
    )
    minutes: float = Field(
        15.0, gt=0, le=24 * 60, description="Time set aside for the sampling, minutes."
    )

    @model_validator(mode="after")
    def _unique(self) -> Self:
        seen: set[str] = set()
        errors: list[tuple[Loc, str]] = []
        for index, chamber in enumerate(self.chambers or ()):
            if chamber in seen:
                errors.append((("chambers", index), f"chamber {chamber!r} is listed twice"))
            seen.add(chamber)
        raise_errors("Sampling", errors, self.chambers)
        return self


class Incubation(FileModel):
    """The closed-incubation cycle: chambers sealed for O2 flux windows, flushed between.

    Every setting left out comes from the rig's ``[incubation]`` table, else from the
    built-in default (:class:`controller.control.IncubationSettings`).
    """

    enabled: bool = Field(
        True, description="Run the cycle; false switches off a rig's default cycle."
    )
    chambers: list[ChamberId] | None = Field(
        None, min_length=1, description="Chambers that cycle; default every protocol chamber."
    )
    o2_low_pct: float | None = Field(
        None, gt=0, le=300, description="Lower edge of the O2 band, % air saturation."
    )
    o2_high_pct: float | None = Field(
        None, gt=0, le=300, description="Upper edge of the O2 band, % air saturation."
    )
    min_closed: Offset | None = Field(
        None, description="Shortest window worth starting (before a light change or phase end)."
    )
    max_closed: Duration | None = Field(None, description="Longest closed window.")
    flush: Duration | None = Field(None, description="Flushing time between windows.")
    settle: Offset | None = Field(
        None, description="Wait after a light change before closing (acclimation)."
    )
    pinned_to_light: bool | None = Field(
        None,
        description="One window per light and per dark period: close after the light changes "
        "and settles, flush before the next change.",
    )
    reclose_margin_pct: float | None = Field(
        None,
        ge=0,
        le=100,
        description="Close only with O2 this far inside both band edges, % air saturation.",
    )
    light_threshold_par: float | None = Field(
        None,
        ge=0,
        le=5000,
        description="PAR setpoint above which a period is light, µmol photons m-2 s-1.",
    )

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        errors: list[tuple[Loc, str]] = []
        low, high = self.o2_low_pct, self.o2_high_pct
        if low is not None and high is not None and low >= high:
            errors.append((("o2_high_pct",), "must be above o2_low_pct"))
        short, long = self.min_closed, self.max_closed
        if short is not None and long is not None and short > long:
            errors.append((("min_closed",), "must not be longer than max_closed"))
        raise_errors("Incubation", errors)
        return self


class Protocol(FileModel):
    """A whole experiment: groups of chambers, phases of programs, events, sampling."""

    format: Literal["squall-protocol/1"] = Field(
        description='File format and version, exactly "squall-protocol/1".'
    )
    title: str = Field(min_length=1, description="Title of the experiment.")
    notes: str | None = Field(None, description="Free text.")
    begins: Literal["on-launch"] | AwareDatetime = Field(
        "on-launch",
        description='"on-launch", or an ISO 8601 datetime with zone when the run should start.',
    )
    utc_offset: UtcOffset = Field(
        "+00:00",
        description="Offset of the experiment's local clock from UTC (daily cycles, sunrise).",
    )
    site: Site | None = Field(None, description="Where the experiment is set.")
    groups: dict[GroupName, Group] = Field(
        min_length=1, description="Treatments and controls by name."
    )
    phases: list[Phase] = Field(min_length=1, description="The timeline, in order.")
    events: list[Event] = Field(default_factory=list, description="Events overlaid on groups.")
    sampling: list[Sampling] = Field(default_factory=list, description="Sampling reminders.")
    incubation: Incubation | None = Field(
        None, description="Closed-incubation cycle for O2 flux windows (optional)."
    )

    @model_validator(mode="wrap")
    @classmethod
    def _tidy(cls, data: Any, handler: Any) -> Any:
        try:
            return handler(data)
        except ValidationError as exc:
            raise tidy_validation_error(exc, data, _known_keys()) from None

    @model_validator(mode="after")
    def _cross_checks(self) -> Self:
        errors: list[tuple[Loc, str]] = []
        errors += self._check_groups()
        errors += self._check_phases()
        if not any(loc[-1] == "name" and loc[0] == "phases" for loc, _ in errors):
            errors += self._check_events()
            errors += self._check_sampling()
        errors += self._check_incubation()
        raise_errors("Protocol", errors)
        return self

    # -- derived facts ------------------------------------------------------------------

    @property
    def duration_s(self) -> float:
        """Length of the whole experiment, s."""
        return float(sum(phase.duration for phase in self.phases))

    def phase_spans(self) -> list[tuple[str, float, float]]:
        """``(name, t0_s, t1_s)`` of each phase, s from the experiment start."""
        spans: list[tuple[str, float, float]] = []
        t = 0.0
        for phase in self.phases:
            spans.append((phase.name, t, t + phase.duration))
            t += phase.duration
        return spans

    def chambers(self) -> dict[str, str]:
        """Group name of every chamber, in file order."""
        return {c: name for name, group in self.groups.items() for c in group.chambers}

    def resolve_time(self, text: str) -> float:
        """Turn ``phase``, ``phase+offset`` or a duration into seconds from the start.

        Parameters
        ----------
        text
            As written in ``starts`` or ``at``.

        Returns
        -------
        float
            Time from the experiment start, s.

        Raises
        ------
        ValueError
            When the text names no phase and is no duration.
        """
        starts = {name: t0 for name, t0, _ in self.phase_spans()}
        stripped = text.strip()
        if stripped in starts:
            return starts[stripped]
        if "+" in stripped:
            name, _, offset = stripped.rpartition("+")
            if name.strip() in starts:
                return starts[name.strip()] + parse_duration(offset)
        try:
            return parse_duration(stripped)
        except ValueError:
            pass
        raise ValueError(
            f"{text!r} is neither a phase ({', '.join(starts)}), 'phase+offset' nor a duration "
            "from the start"
        )

    # -- checks -------------------------------------------------------------------------

    def _check_groups(self) -> list[tuple[Loc, str]]:
        errors: list[tuple[Loc, str]] = []
        owner: dict[str, str] = {}
        for name, group in self.groups.items():
            for index, chamber in enumerate(group.chambers):
                if chamber in owner:
                    errors.append(
                        (
                            ("groups", name, "chambers", index),
                            f"chamber {chamber!r} is already in group {owner[chamber]!r}; "
                            "each chamber belongs to one group only",
                        )
                    )
                else:
                    owner[chamber] = name
        return errors

    def _check_phases(self) -> list[tuple[Loc, str]]:
        errors: list[tuple[Loc, str]] = []
        seen: set[str] = set()
        for index, phase in enumerate(self.phases):
            if phase.name in seen:
                errors.append(
                    (("phases", index, "name"), f"phase name {phase.name!r} is used twice")
                )
            seen.add(phase.name)
            if "+" in phase.name or _looks_like_duration(phase.name):
                errors.append(
                    (
                        ("phases", index, "name"),
                        f"phase name {phase.name!r} could be read as a time; avoid '+' and "
                        "names like '2d'",
                    )
                )
            for group in phase.groups:
                if group not in self.groups:
                    errors.append(
                        (
                            ("phases", index, "groups", group),
                            f"no group {group!r}; groups are {', '.join(self.groups)}",
                        )
                    )
        sun_needed = self.site is None
        for group in self.groups:
            for variable in Variable:
                errors += self._check_variable(group, variable, sun_needed)
        for group in self.groups:
            if all(self.phases[0].program_for(group, v)[0] is None for v in Variable):
                errors.append(
                    (
                        ("phases", 0),
                        f"the first phase gives group {group!r} no program for temperature, "
                        "light or flow",
                    )
                )
        return errors

    def _check_variable(
        self, group: str, variable: Variable, site_missing: bool
    ) -> list[tuple[Loc, str]]:
        errors: list[tuple[Loc, str]] = []
        for index, phase in enumerate(self.phases):
            blocks, loc = phase.program_for(group, variable)
            if blocks is None:
                continue
            full = ("phases", index, *loc)
            if index > 0 and self.phases[0].program_for(group, variable)[0] is None:
                errors.append(
                    (
                        full,
                        f"{variable.value} of group {group!r} starts in phase {phase.name!r} but "
                        f"is missing from the first phase {self.phases[0].name!r}; give it a "
                        "program there too so it has a starting value",
                    )
                )
            leaves = iter_leaves(blocks)
            if index == 0 and leaves and leaves[0].kind == "ramp":
                errors.append(
                    (
                        (*full, 0),
                        f"{variable.value} of group {group!r} starts with a ramp, which has no "
                        "value to start from; put a hold or step before it",
                    )
                )
            for block_index, block in enumerate(blocks):
                if site_missing and any(
                    leaf.kind == "daylight" and leaf.source == "sun"
                    for leaf in iter_leaves([block])
                ):
                    errors.append(
                        (
                            (*full, block_index, "source"),
                            'daylight with source = "sun" needs a [site] with latitude_deg and '
                            "longitude_deg",
                        )
                    )
        return errors

    def _check_events(self) -> list[tuple[Loc, str]]:
        errors: list[tuple[Loc, str]] = []
        names: dict[str, int] = {}
        for index, event in enumerate(self.events):
            for g_index, group in enumerate(event.groups):
                if group not in self.groups:
                    errors.append(
                        (
                            ("events", index, "groups", g_index),
                            f"no group {group!r}; groups are {', '.join(self.groups)}",
                        )
                    )
            try:
                start = self.resolve_time(event.starts) + event.offset
            except ValueError as exc:
                errors.append((("events", index, "starts"), str(exc)))
            else:
                if start >= self.duration_s:
                    errors.append(
                        (
                            ("events", index, "offset" if event.offset else "starts"),
                            f"the event would start {start / 86400:g} d after the start, at or "
                            f"after the end of the experiment ({self.duration_s / 86400:g} d)",
                        )
                    )
            if event.name is not None:
                if event.name in names:
                    errors.append(
                        (("events", index, "name"), f"event name {event.name!r} is used twice")
                    )
                names[event.name] = index
            if event.kind == "storm" and event.kd_rise_per_m > 0:
                if self.site is None or self.site.depth_m is None:
                    errors.append(
                        (
                            ("events", index, "kd_rise_per_m"),
                            "storm shading needs site.depth_m (depth of the community, m)",
                        )
                    )
        return errors

    def _check_sampling(self) -> list[tuple[Loc, str]]:
        errors: list[tuple[Loc, str]] = []
        for index, sample in enumerate(self.sampling):
            try:
                t = self.resolve_time(sample.at)
            except ValueError as exc:
                errors.append((("sampling", index, "at"), str(exc)))
                continue
            if t > self.duration_s:
                errors.append(
                    (
                        ("sampling", index, "at"),
                        f"{sample.at!r} is {t / 86400:g} d after the start, past the end of the "
                        f"experiment ({self.duration_s / 86400:g} d)",
                    )
                )
        known = self.chambers()
        for index, sample in enumerate(self.sampling):
            errors.extend(
                (
                    ("sampling", index, "chambers", c_index),
                    f"chamber {chamber!r} is in no group; the protocol's chambers are "
                    f"{', '.join(known)}",
                )
                for c_index, chamber in enumerate(sample.chambers or ())
                if chamber not in known
            )
        return errors

    def _check_incubation(self) -> list[tuple[Loc, str]]:
        if self.incubation is None or self.incubation.chambers is None:
            return []
        known = self.chambers()
        return [
            (
                ("incubation", "chambers", index),
                f"chamber {chamber!r} is in no group; the protocol's chambers are "
                f"{', '.join(known)}",
            )
            for index, chamber in enumerate(self.incubation.chambers)
            if chamber not in known
        ]


def _looks_like_duration(text: str) -> bool:
    try:
        parse_duration(text)
    except ValueError:
        return False
    return True


def _known_keys() -> set[str]:
    from controller.protocol import _blocks, _events

    keys: set[str] = set()
    modules = (_blocks, _events)
    classes: list[type[FileModel]] = [
        Protocol,
        Site,
        Group,
        Programs,
        Phase,
        Sampling,
        Incubation,
    ]
    for module in modules:
        classes += [
            obj
            for obj in vars(module).values()
            if isinstance(obj, type) and issubclass(obj, FileModel)
        ]
    for model in classes:
        for name, field in model.model_fields.items():
            keys.add(field.alias or name)
    return keys
