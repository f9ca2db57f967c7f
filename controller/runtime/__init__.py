"""The imperative shell that runs a protocol: chamber I/O, the control loop, the run.

- :class:`ChamberIO` is what the loop talks to; :class:`SimulatedIO` serves an in-process
  simulated rack, hardware transports implement the same interface.
- :class:`ControlLoop` ticks on the clock (read → interlocks → setpoints → PID → outputs →
  log) under ``asyncio.TaskGroup`` supervision and always ends with every output safe.
- :func:`run_simulated` runs a protocol file on a simulated rig file and returns a
  :class:`RunSummary`; :class:`SimulatedRun` exposes the assembled pieces, and
  :class:`HardwareRun` the same for the rig's devices (or ``squall simulate``'s endpoints).
  Both resume an interrupted run from its log.
- Operators command a running :class:`ControlLoop` (hold, resume, skip_to, abort, ack, note,
  status); a refused command raises :class:`OperatorError`.

Names are re-exported lazily (see :mod:`controller._lazy`), so the command line can name
this package without loading the simulator or device libraries until a run starts.
"""

from typing import TYPE_CHECKING

from controller._lazy import lazy_exports

if TYPE_CHECKING:
    from controller.runtime._decide import (
        OFF,
        ChamberDecision,
        Decider,
        Decision,
        Schedule,
        Target,
    )
    from controller.runtime._hardware_io import HardwareIO
    from controller.runtime._hardware_run import HardwareRun
    from controller.runtime._inputs import (
        RunInputs,
        create_run_log,
        default_log_path,
        inputs_from_text,
        load_run_inputs,
    )
    from controller.runtime._io import ChamberIO, ChamberReadings, Quantity, stale_readings
    from controller.runtime._launch import LaunchRecord, RigLock
    from controller.runtime._logsink import LogSink, alarm_record
    from controller.runtime._loop import ControlLoop, ImmediateIO
    from controller.runtime._operator import OperatorError, RunState
    from controller.runtime._protocol_clock import ProtocolClock, StartPoint
    from controller.runtime._setpoints import Lookahead, SetpointTable
    from controller.runtime._settings import (
        ChamberSettings,
        ControlPlan,
        GainSource,
        NodeSettings,
        RunSettings,
        incubation_settings,
        node_model,
        plan_control,
    )
    from controller.runtime._sim_io import SimulatedIO
    from controller.runtime._simulated import SimulatedRun, run_simulated
    from controller.runtime._summary import RunSummary, TickStats, TickStatus
    from controller.runtime._telemetry_link import (
        TelemetryLink,
        run_tasks,
        task_infos,
        telemetry_link,
    )

_NAMES = {
    "OFF": "_decide",
    "ChamberDecision": "_decide",
    "ChamberIO": "_io",
    "ChamberReadings": "_io",
    "ChamberSettings": "_settings",
    "ControlLoop": "_loop",
    "ImmediateIO": "_loop",
    "ControlPlan": "_settings",
    "Decider": "_decide",
    "Decision": "_decide",
    "GainSource": "_settings",
    "HardwareIO": "_hardware_io",
    "HardwareRun": "_hardware_run",
    "LaunchRecord": "_launch",
    "LogSink": "_logsink",
    "Lookahead": "_setpoints",
    "NodeSettings": "_settings",
    "OperatorError": "_operator",
    "ProtocolClock": "_protocol_clock",
    "Quantity": "_io",
    "RigLock": "_launch",
    "RunInputs": "_inputs",
    "RunSettings": "_settings",
    "RunState": "_operator",
    "RunSummary": "_summary",
    "Schedule": "_decide",
    "SetpointTable": "_setpoints",
    "SimulatedIO": "_sim_io",
    "SimulatedRun": "_simulated",
    "TelemetryLink": "_telemetry_link",
    "StartPoint": "_protocol_clock",
    "Target": "_decide",
    "TickStats": "_summary",
    "TickStatus": "_summary",
    "alarm_record": "_logsink",
    "create_run_log": "_inputs",
    "default_log_path": "_inputs",
    "incubation_settings": "_settings",
    "inputs_from_text": "_inputs",
    "load_run_inputs": "_inputs",
    "node_model": "_settings",
    "plan_control": "_settings",
    "run_tasks": "_telemetry_link",
    "task_infos": "_telemetry_link",
    "telemetry_link": "_telemetry_link",
    "run_simulated": "_simulated",
    "stale_readings": "_io",
}

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)

__all__ = [
    "OFF",
    "ChamberDecision",
    "ChamberIO",
    "ChamberReadings",
    "ChamberSettings",
    "ControlLoop",
    "ControlPlan",
    "Decider",
    "Decision",
    "GainSource",
    "HardwareIO",
    "HardwareRun",
    "ImmediateIO",
    "LaunchRecord",
    "LogSink",
    "Lookahead",
    "NodeSettings",
    "OperatorError",
    "ProtocolClock",
    "Quantity",
    "RigLock",
    "RunInputs",
    "RunSettings",
    "RunState",
    "RunSummary",
    "Schedule",
    "SetpointTable",
    "SimulatedIO",
    "SimulatedRun",
    "StartPoint",
    "Target",
    "TelemetryLink",
    "TickStats",
    "TickStatus",
    "alarm_record",
    "create_run_log",
    "default_log_path",
    "incubation_settings",
    "inputs_from_text",
    "load_run_inputs",
    "node_model",
    "plan_control",
    "run_simulated",
    "run_tasks",
    "stale_readings",
    "task_infos",
    "telemetry_link",
]
