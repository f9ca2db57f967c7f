"""Simulated incubation chambers: physics, community metabolism, sensors, faults and the
protocol endpoints (Modbus TCP, serial optode) that make them look like real hardware.

``Rack`` is the whole simulated rack; time passes only through ``Rack.advance``.
"""

from controller.rig import Fault, FaultKind
from simulator._rack import Rack
from simulator._types import ChamberTruth, OptodeReading, Outputs, SensorNoReply

__all__ = [
    "ChamberTruth",
    "Fault",
    "FaultKind",
    "OptodeReading",
    "Outputs",
    "Rack",
    "SensorNoReply",
]
