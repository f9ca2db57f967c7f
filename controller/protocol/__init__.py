"""Protocol files: models, durations, the pure compiler, evaluation and derived metrics.

Read a protocol with :class:`Protocol` (``Protocol.model_validate(toml_mapping)``), compile it
with :func:`compile_protocol`, evaluate it with :func:`setpoints_at` / :func:`sample`, and
derive DLI, degree heating days and rig findings from the compiled form.
"""

from controller.protocol._blocks import (
    VARIABLE_KINDS,
    VARIABLE_RANGES,
    Block,
    ClimatologyBlock,
    DailyCycleBlock,
    DaylightBlock,
    HoldBlock,
    RampBlock,
    RepeatBlock,
    ReplayBlock,
    StepBlock,
    Variable,
)
from controller.protocol._channel import Channel
from controller.protocol._compile import CYCLE_TOL, LIGHT_TOL_FRACTION, compile_protocol
from controller.protocol._compiled import (
    VARIABLE_KEYS,
    CompiledProtocol,
    EventSpan,
    Finding,
    Mark,
    PhaseSpan,
    SamplingMark,
    Severity,
    Source,
)
from controller.protocol._derived import (
    ChamberSummary,
    check_against_rig,
    daily_light_integral,
    degree_heating_days,
    peak_temperature,
    summarize,
)
from controller.protocol._durations import (
    ClockTime,
    Duration,
    Offset,
    UtcOffset,
    format_duration,
    parse_clock_time,
    parse_duration,
    parse_utc_offset,
)
from controller.protocol._events import Category, ColdSpellEvent, Event, HeatwaveEvent, StormEvent
from controller.protocol._models import (
    FORMAT,
    Group,
    GroupRole,
    Phase,
    Programs,
    Protocol,
    Sampling,
    Site,
)
from controller.protocol._series import load_replay_csv
from controller.protocol._timeline import (
    Setpoints,
    phase_at,
    phase_index_at,
    sample,
    setpoints_at,
)

__all__ = [
    "CYCLE_TOL",
    "FORMAT",
    "LIGHT_TOL_FRACTION",
    "VARIABLE_KEYS",
    "VARIABLE_KINDS",
    "VARIABLE_RANGES",
    "Block",
    "Category",
    "ChamberSummary",
    "Channel",
    "ClimatologyBlock",
    "ClockTime",
    "ColdSpellEvent",
    "CompiledProtocol",
    "DailyCycleBlock",
    "DaylightBlock",
    "Duration",
    "Event",
    "EventSpan",
    "Finding",
    "Group",
    "GroupRole",
    "HeatwaveEvent",
    "HoldBlock",
    "Mark",
    "Offset",
    "Phase",
    "PhaseSpan",
    "Programs",
    "Protocol",
    "RampBlock",
    "RepeatBlock",
    "ReplayBlock",
    "Sampling",
    "SamplingMark",
    "Setpoints",
    "Severity",
    "Site",
    "Source",
    "StepBlock",
    "StormEvent",
    "UtcOffset",
    "Variable",
    "check_against_rig",
    "compile_protocol",
    "daily_light_integral",
    "degree_heating_days",
    "format_duration",
    "load_replay_csv",
    "parse_clock_time",
    "parse_duration",
    "parse_utc_offset",
    "peak_temperature",
    "phase_at",
    "phase_index_at",
    "sample",
    "setpoints_at",
    "summarize",
]
