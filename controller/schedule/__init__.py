"""The experiment schedule: a store of planned and past experiments, the conflict checks that
keep two experiments from asking the rig for more than it has, and the earliest feasible
start.

- :class:`ScheduleStore` keeps experiments, their states and history in one SQLite file;
  every change is checked and written in one transaction, a refusal raises
  :class:`ScheduleConflict` and changes nothing.
- :func:`find_conflicts` and its parts are pure: rig, compiled protocols and bookings in,
  :class:`Conflict` out (chamber booked twice or rig busy, bath programs, node and shared
  plant heat demand, lamp power budget, chamber limits).
- :func:`suggest_start` proposes the earliest start at which every check passes.
- :func:`tasks_for_run` and :func:`schedule_tasks` derive the operator tasks (sampling,
  calibrations, cleaning, daily checks, run start and end) and :func:`to_icalendar` writes
  them as RFC 5545; :func:`preflight` checks sensors, calibrations and latched trips before an
  unattended start, and :func:`serve` runs a rig's schedule (``squall serve``).

Names are re-exported lazily (see :mod:`controller._lazy`), so the command line can name this
package without loading numpy or the protocol compiler until a schedule command runs.
"""

from typing import TYPE_CHECKING

from controller._lazy import lazy_exports

if TYPE_CHECKING:
    from controller.schedule._conflicts import (
        bath_conflicts,
        booking_conflicts,
        find_conflicts,
        power_conflicts,
        protocol_conflicts,
    )
    from controller.schedule._database import DEFAULT_SCHEDULE, SCHEMA_VERSION
    from controller.schedule._ical import to_icalendar
    from controller.schedule._loads import (
        LampLoad,
        NodeLoad,
        lamp_loads,
        load_grid,
        node_demand_w,
        node_loads,
        water_rho_cp_j_l_k,
    )
    from controller.schedule._models import (
        LIVE_STATES,
        TRANSITIONS,
        Booking,
        Conflict,
        ConflictKind,
        Experiment,
        ExperimentState,
        HistoryEntry,
        ResourcePeak,
        ScheduleConflict,
        booking_of,
        chamber_span,
        check_start,
        check_text_field,
        format_span,
        format_when,
        normalize_id,
    )
    from controller.schedule._preflight import (
        LatchedAlarm,
        PreflightCheck,
        PreflightFinding,
        PreflightReport,
        latched_alarms,
        preflight,
    )
    from controller.schedule._serve import ServeConfig, ServeResult, serve
    from controller.schedule._store import ScheduleStore
    from controller.schedule._suggest import (
        Suggestion,
        compile_experiment,
        loaded_from_text,
        suggest_start,
    )
    from controller.schedule._tasks import (
        CalibrationKind,
        CalibrationState,
        OperatorTask,
        TaskKind,
        calibration_states,
        experiment_protocol,
        schedule_tasks,
        tasks_for_run,
    )

_NAMES: dict[str, str] = {
    # sched-core: models, store, conflicts, loads, suggest
    "Booking": "_models",
    "Conflict": "_models",
    "ConflictKind": "_models",
    "DEFAULT_SCHEDULE": "_database",
    "Experiment": "_models",
    "ExperimentState": "_models",
    "HistoryEntry": "_models",
    "LIVE_STATES": "_models",
    "LampLoad": "_loads",
    "NodeLoad": "_loads",
    "ResourcePeak": "_models",
    "SCHEMA_VERSION": "_database",
    "ScheduleConflict": "_models",
    "ScheduleStore": "_store",
    "Suggestion": "_suggest",
    "TRANSITIONS": "_models",
    "bath_conflicts": "_conflicts",
    "booking_conflicts": "_conflicts",
    "booking_of": "_models",
    "chamber_span": "_models",
    "check_start": "_models",
    "check_text_field": "_models",
    "compile_experiment": "_suggest",
    "find_conflicts": "_conflicts",
    "format_span": "_models",
    "format_when": "_models",
    "lamp_loads": "_loads",
    "load_grid": "_loads",
    "loaded_from_text": "_suggest",
    "normalize_id": "_models",
    "node_demand_w": "_loads",
    "node_loads": "_loads",
    "power_conflicts": "_conflicts",
    "protocol_conflicts": "_conflicts",
    "suggest_start": "_suggest",
    "water_rho_cp_j_l_k": "_loads",
    # sched-serve: tasks, iCalendar, preflight, serve (added below this line)
    "CalibrationKind": "_tasks",
    "CalibrationState": "_tasks",
    "OperatorTask": "_tasks",
    "TaskKind": "_tasks",
    "calibration_states": "_tasks",
    "experiment_protocol": "_tasks",
    "schedule_tasks": "_tasks",
    "tasks_for_run": "_tasks",
    "to_icalendar": "_ical",
    "LatchedAlarm": "_preflight",
    "PreflightCheck": "_preflight",
    "PreflightFinding": "_preflight",
    "PreflightReport": "_preflight",
    "latched_alarms": "_preflight",
    "preflight": "_preflight",
    "ServeConfig": "_serve",
    "ServeResult": "_serve",
    "serve": "_serve",
}

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)

__all__ = [
    "DEFAULT_SCHEDULE",
    "LIVE_STATES",
    "SCHEMA_VERSION",
    "TRANSITIONS",
    "Booking",
    "CalibrationKind",
    "CalibrationState",
    "Conflict",
    "ConflictKind",
    "Experiment",
    "ExperimentState",
    "HistoryEntry",
    "LampLoad",
    "LatchedAlarm",
    "NodeLoad",
    "OperatorTask",
    "PreflightCheck",
    "PreflightFinding",
    "PreflightReport",
    "ResourcePeak",
    "ScheduleConflict",
    "ScheduleStore",
    "ServeConfig",
    "ServeResult",
    "Suggestion",
    "TaskKind",
    "bath_conflicts",
    "booking_conflicts",
    "booking_of",
    "calibration_states",
    "chamber_span",
    "check_start",
    "check_text_field",
    "compile_experiment",
    "experiment_protocol",
    "find_conflicts",
    "format_span",
    "format_when",
    "lamp_loads",
    "latched_alarms",
    "load_grid",
    "loaded_from_text",
    "node_demand_w",
    "node_loads",
    "normalize_id",
    "power_conflicts",
    "preflight",
    "protocol_conflicts",
    "schedule_tasks",
    "serve",
    "suggest_start",
    "tasks_for_run",
    "to_icalendar",
    "water_rho_cp_j_l_k",
]
