"""The Modbus TCP endpoint, driven by pymodbus' own client on loopback."""

from __future__ import annotations

import asyncio

import pytest
from pymodbus.client import AsyncModbusTcpClient
from pymodbus.exceptions import ModbusIOException

from controller.drivers import (
    BLOCK_SPAN,
    ChamberBlock,
    InputBits,
    InputValues,
    OutputValues,
    RegisterMap,
    RegisterMapConfig,
    RelayBits,
    WordOrder,
    decode_contact_status,
    decode_input_bits,
    decode_inputs,
    decode_outputs,
    decode_relay_word,
    decode_relays,
    decode_safe_outputs,
    encode_outputs,
    encode_point,
    encode_relay_word,
    encode_relays,
    encode_safe_outputs,
    next_watchdog_count,
    point,
)
from simulator import Fault, FaultKind, Rack
from simulator.endpoints import ModbusEndpoint, RackServer

from .conftest import CLIENT_TIMEOUT_S

ALL_ON = RelayBits(heater_on=True, chiller_on=True, lamp_on=True, pump_on=True)
BOUND_S = 10.0


def block(server: RackServer, chamber_id: str) -> ChamberBlock:
    return server.modbus.register_map.block(chamber_id)


async def read_inputs(client: AsyncModbusTcpClient, b: ChamberBlock) -> InputValues:
    reply = await client.read_input_registers(b.base, count=6, device_id=b.unit_id)
    assert not reply.isError(), reply
    return decode_inputs(reply.registers)


async def read_contacts(client: AsyncModbusTcpClient, b: ChamberBlock) -> InputBits:
    reply = await client.read_discrete_inputs(b.base, count=3, device_id=b.unit_id)
    assert not reply.isError(), reply
    return decode_input_bits(reply.bits)


async def drive(
    client: AsyncModbusTcpClient, b: ChamberBlock, out: OutputValues, relays: RelayBits = ALL_ON
) -> None:
    reply = await client.write_registers(b.base, list(encode_outputs(out)), device_id=b.unit_id)
    assert not reply.isError(), reply
    reply = await client.write_coils(b.base, list(encode_relays(relays)), device_id=b.unit_id)
    assert not reply.isError(), reply


async def write_point(client: AsyncModbusTcpClient, b: ChamberBlock, name: str, value: float):
    (word,) = encode_point(point(name), value)
    return await client.write_register(b.address(name), word, device_id=b.unit_id)


async def expect_silence(request: asyncio.Future | object) -> None:
    """The request gets no answer: pymodbus' client gives up after its timeout."""
    with pytest.raises(ModbusIOException, match="No response"):
        await request  # type: ignore[misc]


# --------------------------------------------------------------------------- reading and driving


async def test_heating_through_modbus_warms_the_water(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c1")
        before = await read_inputs(client, b)
        assert before.temperature_c == pytest.approx(rack.truth("c1").temperature_c, abs=0.1)
        await drive(client, b, OutputValues(heater_pct=100, chiller_pct=0, lamp_pct=0, pump_pct=0))
        assert rack.outputs("c1").heater_pct == 100.0
        assert rack.outputs("c2").heater_pct == 0.0
        rack.advance(1800.0)
        after = await read_inputs(client, b)
        truth = rack.truth("c1")
        assert after.temperature_c is not None and before.temperature_c is not None
        assert after.temperature_c > before.temperature_c + 1.0
        # float32 carries ~7 digits; the probe's noise is 0.01 °C (rig default)
        assert after.temperature_c == pytest.approx(truth.probe_temperature_c, abs=0.05)
        assert after.level_pct == pytest.approx(100.0)
        other = await read_inputs(client, block(server, "c2"))
        assert other.temperature_c is not None and other.temperature_c < after.temperature_c - 1


async def test_outputs_read_back_and_relays_gate_the_drive(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c2")
        out = OutputValues(heater_pct=12.5, chiller_pct=0, lamp_pct=65.43, pump_pct=40)
        await drive(
            client, b, out, RelayBits(heater_on=True, chiller_on=False, lamp_on=False, pump_on=True)
        )
        reply = await client.read_holding_registers(b.base, count=4, device_id=b.unit_id)
        assert decode_outputs(reply.registers) == out
        reply = await client.read_coils(b.base, count=4, device_id=b.unit_id)
        assert decode_relays(reply.bits) == RelayBits(
            heater_on=True, chiller_on=False, lamp_on=False, pump_on=True
        )
        actual = rack.outputs("c2")
        assert (actual.heater_pct, actual.lamp_pct, actual.pump_pct) == (12.5, 0.0, 40.0)
        reply = await client.write_coil(b.address("lamp_on"), True, device_id=b.unit_id)
        assert not reply.isError()
        assert rack.outputs("c2").lamp_pct == pytest.approx(65.43)
        rack.advance(120.0)
        inputs = await read_inputs(client, b)
        assert inputs.par_umol_m2_s is not None and inputs.par_umol_m2_s > 0
        assert inputs.flow_cm_s is not None and inputs.flow_cm_s > 0


async def test_refused_writes_change_nothing(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c1")
        await drive(client, b, OutputValues(heater_pct=30, chiller_pct=0, lamp_pct=0, pump_pct=0))
        too_much = await client.write_registers(b.base, [10001, 0], device_id=b.unit_id)
        assert too_much.isError() and too_much.exception_code == 0x03
        gap = await client.write_register(b.base + 12, 1, device_id=b.unit_id)
        assert gap.isError() and gap.exception_code == 0x02
        unmapped_coil = await client.write_coil(b.base + 9, True, device_id=b.unit_id)
        assert unmapped_coil.isError() and unmapped_coil.exception_code == 0x02
        # one refused part refuses the whole request, in every block it spans
        spanning = [3000, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 7, 1000]
        across = await client.write_registers(b.base, spanning, device_id=b.unit_id)
        assert across.isError() and across.exception_code == 0x02
        past_the_last = await client.read_input_registers(32, count=1, device_id=b.unit_id)
        assert past_the_last.isError() and past_the_last.exception_code == 0x02
        reply = await client.read_holding_registers(b.base, count=2, device_id=b.unit_id)
        assert reply.registers == [3000, 0]
        assert rack.outputs("c1").heater_pct == 30.0
        assert rack.outputs("c2").heater_pct == 0.0


async def test_reserved_offsets_read_0_and_take_0_so_one_request_spans_a_run(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        c1, c2 = block(server, "c1"), block(server, "c2")
        assert c2.base == c1.base + BLOCK_SPAN  # the simulator's modules of eight: no gap
        server.modbus.module("c2").set_estop(True)
        reply = await client.read_input_registers(c1.base, count=23, device_id=c1.unit_id)
        assert not reply.isError(), reply
        words = reply.registers
        assert words[7:16] == [0] * 9  # c1's reserved offsets
        for b, first in ((c1, 0), (c2, 16)):
            inputs = decode_inputs(words[first : first + 6])
            assert inputs.temperature_c == pytest.approx(
                rack.truth(b.chamber_id).temperature_c, abs=0.1
            )
            assert decode_contact_status(words[first + 6]) == await read_contacts(client, b)
        assert decode_contact_status(words[22]) == InputBits(
            level_ok=True, estop_ok=False, watchdog_tripped=False
        )
        # one write: c1's drives, feed and safe drives, zeros in its reserved offsets, c2's drives
        out1 = OutputValues(heater_pct=30, chiller_pct=0, lamp_pct=5, pump_pct=40)
        out2 = OutputValues(heater_pct=0, chiller_pct=20, lamp_pct=0, pump_pct=35)
        safe = OutputValues(heater_pct=0, chiller_pct=0, lamp_pct=0, pump_pct=25)
        spanning = [
            *encode_outputs(out1),
            *encode_point(point("watchdog_timeout_s"), 30.0),
            1,
            *encode_safe_outputs(safe),
            *[0] * 6,
            *encode_outputs(out2),
        ]
        assert not (await client.write_registers(c1.base, spanning, device_id=1)).isError()
        bits = [*encode_relays(ALL_ON), *[False] * 12, *encode_relays(ALL_ON)]
        assert not (await client.write_coils(c1.base, bits, device_id=1)).isError()
        server.modbus.module("c2").set_estop(False)
        assert rack.outputs("c1").heater_pct == 30.0 and rack.outputs("c1").pump_pct == 40.0
        assert rack.outputs("c2").chiller_pct == 20.0 and rack.outputs("c2").pump_pct == 35.0
        reply = await client.read_holding_registers(c1.base, count=16, device_id=1)
        assert decode_safe_outputs(reply.registers[6:10]) == safe
        assert decode_relay_word(reply.registers[10]) == ALL_ON  # relay_bits mirrors the coils
        assert reply.registers[11:] == [0] * 5


async def test_relay_bits_set_the_coils_with_the_drives_in_one_write(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c1")
        out = OutputValues(heater_pct=40, chiller_pct=10, lamp_pct=25, pump_pct=30)
        some = RelayBits(heater_on=True, chiller_on=False, lamp_on=False, pump_on=True)
        words = [*encode_outputs(out), 0, 0, 0, 0, 0, 0, encode_relay_word(some)]
        assert not (await client.write_registers(b.base, words, device_id=1)).isError()
        assert decode_relays(server.modbus.module("c1").coil_bits()) == some
        actual = rack.outputs("c1")
        assert (actual.heater_pct, actual.chiller_pct, actual.lamp_pct) == (40.0, 0.0, 0.0)
        assert actual.pump_pct == 30.0
        reserved = await client.write_register(b.address("relay_bits"), 0x10, device_id=1)
        assert reserved.isError() and reserved.exception_code == 0x03
        assert decode_relays(server.modbus.module("c1").coil_bits()) == some


async def test_low_first_word_order_is_served(rack: Rack) -> None:
    rmap = RegisterMap.build(
        rack.chamber_ids, RegisterMapConfig(word_order=WordOrder.LOW_FIRST, unit_id=7)
    )
    async with asyncio.timeout(BOUND_S), RackServer(rack, register_map=rmap) as served:
        client = AsyncModbusTcpClient(
            "127.0.0.1", port=served.announcement.port, timeout=CLIENT_TIMEOUT_S, retries=0
        )
        assert await client.connect()
        try:
            reply = await client.read_input_registers(32, count=6, device_id=7)
            inputs = decode_inputs(reply.registers, WordOrder.LOW_FIRST)
            assert inputs.temperature_c == pytest.approx(rack.truth("c2").temperature_c, abs=0.1)
            swapped = [reply.registers[1], reply.registers[0], *reply.registers[2:]]
            assert decode_inputs(swapped, WordOrder.HIGH_FIRST) == inputs
            await expect_silence(client.read_input_registers(32, count=6, device_id=1))
        finally:
            client.close()


# --------------------------------------------------------------------------- faults


async def test_comm_timeout_makes_the_client_time_out(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        c1, c2 = block(server, "c1"), block(server, "c2")
        rack.inject(Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c2", sensor="modbus"))
        await expect_silence(client.read_input_registers(c2.base, count=6, device_id=1))
        await expect_silence(client.write_register(c2.address("heater_pct"), 100, device_id=1))
        assert rack.outputs("c2").heater_pct == 0.0  # the write never arrived
        # the other module and the connection are unaffected
        assert (await read_inputs(client, c1)).temperature_c is not None
        # a request spanning both blocks reaches a silent module: no answer at all
        await expect_silence(client.read_coils(0, count=20, device_id=1))
        rack.clear_faults(FaultKind.COMM_TIMEOUT)
        assert (await read_inputs(client, c2)).temperature_c is not None
        assert server.modbus.silenced == 3


async def test_unknown_unit_gets_no_answer(
    server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        await expect_silence(client.read_input_registers(0, count=6, device_id=9))
        assert (await read_inputs(client, block(server, "c1"))).level_pct == pytest.approx(100)


async def test_probe_dropout_is_flagged_not_invented(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        rack.inject(Fault(kind=FaultKind.DROPOUT, chamber="c1", sensor="temperature"))
        inputs = await read_inputs(client, block(server, "c1"))
        assert inputs.temperature_c is None
        assert inputs.level_pct == pytest.approx(100.0)


async def test_leak_lowers_level_and_opens_the_level_switch(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c1")
        assert (await read_contacts(client, b)).level_ok
        rack.inject(Fault(kind=FaultKind.LEAK, chamber="c1", magnitude=6.0))  # L/h
        rack.advance(1200.0)  # 2 L of 20 L lost: past the 5 % alarm loss (rig default)
        inputs = await read_inputs(client, b)
        assert inputs.level_pct == pytest.approx(
            100 * rack.truth("c1").water_volume_l / 20.0, abs=0.05
        )
        assert inputs.level_pct is not None and inputs.level_pct < 95.0
        assert not (await read_contacts(client, b)).level_ok
        assert (await read_contacts(client, block(server, "c2"))).level_ok


async def test_estop_cuts_every_actuator_until_released(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c1")
        out = OutputValues(heater_pct=50, chiller_pct=0, lamp_pct=20, pump_pct=30)
        await drive(client, b, out)
        server.modbus.module("c1").set_estop(True)
        assert not (await read_contacts(client, b)).estop_ok
        assert rack.outputs("c1") == type(rack.outputs("c1"))(
            heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0
        )
        server.modbus.module("c1").set_estop(False)
        assert (await read_contacts(client, b)).estop_ok
        assert rack.outputs("c1").lamp_pct == 20.0


async def test_power_loss_silences_then_reboots_the_module(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c1")
        await drive(client, b, OutputValues(heater_pct=70, chiller_pct=0, lamp_pct=0, pump_pct=0))
        reply = await write_point(client, b, "watchdog_timeout_s", 30.0)
        assert not reply.isError()
        rack.inject(Fault(kind=FaultKind.POWER_LOSS, duration_s=60.0))
        rack.advance(10.0)
        server.modbus.tick()
        await expect_silence(client.read_holding_registers(b.base, count=6, device_id=1))
        rack.advance(60.0)  # power is back
        server.modbus.tick()
        reply = await client.read_holding_registers(b.base, count=10, device_id=1)
        assert reply.registers == [0] * 10  # power-on defaults, watchdog off
        assert rack.outputs("c1").heater_pct == 0.0


# --------------------------------------------------------------------------- watchdog


async def test_watchdog_not_fed_drops_outputs_to_their_safe_drives(
    rack: Rack, server: RackServer, client: AsyncModbusTcpClient
) -> None:
    async with asyncio.timeout(BOUND_S):
        b = block(server, "c1")
        safe = OutputValues(heater_pct=0, chiller_pct=0, lamp_pct=0, pump_pct=20)
        words = list(encode_safe_outputs(safe))
        assert not (await client.write_registers(b.address("safe_heater_pct"), words)).isError()
        await drive(client, b, OutputValues(heater_pct=80, chiller_pct=0, lamp_pct=40, pump_pct=60))
        assert not (await write_point(client, b, "watchdog_timeout_s", 5.0)).isError()
        counter = next_watchdog_count(0)
        for _ in range(3):  # fed every 4 s: keeps running
            rack.advance(4.0)
            server.modbus.tick()
            assert not (await write_point(client, b, "watchdog_counter", counter)).isError()
            counter = next_watchdog_count(counter)
        assert rack.outputs("c1").heater_pct == 80.0
        # writing the same counter value again is not a feed
        rack.advance(3.0)
        assert not (await write_point(client, b, "watchdog_counter", counter - 1)).isError()
        rack.advance(3.0)
        server.modbus.tick()
        assert (await read_contacts(client, b)).watchdog_tripped
        actual = rack.outputs("c1")
        assert (actual.heater_pct, actual.lamp_pct, actual.pump_pct) == (0.0, 0.0, 20.0)
        reply = await client.read_holding_registers(b.base, count=10, device_id=1)
        assert decode_outputs(reply.registers[:4]) == safe
        assert decode_safe_outputs(reply.registers[6:10]) == safe
        # outputs are locked until the watchdog is fed again
        busy = await write_point(client, b, "heater_pct", 80.0)
        assert busy.isError() and busy.exception_code == 0x06
        busy = await client.write_coil(b.address("heater_on"), True, device_id=1)
        assert busy.isError() and busy.exception_code == 0x06
        assert not (await write_point(client, b, "watchdog_counter", counter)).isError()
        assert not (await read_contacts(client, b)).watchdog_tripped
        assert rack.outputs("c1").pump_pct == 20.0  # still safe until rewritten
        await drive(client, b, OutputValues(heater_pct=10, chiller_pct=0, lamp_pct=0, pump_pct=60))
        assert rack.outputs("c1").heater_pct == 10.0
        assert server.modbus.module("c1").trips == 1


async def test_watchdog_off_never_trips(rack: Rack) -> None:
    endpoint = ModbusEndpoint(rack)
    module = endpoint.module("c2")
    assert module.write_holding(0, [5000]) is None
    assert module.write_coils(0, [True]) is None
    rack.advance(24 * 3600.0)
    endpoint.tick()
    assert not module.tripped
    assert rack.outputs("c2").heater_pct == 50.0
