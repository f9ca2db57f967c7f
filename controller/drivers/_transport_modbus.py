"""Thin async Modbus transport (TCP or RTU) on pymodbus 3.16: it only moves words and bits.

Rules of this module
--------------------
- Four data calls, the ones a chamber block needs (``hardware-notes/register-map.md``):
  read input registers, read discrete inputs, write holding registers, write coils; plus
  reads of holding registers and coils for checks. Words and bits go in and out as plain
  tuples; meaning (scaling, word order, which point sits where) belongs to the pure codec.
- Every attempt runs under ``asyncio.timeout``; a call makes at most
  ``policy.attempts`` attempts with exponential back-off between them
  (:class:`~controller.drivers._transport_common.RetryPolicy`). A device that answers with a
  Modbus exception response is not retried: the answer is final and raises
  :class:`~controller.drivers._transport_common.DeviceRefused` with its code.
- The transport owns its connection. pymodbus' own retries and reconnect task are switched
  off (``retries=0``, ``reconnect_delay=0``) so that exactly one policy applies: when the
  connection is lost (peer closed it, reset, serial port gone) the next attempt opens a new
  one. A device that merely stays silent does not cost a reconnect; the other blocks behind
  the same link keep their connection.
- One request is on the wire at a time (a Modbus link answers in order; an RTU line can
  carry only one). Concurrent calls from many chambers queue on the link's lock, and an
  attempt's timeout starts once its request is sent, so it measures the device, not the
  queue; the queue is bounded by the timeouts of the requests ahead, and callers bound
  their total wait with their own ``asyncio.timeout``.
- The pymodbus client is created inside the running event loop (it makes futures when
  built), so a transport may be constructed anywhere.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Awaitable, Callable, Sequence
from typing import Any, Literal, Self

from pymodbus.client import AsyncModbusSerialClient, AsyncModbusTcpClient
from pymodbus.exceptions import ConnectionException, ModbusException
from pymodbus.pdu import ExceptionResponse, ModbusPDU

from controller.drivers._transport_common import (
    BadReply,
    DeviceRefused,
    LinkUnavailable,
    NoReply,
    RetryPolicy,
)

__all__ = ["ModbusTransport"]

_log = logging.getLogger(__name__)

_PARITY = {"none": "N", "even": "E", "odd": "O"}
_MAX_READ_REGISTERS = 125  # Modbus application protocol v1.1b3, 6.3/6.4
_MAX_READ_BITS = 2000  # 6.1/6.2
_MAX_WRITE_REGISTERS = 123  # 6.12
_MAX_WRITE_BITS = 1968  # 6.11
#: Per read function code: pymodbus client method, what is read, most items per request.
_READS = {
    0x01: ("read_coils", "coils", _MAX_READ_BITS),
    0x02: ("read_discrete_inputs", "discrete inputs", _MAX_READ_BITS),
    0x03: ("read_holding_registers", "holding registers", _MAX_READ_REGISTERS),
    0x04: ("read_input_registers", "input registers", _MAX_READ_REGISTERS),
}

Client = AsyncModbusTcpClient | AsyncModbusSerialClient


def _check_span(address: int, count: int, limit: int, what: str) -> None:
    if not 0 <= address <= 0xFFFF:
        raise ValueError(f"{what}: address {address} outside 0..65535")
    if not 1 <= count <= limit:
        raise ValueError(f"{what}: count {count} outside 1..{limit}")
    if address + count - 1 > 0xFFFF:
        raise ValueError(f"{what}: addresses {address}..{address + count - 1} pass 65535")


def _check_unit(unit_id: int) -> None:
    if not 0 <= unit_id <= 247:
        raise ValueError(f"unit id {unit_id} outside 0..247")


class ModbusTransport:
    """One Modbus link: a TCP connection or an RTU serial line.

    Build it with :meth:`tcp` or :meth:`rtu`.

    Parameters
    ----------
    name
        Link name used in errors and logs, e.g. ``"tcp 127.0.0.1:15020"`` (no unit).
    factory
        Makes a new, unconnected pymodbus client, called inside the event loop (no unit).
    policy
        Timeouts, attempts and back-off of every call (s, count).
    """

    def __init__(
        self,
        name: str,
        factory: Callable[[], Client],
        *,
        policy: RetryPolicy | None = None,
    ) -> None:
        self.name = name
        self.policy = policy or RetryPolicy()
        self._factory = factory
        self._client: Client | None = None
        self._connect_lock: asyncio.Lock | None = None
        self._wire_lock: asyncio.Lock | None = None
        self._closed = False
        self.connects = 0
        """Connections opened so far (the first one included), count."""
        self.requests = 0
        """Calls made, count."""
        self.retries = 0
        """Attempts beyond the first of every call, count."""
        self.failures = 0
        """Calls that raised NoReply or LinkUnavailable, count."""

    # --------------------------------------------------------------- constructors
    @classmethod
    def tcp(cls, host: str, port: int = 502, *, policy: RetryPolicy | None = None) -> Self:
        """A Modbus TCP link.

        Parameters
        ----------
        host
            Host name or address (no unit).
        port
            TCP port, 1..65535 (no unit).
        policy
            Timeouts, attempts and back-off (s, count).

        Returns
        -------
        ModbusTransport
            Not yet connected (no unit).
        """
        if not 1 <= port <= 65535:
            raise ValueError(f"TCP port {port} outside 1..65535")
        pol = policy or RetryPolicy()

        def factory() -> Client:
            return AsyncModbusTcpClient(
                host,
                port=port,
                name=f"{host}:{port}",
                timeout=2.0 * pol.timeout_s,  # pymodbus' own bound; ours fires first
                retries=0,
                reconnect_delay=0,
            )

        return cls(f"modbus tcp {host}:{port}", factory, policy=pol)

    @classmethod
    def rtu(
        cls,
        port: str,
        *,
        baud: int = 19200,
        parity: Literal["none", "even", "odd"] = "even",
        stop_bits: Literal[1, 2] = 1,
        policy: RetryPolicy | None = None,
    ) -> Self:
        """A Modbus RTU link on a serial port (RS-485 adapter), 8 data bits.

        Parameters
        ----------
        port
            Serial device path, e.g. ``/dev/ttyUSB0`` (no unit).
        baud
            Line speed, bit/s.
        parity
            ``"none"``, ``"even"`` or ``"odd"`` (no unit).
        stop_bits
            1 or 2 (count).
        policy
            Timeouts, attempts and back-off (s, count).

        Returns
        -------
        ModbusTransport
            Not yet connected (no unit).
        """
        if parity not in _PARITY:
            raise ValueError(f"parity {parity!r} is not one of {', '.join(_PARITY)}")
        if stop_bits not in (1, 2):
            raise ValueError(f"stop_bits must be 1 or 2, got {stop_bits!r}")
        if baud <= 0:
            raise ValueError(f"baud must be above 0, got {baud!r}")
        pol = policy or RetryPolicy()

        def factory() -> Client:
            return AsyncModbusSerialClient(
                port,
                baudrate=baud,
                bytesize=8,
                parity=_PARITY[parity],
                stopbits=stop_bits,
                name=port,
                timeout=2.0 * pol.timeout_s,
                retries=0,
                reconnect_delay=0,
            )

        return cls(f"modbus rtu {port} {baud} 8{_PARITY[parity]}{stop_bits}", factory, policy=pol)

    # --------------------------------------------------------------- connection
    @property
    def connected(self) -> bool:
        """Whether a connection is open now (no unit)."""
        return self._client is not None and self._client.connected

    async def connect(self) -> None:
        """Open the connection now (calls also open it when needed).

        Raises
        ------
        LinkUnavailable
            No connection within the policy's attempts.
        """
        await self._call("connect", None)

    async def _ensure(self) -> Client:
        """The open client, opening a new connection under one attempt's timeout."""
        if self._closed:
            raise LinkUnavailable("the transport is closed", link=self.name)
        if self._connect_lock is None:
            self._connect_lock = asyncio.Lock()
        async with self._connect_lock:
            client = self._client
            if client is not None and client.connected:
                return client
            if client is not None:  # lost: drop it and start afresh
                client.close()
                self._client = None
                _log.info("%s: connection lost; reconnecting", self.name)
            client = self._factory()
            try:
                async with asyncio.timeout(self.policy.timeout_s):
                    ok = await client.connect()
            except TimeoutError:
                ok = False
            if not ok:
                client.close()
                raise LinkUnavailable("cannot connect", link=self.name)
            self._client = client
            self.connects += 1
            return client

    async def close(self) -> None:
        """Close the connection; later calls raise :class:`LinkUnavailable`."""
        self._closed = True
        if self._client is not None:
            self._client.close()
            self._client = None

    async def reopen(self) -> None:
        """Allow calls again after :meth:`close` (the next call connects)."""
        self._closed = False

    # --------------------------------------------------------------- core
    async def _call(
        self,
        what: str,
        request: Callable[[Client], Awaitable[ModbusPDU]] | None,
        *,
        unit_id: int = 0,
        function_code: int = 0,
        address: int = 0,
    ) -> ModbusPDU | None:
        """Run one request with the policy's attempts; return the (non-error) reply."""
        self.requests += 1
        pauses = self.policy.pauses()
        lost = False  # the last attempt failed for want of a connection, not of a reply
        detail = ""
        for attempt in range(self.policy.attempts):
            if attempt:
                self.retries += 1
                await asyncio.sleep(next(pauses))
            try:
                client = await self._ensure()
            except LinkUnavailable:
                lost, detail = True, "cannot connect"
                continue
            if request is None:
                return None
            if self._wire_lock is None:
                self._wire_lock = asyncio.Lock()
            try:
                async with self._wire_lock, asyncio.timeout(self.policy.timeout_s):
                    reply = await request(client)
            except TimeoutError:
                lost, detail = False, f"no reply within {self.policy.timeout_s:g} s"
                continue
            except (ConnectionException, OSError) as exc:
                lost, detail = True, f"connection failed ({exc})"
                continue
            except ModbusException as exc:  # pymodbus gave up waiting, or a garbled frame
                lost, detail = False, str(exc)
                continue
            if isinstance(reply, ExceptionResponse):
                raise DeviceRefused(
                    what,
                    link=self.name,
                    raw=int(reply.exception_code),
                    unit_id=unit_id,
                    function_code=function_code,
                    address=address,
                )
            if reply is None or reply.isError():
                raise BadReply(f"{what}: unexpected reply {reply!s}", link=self.name)
            return reply
        self.failures += 1
        error = LinkUnavailable if lost else NoReply
        raise error(f"{what}: {detail} (after {self.policy.attempts} attempts)", link=self.name)

    # --------------------------------------------------------------- data calls
    async def _read(self, function_code: int, unit_id: int, address: int, count: int) -> Any:
        """One read request of any table (the four reads differ only in these constants)."""
        method, what, limit = _READS[function_code]
        _check_unit(unit_id)
        _check_span(address, count, limit, f"read {what}")
        return await self._call(
            f"read {what} {address}+{count} of unit {unit_id}",
            lambda c: getattr(c, method)(address, count=count, device_id=unit_id),
            unit_id=unit_id,
            function_code=function_code,
            address=address,
        )

    async def read_input_registers(self, unit_id: int, address: int, count: int) -> tuple[int, ...]:
        """Read input registers (function 04).

        Parameters
        ----------
        unit_id
            Modbus unit id, 0..247 (no unit).
        address
            First protocol address, 0-based (no unit).
        count
            Number of registers, 1..125 (count).

        Returns
        -------
        tuple of int
            The words, 0..65535 each (no unit).
        """
        reply = await self._read(0x04, unit_id, address, count)
        return self._words(reply, count, "input registers")

    async def read_holding_registers(
        self, unit_id: int, address: int, count: int
    ) -> tuple[int, ...]:
        """Read holding registers (function 03).

        Parameters
        ----------
        unit_id
            Modbus unit id, 0..247 (no unit).
        address
            First protocol address, 0-based (no unit).
        count
            Number of registers, 1..125 (count).

        Returns
        -------
        tuple of int
            The words, 0..65535 each (no unit).
        """
        reply = await self._read(0x03, unit_id, address, count)
        return self._words(reply, count, "holding registers")

    async def read_discrete_inputs(
        self, unit_id: int, address: int, count: int
    ) -> tuple[bool, ...]:
        """Read discrete inputs (function 02).

        Parameters
        ----------
        unit_id
            Modbus unit id, 0..247 (no unit).
        address
            First protocol address, 0-based (no unit).
        count
            Number of inputs, 1..2000 (count).

        Returns
        -------
        tuple of bool
            ``count`` contact states (no unit).
        """
        return self._bits(await self._read(0x02, unit_id, address, count), count, "discrete inputs")

    async def read_coils(self, unit_id: int, address: int, count: int) -> tuple[bool, ...]:
        """Read coils (function 01).

        Parameters
        ----------
        unit_id
            Modbus unit id, 0..247 (no unit).
        address
            First protocol address, 0-based (no unit).
        count
            Number of coils, 1..2000 (count).

        Returns
        -------
        tuple of bool
            ``count`` coil states (no unit).
        """
        return self._bits(await self._read(0x01, unit_id, address, count), count, "coils")

    async def write_registers(self, unit_id: int, address: int, words: Sequence[int]) -> None:
        """Write holding registers (function 16, one request however many words).

        Parameters
        ----------
        unit_id
            Modbus unit id, 0..247 (no unit).
        address
            First protocol address, 0-based (no unit).
        words
            1..123 words, 0..65535 each (no unit).
        """
        _check_unit(unit_id)
        values = [int(w) for w in words]
        _check_span(address, len(values), _MAX_WRITE_REGISTERS, "write registers")
        if any(not 0 <= w <= 0xFFFF for w in values):
            raise ValueError(f"write registers: a word outside 0..65535 in {values}")
        await self._call(
            f"write registers {address}+{len(values)} of unit {unit_id}",
            lambda c: c.write_registers(address, values, device_id=unit_id),
            unit_id=unit_id,
            function_code=0x10,
            address=address,
        )

    async def write_coils(self, unit_id: int, address: int, bits: Sequence[bool]) -> None:
        """Write coils (function 15, one request however many bits).

        Parameters
        ----------
        unit_id
            Modbus unit id, 0..247 (no unit).
        address
            First protocol address, 0-based (no unit).
        bits
            1..1968 coil states, True = closed (no unit).
        """
        _check_unit(unit_id)
        values = [bool(b) for b in bits]
        _check_span(address, len(values), _MAX_WRITE_BITS, "write coils")
        await self._call(
            f"write coils {address}+{len(values)} of unit {unit_id}",
            lambda c: c.write_coils(address, values, device_id=unit_id),
            unit_id=unit_id,
            function_code=0x0F,
            address=address,
        )

    # --------------------------------------------------------------- reply shapes
    def _words(self, reply: Any, count: int, what: str) -> tuple[int, ...]:
        words = getattr(reply, "registers", None)
        if words is None or len(words) != count:
            got = "none" if words is None else str(len(words))
            raise BadReply(f"asked for {count} {what}, got {got}", link=self.name)
        return tuple(int(w) for w in words)

    def _bits(self, reply: Any, count: int, what: str) -> tuple[bool, ...]:
        bits = getattr(reply, "bits", None)
        if bits is None or len(bits) < count:  # a reply pads bits to whole bytes
            got = "none" if bits is None else str(len(bits))
            raise BadReply(f"asked for {count} {what}, got {got}", link=self.name)
        return tuple(bool(b) for b in bits[:count])
