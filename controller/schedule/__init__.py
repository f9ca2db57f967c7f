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
    from controller.schedule._store import ScheduleStore
    from controller.schedule._suggest import (
        Suggestion,
        compile_experiment,
        loaded_from_text,
        suggest_start,
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
}

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)

__all__ = [
    "DEFAULT_SCHEDULE",
    "LIVE_STATES",
    "SCHEMA_VERSION",
    "TRANSITIONS",
    "Booking",
    "Conflict",
    "ConflictKind",
    "Experiment",
    "ExperimentState",
    "HistoryEntry",
    "LampLoad",
    "NodeLoad",
    "ResourcePeak",
    "ScheduleConflict",
    "ScheduleStore",
    "Suggestion",
    "bath_conflicts",
    "booking_conflicts",
    "booking_of",
    "chamber_span",
    "check_start",
    "check_text_field",
    "compile_experiment",
    "find_conflicts",
    "format_span",
    "format_when",
    "lamp_loads",
    "load_grid",
    "loaded_from_text",
    "node_demand_w",
    "node_loads",
    "normalize_id",
    "power_conflicts",
    "protocol_conflicts",
    "suggest_start",
    "water_rho_cp_j_l_k",
]
