"""The imperative shell that runs a protocol: chamber I/O, the control loop, the run.

- :class:`ChamberIO` is what the loop talks to; :class:`SimulatedIO` serves an in-process
  simulated rack, hardware transports implement the same interface.
- :class:`ControlLoop` ticks on the clock (read → interlocks → setpoints → PID → outputs →
  log) under ``asyncio.TaskGroup`` supervision and always ends with every output safe.
- :func:`run_simulated` runs a protocol file on a simulated rig file and returns a
  :class:`RunSummary`; :class:`SimulatedRun` exposes the assembled pieces.

Names are re-exported lazily (see :mod:`controller._lazy`), so the command line can name
this package without loading the simulator or device libraries until a run starts.
"""

from typing import TYPE_CHECKING

from controller._lazy import lazy_exports

if TYPE_CHECKING:
    from controller.runtime._decide import OFF, ChamberDecision, Decider, Decision, Target
    from controller.runtime._hardware_io import HardwareIO
    from controller.runtime._io import ChamberIO, ChamberReadings, Quantity, stale_readings
    from controller.runtime._logsink import LogSink, alarm_record
    from controller.runtime._loop import ControlLoop, RunSummary, TickStats, TickStatus
    from controller.runtime._setpoints import SetpointTable
    from controller.runtime._settings import (
        ChamberSettings,
        ControlPlan,
        NodeSettings,
        RunSettings,
        node_model,
        plan_control,
    )
    from controller.runtime._sim_io import SimulatedIO
    from controller.runtime._simulated import (
        RunInputs,
        SimulatedRun,
        create_run_log,
        default_log_path,
        load_run_inputs,
        run_simulated,
    )

_NAMES = {
    "OFF": "_decide",
    "ChamberDecision": "_decide",
    "ChamberIO": "_io",
    "ChamberReadings": "_io",
    "ChamberSettings": "_settings",
    "ControlLoop": "_loop",
    "ControlPlan": "_settings",
    "Decider": "_decide",
    "Decision": "_decide",
    "LogSink": "_logsink",
    "NodeSettings": "_settings",
    "Quantity": "_io",
    "RunInputs": "_simulated",
    "RunSettings": "_settings",
    "RunSummary": "_loop",
    "SetpointTable": "_setpoints",
    "SimulatedIO": "_sim_io",
    "HardwareIO": "_hardware_io",
    "SimulatedRun": "_simulated",
    "Target": "_decide",
    "TickStats": "_loop",
    "TickStatus": "_loop",
    "alarm_record": "_logsink",
    "create_run_log": "_simulated",
    "default_log_path": "_simulated",
    "load_run_inputs": "_simulated",
    "node_model": "_settings",
    "plan_control": "_settings",
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
    "HardwareIO",
    "LogSink",
    "NodeSettings",
    "Quantity",
    "RunInputs",
    "RunSettings",
    "RunSummary",
    "SetpointTable",
    "SimulatedIO",
    "SimulatedRun",
    "Target",
    "TickStats",
    "TickStatus",
    "alarm_record",
    "create_run_log",
    "default_log_path",
    "load_run_inputs",
    "node_model",
    "plan_control",
    "run_simulated",
    "stale_readings",
]
