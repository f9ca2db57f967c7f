"""Rig files: what chambers exist, how they are wired, what they can physically do, and how the
simulator should behave when it stands in for them."""

from controller.rig._io import (
    InputCorrection,
    ModbusLink,
    OptodePort,
    Parity,
    RigIo,
    RtuConnection,
    TcpConnection,
    io_from_ports,
    resolve_io,
)
from controller.rig._models import Chamber, ChamberLimits, Rig, RigIncubation
from controller.rig._sim import (
    COMM_DEVICES,
    SENSORS,
    Bath,
    BiologySim,
    ChamberSim,
    Fault,
    FaultKind,
    LampSim,
    OptodeSim,
    PumpSim,
    RackSim,
    SensorSim,
    ThermalSim,
)

__all__ = [
    "COMM_DEVICES",
    "SENSORS",
    "Bath",
    "BiologySim",
    "Chamber",
    "ChamberLimits",
    "ChamberSim",
    "Fault",
    "FaultKind",
    "InputCorrection",
    "LampSim",
    "ModbusLink",
    "OptodePort",
    "OptodeSim",
    "Parity",
    "PumpSim",
    "RackSim",
    "Rig",
    "RigIncubation",
    "RigIo",
    "RtuConnection",
    "SensorSim",
    "TcpConnection",
    "ThermalSim",
    "io_from_ports",
    "resolve_io",
]
