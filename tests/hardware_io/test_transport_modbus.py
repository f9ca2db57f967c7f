"""The Modbus transport against the simulator's Modbus TCP server on 127.0.0.1.

Virtual time (see conftest): a silent device costs its timeouts in virtual seconds only, so
the tests can check the exact time a call spends before giving up.
"""

from __future__ import annotations

import asyncio
import os
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

import pytest
from pymodbus.pdu import ModbusPDU
from pymodbus.server import ModbusSerialServer
from pymodbus.simulator import DataType, SimData, SimDevice

from controller.clock import VirtualClock
from controller.drivers import (
    ChamberBlock,
    OutputValues,
    RelayBits,
    WordOrder,
    decode_input_bits,
    decode_inputs,
    decode_outputs,
    encode_outputs,
    encode_relays,
)
from controller.drivers._transport_common import (
    DeviceRefused,
    LinkUnavailable,
    ModbusExceptionCode,
    NoReply,
    RetryPolicy,
)
from controller.drivers._transport_modbus import ModbusTransport
from controller.drivers._transport_runs import BlockRun
from simulator import Fault, FaultKind, Rack
from simulator.endpoints import RackServer

from .conftest import START, rig, virtual

pytestmark = pytest.mark.timeout(30)

POLICY = RetryPolicy(timeout_s=0.5, attempts=3, backoff_s=0.05, backoff_max_s=1.0)


@asynccontextmanager
async def served(rack: Rack) -> AsyncIterator[RackServer]:
    async with RackServer(rack) as server:
        yield server


def new_rack() -> Rack:
    return Rack(rig(), seed=3, start_utc=START)


class LossyProxy:
    """A TCP relay that swallows the first ``drop`` requests sent through it (lost frames)."""

    def __init__(self, target_port: int, drop: int) -> None:
        self.target_port = target_port
        self.drop = drop
        self.dropped = 0
        self.server: asyncio.Server | None = None
        self.tasks: set[asyncio.Task[None]] = set()

    async def start(self) -> int:
        self.server = await asyncio.start_server(self._client, "127.0.0.1", 0)
        return int(self.server.sockets[0].getsockname()[1])

    async def stop(self) -> None:
        assert self.server is not None
        self.server.close()
        for task in self.tasks:
            task.cancel()
        await asyncio.gather(*self.tasks, return_exceptions=True)

    async def _client(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        up_reader, up_writer = await asyncio.open_connection("127.0.0.1", self.target_port)

        async def pump(src: asyncio.StreamReader, dst: asyncio.StreamWriter, lossy: bool) -> None:
            while data := await src.read(4096):
                if lossy and self.dropped < self.drop:
                    self.dropped += 1
                    continue
                dst.write(data)
                await dst.drain()

        for args in ((reader, up_writer, True), (up_reader, writer, False)):
            task = asyncio.ensure_future(pump(*args))
            self.tasks.add(task)


def test_reads_and_writes_move_the_racks_words() -> None:
    rack = new_rack()

    async def body(clock: VirtualClock) -> None:
        async with served(rack) as server:
            link = ModbusTransport.tcp("127.0.0.1", server.announcement.port, policy=POLICY)
            base = server.modbus.register_map.block("c2").base
            inputs = decode_inputs(await link.read_input_registers(1, base, 6))
            # probe noise 0.01 °C (rig file); float32 on the wire
            assert inputs.temperature_c == pytest.approx(
                rack.truth("c2").probe_temperature_c, abs=0.05
            )
            contacts = decode_input_bits(await link.read_discrete_inputs(1, base, 3))
            assert contacts.level_ok and contacts.estop_ok and not contacts.watchdog_tripped
            out = OutputValues(heater_pct=37.5, chiller_pct=0, lamp_pct=12.25, pump_pct=40)
            await link.write_registers(1, base, encode_outputs(out))
            relays = RelayBits(heater_on=True, chiller_on=False, lamp_on=True, pump_on=True)
            await link.write_coils(1, base, encode_relays(relays))
            actual = rack.outputs("c2")
            assert (actual.heater_pct, actual.lamp_pct, actual.pump_pct) == (37.5, 12.25, 40.0)
            assert rack.outputs("c1").heater_pct == 0.0
            assert decode_outputs(await link.read_holding_registers(1, base, 4)) == out
            assert await link.read_coils(1, base, 4) == encode_relays(relays)
            assert (link.connects, link.retries, link.failures) == (1, 0, 0)
            await link.close()

    virtual(body)


def test_a_lost_request_is_retried_after_a_back_off() -> None:
    rack = new_rack()

    async def body(clock: VirtualClock) -> None:
        async with served(rack) as server:
            proxy = LossyProxy(server.announcement.port, drop=1)
            port = await proxy.start()
            link = ModbusTransport.tcp("127.0.0.1", port, policy=POLICY)
            await link.connect()
            t0 = clock.now_s()
            words = await link.read_input_registers(1, 0, 6)
            elapsed = clock.now_s() - t0
            assert decode_inputs(words).temperature_c == pytest.approx(
                rack.truth("c1").probe_temperature_c, abs=0.05
            )
            assert proxy.dropped == 1 and link.retries == 1 and link.failures == 0
            # one attempt's timeout, then the first back-off pause, then the answer
            assert elapsed == pytest.approx(POLICY.timeout_s + POLICY.backoff_s, abs=1e-6)
            await link.close()
            await proxy.stop()

    virtual(body)


def test_a_silent_module_costs_every_attempt_then_no_reply() -> None:
    rack = new_rack()

    async def body(clock: VirtualClock) -> None:
        async with served(rack) as server:
            link = ModbusTransport.tcp("127.0.0.1", server.announcement.port, policy=POLICY)
            await link.read_input_registers(1, 0, 6)
            rack.inject(Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c1", at_s=rack.t_s))
            t0 = clock.now_s()
            with pytest.raises(NoReply, match="after 3 attempts"):
                await link.read_input_registers(1, 0, 6)
            assert clock.now_s() - t0 == pytest.approx(POLICY.worst_case_s, abs=1e-6)
            assert POLICY.worst_case_s == pytest.approx(3 * 0.5 + 0.05 + 0.1)
            # the other chamber's block on the same link still answers, on the same connection
            await link.read_input_registers(1, 16, 6)  # c2's block follows c1's (modules of 8)
            rack.clear_faults(FaultKind.COMM_TIMEOUT)
            await link.read_input_registers(1, 0, 6)
            assert link.connects == 1 and link.failures == 1
            await link.close()

    virtual(body)


def test_a_reply_timeout_measures_the_device_not_the_queue_behind_a_silent_one() -> None:
    rack = new_rack()
    once = RetryPolicy(timeout_s=0.5, attempts=1)

    async def body(clock: VirtualClock) -> None:
        async with served(rack) as server:
            link = ModbusTransport.tcp("127.0.0.1", server.announcement.port, policy=once)
            await link.connect()
            rack.inject(Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c1", at_s=rack.t_s))
            t0 = clock.now_s()
            silent = asyncio.ensure_future(link.read_input_registers(1, 0, 6))
            await asyncio.sleep(0)  # c1's request goes on the wire first
            words = await link.read_input_registers(1, 16, 6)  # c2 waits its turn, then answers
            assert clock.now_s() - t0 == pytest.approx(0.5, abs=1e-6)
            assert decode_inputs(words).level_pct == pytest.approx(100.0)
            with pytest.raises(NoReply):
                await silent
            await link.close()

    virtual(body)


def test_the_link_reconnects_after_the_server_restarts() -> None:
    rack = new_rack()

    async def body(clock: VirtualClock) -> None:
        async with served(rack) as server:
            port = server.announcement.port
            link = ModbusTransport.tcp("127.0.0.1", port, policy=POLICY)
            await link.read_input_registers(1, 0, 6)
            await server.modbus.stop()
            with pytest.raises((LinkUnavailable, NoReply)):
                await link.read_input_registers(1, 0, 6)
            assert not link.connected
            await server.modbus.start("127.0.0.1", port)
            words = await link.read_input_registers(1, 0, 6)
            assert decode_inputs(words).level_pct == pytest.approx(100.0)
            assert link.connects == 2
            await link.close()

    virtual(body)


def test_nothing_listening_is_link_unavailable_after_the_attempts() -> None:
    async def body(clock: VirtualClock) -> None:
        probe = await asyncio.start_server(lambda r, w: None, "127.0.0.1", 0)
        port = int(probe.sockets[0].getsockname()[1])
        probe.close()
        await probe.wait_closed()
        link = ModbusTransport.tcp("127.0.0.1", port, policy=POLICY)
        with pytest.raises(LinkUnavailable, match="cannot connect"):
            await link.read_discrete_inputs(1, 0, 3)
        assert link.connects == 0 and link.retries == POLICY.attempts - 1

    virtual(body)


def test_exception_responses_are_typed_and_not_retried() -> None:
    rack = new_rack()

    async def body(clock: VirtualClock) -> None:
        async with served(rack) as server:
            link = ModbusTransport.tcp("127.0.0.1", server.announcement.port, policy=POLICY)
            with pytest.raises(DeviceRefused) as reserved:
                await link.read_input_registers(1, 30, 4)  # 32 and on: past the last block
            assert reserved.value.code is ModbusExceptionCode.ILLEGAL_ADDRESS
            assert (reserved.value.unit_id, reserved.value.address) == (1, 30)
            assert reserved.value.function_code == 0x04
            with pytest.raises(DeviceRefused) as too_big:
                await link.write_registers(1, 0, [20000])  # heater 200 %
            assert too_big.value.code is ModbusExceptionCode.ILLEGAL_VALUE
            assert rack.outputs("c1").heater_pct == 0.0
            module = server.modbus.module("c1")
            assert module.write_holding(4, [5]) is None  # watchdog 0.5 s, then left unfed
            rack.advance(1.0)
            module.refresh()
            with pytest.raises(DeviceRefused) as busy:
                await link.write_registers(1, 0, [100])
            assert busy.value.code is ModbusExceptionCode.DEVICE_BUSY
            assert link.retries == 0 and link.failures == 0
            await link.close()

    virtual(body)


def test_closed_transport_refuses_until_reopened() -> None:
    rack = new_rack()

    async def body(clock: VirtualClock) -> None:
        async with served(rack) as server:
            link = ModbusTransport.tcp("127.0.0.1", server.announcement.port, policy=POLICY)
            await link.connect()
            await link.close()
            with pytest.raises(LinkUnavailable):
                await link.read_coils(1, 0, 4)
            await link.reopen()
            assert await link.read_coils(1, 0, 4) == (False, False, False, False)

    virtual(body)


@pytest.mark.parametrize(
    ("call", "args"),
    [
        ("read_input_registers", (1, 0, 0)),
        ("read_input_registers", (1, 0, 126)),
        ("read_discrete_inputs", (1, 65535, 2)),
        ("write_registers", (1, 0, [70000])),
        ("write_coils", (300, 0, [True])),
    ],
)
def test_impossible_requests_are_refused_before_sending(call: str, args: tuple) -> None:
    async def body(clock: VirtualClock) -> None:
        link = ModbusTransport.tcp("127.0.0.1", 1, policy=POLICY)
        with pytest.raises(ValueError):
            await getattr(link, call)(*args)
        assert link.requests == 0

    virtual(body)


def test_back_off_doubles_up_to_its_cap() -> None:
    policy = RetryPolicy(timeout_s=1.0, attempts=5, backoff_s=0.4, backoff_max_s=1.0)
    assert list(policy.pauses()) == [0.4, 0.8, 1.0, 1.0]
    assert policy.worst_case_s == pytest.approx(5.0 + 3.2)
    assert list(RetryPolicy(attempts=1).pauses()) == []
    for bad in ({"timeout_s": 0.0}, {"attempts": 0}, {"backoff_s": -1.0}, {"attempts": 2.5}):
        with pytest.raises(ValueError):
            RetryPolicy(**bad)  # type: ignore[arg-type]


def test_rtu_settings_are_checked() -> None:
    with pytest.raises(ValueError, match="parity"):
        ModbusTransport.rtu("/dev/null", parity="mark")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="stop_bits"):
        ModbusTransport.rtu("/dev/null", stop_bits=3)  # type: ignore[arg-type]
    link = ModbusTransport.rtu("/dev/ttyX9", baud=9600, parity="none", stop_bits=2)
    assert link.name == "modbus rtu /dev/ttyX9 9600 8N2"


class NullModem:
    """Two pseudo-terminals whose master ends are joined: a serial cable in software."""

    def __init__(self) -> None:
        self.fds: list[int] = []
        self.paths: list[str] = []
        for _ in range(2):
            master, slave = os.openpty()
            os.set_blocking(master, False)
            self.fds += [master, slave]
            self.paths.append(os.ttyname(slave))
        self.loop = asyncio.get_running_loop()
        a, b = self.fds[0], self.fds[2]
        self.loop.add_reader(a, self._relay, a, b)
        self.loop.add_reader(b, self._relay, b, a)

    @staticmethod
    def _relay(src: int, dst: int) -> None:
        try:
            os.write(dst, os.read(src, 4096))
        except (BlockingIOError, OSError):
            pass

    def close(self) -> None:
        self.loop.remove_reader(self.fds[0])
        self.loop.remove_reader(self.fds[2])
        for fd in self.fds:
            os.close(fd)


def only_unit_1(sending: bool, pdu: ModbusPDU) -> ModbusPDU:
    """Server hook: requests for other units are not handled (a multi-drop line's silence)."""
    return pdu if sending or pdu.dev_id == 1 else None  # type: ignore[return-value]


def test_rtu_link_moves_words_over_a_serial_line() -> None:
    # a pymodbus RTU server (unit 1) at one end of a software null modem, the transport at
    # the other; "none" parity because a pty refuses some parity reconfigurations
    async def body(clock: VirtualClock) -> None:
        cable = NullModem()
        device = SimDevice(
            1,
            simdata=(
                [SimData(0, values=[False] * 16, datatype=DataType.BITS)],
                [SimData(0, values=[True, False, True] * 5 + [False], datatype=DataType.BITS)],
                [SimData(0, count=10, values=0, datatype=DataType.REGISTERS)],
                [SimData(0, count=6, values=7, datatype=DataType.REGISTERS)],
            ),
        )
        server = ModbusSerialServer(
            device, port=cable.paths[0], baudrate=19200, parity="N", trace_pdu=only_unit_1
        )
        await server.serve_forever(background=True)
        link = ModbusTransport.rtu(cable.paths[1], baud=19200, parity="none", policy=POLICY)
        try:
            assert await link.read_input_registers(1, 0, 6) == (7,) * 6
            assert await link.read_discrete_inputs(1, 0, 3) == (True, False, True)
            await link.write_registers(1, 0, [1, 2, 3])
            assert await link.read_holding_registers(1, 0, 3) == (1, 2, 3)
            await link.write_coils(1, 0, [True, True])
            assert await link.read_coils(1, 0, 3) == (True, True, False)
            t0 = clock.now_s()
            with pytest.raises(NoReply):  # no unit 9 on this line: silence
                await link.read_input_registers(9, 0, 6)
            assert clock.now_s() - t0 == pytest.approx(POLICY.worst_case_s, abs=1e-6)
            assert await link.read_input_registers(1, 0, 1) == (7,)
        finally:
            await link.close()
            await server.shutdown()
            cable.close()

    virtual(body)


def test_a_block_run_takes_only_neighbours_and_at_most_eight() -> None:
    link = ModbusTransport.tcp("127.0.0.1", 1502, policy=POLICY)

    def run(bases: list[int]) -> BlockRun:
        blocks = [ChamberBlock(chamber_id=f"c{i}", unit_id=1, base=b) for i, b in enumerate(bases)]
        safe = {b.chamber_id: (0, 0, 0, 0) for b in blocks}
        return BlockRun(link, 1, blocks, word_order=WordOrder.HIGH_FIRST, timeout_word=50,
                        safe_words=safe, budget_s=0.5)  # fmt: skip

    assert run([0, 16, 32]).chambers == ("c0", "c1", "c2")
    assert run([64]).chambers == ("c0",)
    with pytest.raises(ValueError, match="no gap"):
        run([0, 32])
    with pytest.raises(ValueError, match=r"1\.\.8 blocks"):
        run([16 * k for k in range(9)])
