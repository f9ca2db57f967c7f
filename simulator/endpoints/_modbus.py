"""Modbus TCP server for a simulated rack, on pymodbus 3.16's ``SimDevice`` datastore.

Rules of this module
--------------------
- One ``SimDevice`` per unit id of the register map, with the four tables kept apart (coils
  and discrete inputs addressed by bit). Each chamber block defines its 16 offsets in every
  table (reserved ones read 0), so a request may span neighbouring blocks, and one that
  reaches a gap between blocks gets exception 02 from pymodbus before we are asked.
- Every request goes through :meth:`ModbusEndpoint._action`: it finds the blocks the request
  touches, stays **silent** (the client times out) when any of their modules is unreachable
  (``rack.comm_ok(chamber, "modbus")`` is False), refreshes those modules, and then either
  hands a write to the modules (checked by every one before any applies it, so a request that
  spans several is taken by all or by none) or fills the datastore's registers from them
  before pymodbus answers a read.
- Silence for an unreachable module uses pymodbus' own path for missing devices
  (``NoSuchIdException`` with ``ignore_missing_devices``). Requests for unit ids that no block
  uses are dropped on arrival by the server's ``trace_pdu`` hook (pymodbus 3.16 handles no
  request whose traced PDU is falsy), as a TCP gateway with nothing behind that id stays
  silent. Both are pinned by tests.
"""

from __future__ import annotations

import functools
import logging
from collections.abc import Callable, Sequence

from pymodbus.constants import ExcCodes
from pymodbus.exceptions import NoSuchIdException
from pymodbus.pdu import ModbusPDU
from pymodbus.server import ModbusTcpServer
from pymodbus.simulator import DataType, SimData, SimDevice

from controller.drivers import (
    BLOCK_SPAN,
    ChamberBlock,
    RegisterMap,
    Table,
)
from simulator import Rack
from simulator.endpoints._module import IoModule

__all__ = ["ModbusEndpoint"]

log = logging.getLogger(__name__)

_TABLE_ORDER = (Table.COIL, Table.DISCRETE_INPUT, Table.HOLDING_REGISTER, Table.INPUT_REGISTER)


def _pack(bits: Sequence[bool]) -> int:
    """Pack 16 bits into a word, offset 0 in the least significant bit."""
    return sum(1 << i for i, bit in enumerate(bits) if bit)


def _table_data(blocks: Sequence[ChamberBlock], table: Table) -> list[SimData]:
    """The SimData entries that define one table's valid addresses for a unit: every offset
    of every block (reserved ones read 0), nothing between blocks."""
    if table.is_bit:
        return [
            SimData(b.base, values=[False] * BLOCK_SPAN, datatype=DataType.BITS) for b in blocks
        ]
    return [
        SimData(b.base, count=BLOCK_SPAN, values=0, datatype=DataType.REGISTERS) for b in blocks
    ]


class ModbusEndpoint:
    """Serves the I/O modules of a rack over Modbus TCP.

    Parameters
    ----------
    rack
        The simulated rack.
    register_map
        Where each chamber's block lives; None = the default map for the rack's chambers.
    sync
        Called before every request to bring the rack up to the present (the runner passes
        one that advances the rack on its clock); None when the caller steps the rack.
    """

    def __init__(
        self,
        rack: Rack,
        register_map: RegisterMap | None = None,
        *,
        sync: Callable[[], None] | None = None,
    ) -> None:
        self.rack = rack
        self.register_map = register_map or RegisterMap.build(rack.chamber_ids)
        missing = set(self.register_map.chamber_ids) - set(rack.chamber_ids)
        if missing:
            raise ValueError(f"register map names chambers the rack lacks: {sorted(missing)}")
        self.modules: dict[str, IoModule] = {
            cid: IoModule(rack, cid, self.register_map.word_order)
            for cid in self.register_map.chamber_ids
        }
        self._sync = sync
        self._units = frozenset(self.register_map.unit_ids)
        self._server: ModbusTcpServer | None = None
        self._address: tuple[str, int] | None = None
        self.silenced = 0
        """Requests left unanswered because a module was unreachable, count."""

    # --------------------------------------------------------------- lifecycle

    def _devices(self) -> list[SimDevice]:
        devices = []
        for unit in self.register_map.unit_ids:
            blocks = self.register_map.blocks_on(unit)
            simdata = tuple(_table_data(blocks, t) for t in _TABLE_ORDER)
            devices.append(
                SimDevice(unit, simdata=simdata, action=functools.partial(self._action, unit))
            )
        return devices

    async def start(self, host: str = "127.0.0.1", port: int = 0) -> tuple[str, int]:
        """Listen for Modbus TCP clients.

        Parameters
        ----------
        host
            Interface to bind (no unit); the CLI only allows loopback unless told otherwise.
        port
            TCP port, 0 = any free port (no unit).

        Returns
        -------
        tuple of (str, int)
            The bound host and port (no unit).

        Raises
        ------
        OSError
            The address cannot be bound (port in use, no such interface).
        """
        if self._server is not None:
            raise RuntimeError("the Modbus endpoint is already serving")
        server = ModbusTcpServer(
            self._devices(),
            address=(host, port),
            ignore_missing_devices=True,
            trace_pdu=self._screen,
        )
        try:
            await server.serve_forever(background=True)
        except RuntimeError as exc:  # pymodbus reports a failed bind this way
            await server.shutdown()
            raise OSError(f"cannot listen on {host}:{port} ({exc})") from None
        self._server = server
        sockname = server.transport.sockets[0].getsockname()  # type: ignore[union-attr]
        self._address = (str(sockname[0]), int(sockname[1]))
        log.info("Modbus TCP endpoint on %s:%d", *self._address)
        return self._address

    async def stop(self) -> None:
        """Stop listening and close every client connection."""
        if self._server is not None:
            server, self._server = self._server, None
            await server.shutdown()

    @property
    def address(self) -> tuple[str, int]:
        """The bound host and port (no unit); raises if not serving."""
        if self._address is None:
            raise RuntimeError("the Modbus endpoint is not serving")
        return self._address

    def tick(self) -> None:
        """Refresh every module (watchdog expiry, power cycling) at ``rack.t_s``."""
        for module in self.modules.values():
            module.refresh()

    def module(self, chamber_id: str) -> IoModule:
        """The I/O module of a chamber (for E-stop presses and tests).

        Parameters
        ----------
        chamber_id
            Chamber id (no unit).

        Returns
        -------
        IoModule
            Its simulated module (no unit).
        """
        return self.modules[chamber_id]

    # ----------------------------------------------------------------- requests

    def _screen(self, sending: bool, pdu: ModbusPDU) -> ModbusPDU:
        """Drop requests for unit ids no module answers to (pymodbus then sends nothing)."""
        if not sending and pdu.dev_id not in self._units:
            self.silenced += 1
            return None  # type: ignore[return-value]  # falsy PDU: the request is not handled
        return pdu

    def _touched(
        self, unit: int, table: Table, address: int, count: int, n_values: int | None
    ) -> tuple[ChamberBlock, ...]:
        if table.is_bit:
            # pymodbus passes the number of 16-bit words for bit tables; blocks are 16-aligned
            # so the words touched name the blocks exactly.
            first_word = address // 16
            return tuple(
                b
                for b in self.register_map.blocks_on(unit)
                if first_word <= b.base // 16 < first_word + count
            )
        n = n_values if n_values is not None else count
        return self.register_map.blocks_touched(unit, address, n)

    async def _action(
        self,
        unit: int,
        function_code: int,
        start_address: int,
        address: int,
        count: int,
        registers: list[int],
        set_values: list[int] | list[bool] | None,
    ) -> ExcCodes | None:
        table = Table.for_function_code(function_code)
        writing = set_values is not None
        blocks = self._touched(unit, table, address, count, len(set_values) if writing else None)
        if self._sync is not None:
            self._sync()
        modules = [self.modules[b.chamber_id] for b in blocks]
        if any(not m.reachable() for m in modules):
            self.silenced += 1
            raise NoSuchIdException("module unreachable (simulated comm fault)")
        for m in modules:
            m.refresh()
        if writing:
            return self._write(table, blocks, address, [int(v) for v in set_values or []])
        self._fill(table, blocks, start_address, address, count, registers)
        return None

    def _write(
        self, table: Table, blocks: Sequence[ChamberBlock], address: int, values: Sequence[int]
    ) -> ExcCodes | None:
        """Hand a write to every module it reaches; all check it before any applies it."""
        parts: list[tuple[IoModule, int, list[int]]] = []
        for block in blocks:
            first = max(address, block.base)
            last = min(address + len(values), block.base + BLOCK_SPAN)
            part = [int(v) for v in values[first - address : last - address]]
            parts.append((self.modules[block.chamber_id], first - block.base, part))
        if sum(len(part) for _, _, part in parts) != len(values):
            return ExcCodes.ILLEGAL_ADDRESS  # part of the request lies outside every block
        holding = table is Table.HOLDING_REGISTER
        for module, offset, part in parts:
            if holding:
                refusal = module.check_holding(offset, part)
            else:
                refusal = module.check_coils(offset, [bool(v) for v in part])
            if refusal is not None:
                return ExcCodes(int(refusal))
        for module, offset, part in parts:
            if holding:
                module.write_holding(offset, part)
            else:
                module.write_coils(offset, [bool(v) for v in part])
        return None

    def _fill(
        self,
        table: Table,
        blocks: Sequence[ChamberBlock],
        start_address: int,
        address: int,
        count: int,
        registers: list[int],
    ) -> None:
        sweep = None
        if table is Table.INPUT_REGISTER:  # every module of the request sampled in one sweep
            ids = [b.chamber_id for b in blocks]
            sweep = self.rack.sweep(ids, [False] * len(ids))
        for i, block in enumerate(blocks):
            module = self.modules[block.chamber_id]
            if table.is_bit:
                bits = module.coil_bits() if table is Table.COIL else module.input_bits()
                registers[block.base // 16 - start_address] = _pack(bits)
                continue
            words = module.encode_sweep(sweep, i) if sweep is not None else module.holding_words()
            words = (*words, *(0,) * (BLOCK_SPAN - len(words)))  # reserved offsets read 0
            first = max(address, block.base)
            last = min(address + count, block.base + BLOCK_SPAN)
            for addr in range(first, last):
                registers[addr - start_address] = words[addr - block.base]
