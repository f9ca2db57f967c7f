"""Simulated incubation chambers: physics, community metabolism, sensors, faults and the
protocol endpoints (Modbus TCP, serial optode) that make them look like real hardware.

``Rack`` is the whole simulated rack; time passes only through ``Rack.advance`` (or
``Rack.run_open_loop``, which runs a whole ``OpenLoopSchedule`` of drives at once).
"""

from controller.rig import Fault, FaultKind
from simulator._openloop import OpenLoopRun, OpenLoopSchedule
from simulator._rack import Rack
from simulator._types import ChamberTruth, OptodeReading, Outputs, SensorNoReply

__all__ = [
    "ChamberTruth",
    "Fault",
    "FaultKind",
    "OpenLoopRun",
    "OpenLoopSchedule",
    "OptodeReading",
    "Outputs",
    "Rack",
    "SensorNoReply",
]
