"""The simulator's protocol endpoints: a rack seen as hardware.

A Modbus TCP server presents each chamber's I/O module in the register map of
``hardware-notes/register-map.md``, and one emulated optode per chamber answers the line
protocol of ``hardware-notes/optode-line-protocol.md`` on a pseudo-terminal. Both encode
through the pure codecs in :mod:`controller.drivers`, so the controller's drivers cannot tell
them from devices.
"""

from simulator.endpoints._modbus import ModbusEndpoint
from simulator.endpoints._module import IoModule, Refusal
from simulator.endpoints._optode import FIRMWARE, OptodeEmulator, measurement_from_reading
from simulator.endpoints._runner import SYNC_QUANTUM_S, Announcement, RackServer, module_layout

__all__ = [
    "FIRMWARE",
    "SYNC_QUANTUM_S",
    "Announcement",
    "IoModule",
    "ModbusEndpoint",
    "OptodeEmulator",
    "RackServer",
    "Refusal",
    "measurement_from_reading",
    "module_layout",
]
