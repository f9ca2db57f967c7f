"""The emulated optodes, reached through their pseudo-terminals with pyserial."""

from __future__ import annotations

import asyncio
import datetime as dt
from collections.abc import AsyncIterator

import pytest
import serial

from controller.drivers import (
    CalibrationRecord,
    DeviceInfo,
    ErrorReply,
    Measurement,
    OptodeCommand,
    OptodeErrorCode,
    OptodeReply,
    OptodeRequest,
    OptodeStatus,
    crc16_xmodem,
    decode_reply,
    encode_request,
)
from controller.science.optode import SignalKind, calibrate_two_point, concentration_from_phase
from simulator import Fault, FaultKind, OptodeReading, Rack
from simulator.endpoints import FIRMWARE, OptodeEmulator, RackServer, measurement_from_reading

from .conftest import START, small_rig

READ_TIMEOUT_S = 0.3
"""pyserial read timeout: how long a silence test waits for a reply that must not come."""
BOUND_S = 10.0


@pytest.fixture
async def port(server: RackServer) -> AsyncIterator[serial.Serial]:
    with serial.Serial(server.announcement.optodes["c1"], 9600, timeout=READ_TIMEOUT_S) as s:
        yield s


async def exchange(port: serial.Serial, line: bytes) -> bytes:
    """Send one line; return the reply line (b'' when none arrives within the timeout)."""
    port.write(line)
    return await asyncio.to_thread(port.readline)


async def ask(port: serial.Serial, command: OptodeCommand, tag: int) -> OptodeReply:
    reply = await exchange(port, encode_request(OptodeRequest(command=command, tag=tag)))
    assert reply.endswith(b"\r\n"), reply
    return decode_reply(reply, source=port.port)


async def test_sample_reports_the_chambers_oxygen(rack: Rack, port: serial.Serial) -> None:
    async with asyncio.timeout(BOUND_S):
        reply = await ask(port, OptodeCommand.SAMPLE, 17)
        assert isinstance(reply, Measurement)
        assert reply.tag == 17
        assert reply.status is OptodeStatus.OK
        truth = rack.truth("c1")
        # reading noise is 0.3 µmol/L (rig default); 2 decimals on the wire
        assert reply.o2_umol_l == pytest.approx(truth.optode_o2_umol_l, abs=2.0)
        assert reply.temperature_c == pytest.approx(truth.temperature_c, abs=0.2)
        assert reply.o2_sat_pct == pytest.approx(
            100 * reply.o2_umol_l / truth.o2_saturation_umol_l, abs=0.2
        )


async def test_identity_and_calibration_let_a_controller_recompute_oxygen(
    rack: Rack, port: serial.Serial
) -> None:
    async with asyncio.timeout(BOUND_S):
        info = await ask(port, OptodeCommand.IDENT, 1)
        assert info == DeviceInfo(tag=1, serial="SIM0001", firmware=FIRMWARE, protocol=1)
        cal = await ask(port, OptodeCommand.CALGET, 2)
        assert isinstance(cal, CalibrationRecord)
        assert cal.tag == 2
        assert cal.phase0_deg == 60.0  # rig default phase without oxygen
        assert cal.date == START.date()
        assert cal.pressure_hpa == 1013.2  # 101.325 kPa, the rig default
        # Stern–Volmer two-point calibration (controller.science.optode) from the CAL record
        # and the saturation concentration at the calibration conditions
        truth = rack.truth("c1")
        foil = calibrate_two_point(
            cal.phase0_deg,
            cal.phase100_deg,
            truth.o2_saturation_umol_l,
            kind=SignalKind.PHASE_DEG,
            temp_c=cal.temperature_c,
        )
        sample = await ask(port, OptodeCommand.SAMPLE, 3)
        assert isinstance(sample, Measurement)
        recomputed = float(concentration_from_phase(foil, sample.phase_deg, cal.temperature_c))
        # phase is sent with 0.001° resolution: about ±0.1 µmol/L here
        assert recomputed == pytest.approx(sample.o2_umol_l, abs=0.5)


async def test_bad_requests_get_error_replies(port: serial.Serial) -> None:
    async with asyncio.timeout(BOUND_S):
        garbled = decode_reply(await exchange(port, b"SAMPLE tag=|6351\r\n"))
        assert garbled == ErrorReply(tag=0, code=OptodeErrorCode.BAD_CHECKSUM)
        wrong_crc = decode_reply(await exchange(port, b"FETCH tag=9|0000\r\n"))
        assert wrong_crc == ErrorReply(tag=0, code=OptodeErrorCode.BAD_CHECKSUM)
        body = b"FETCH tag=9"
        line = body + b"|%04X\r\n" % crc16_xmodem(body)
        assert decode_reply(await exchange(port, line)) == ErrorReply(
            tag=9, code=OptodeErrorCode.UNKNOWN_COMMAND
        )
        too_long = decode_reply(await exchange(port, b"S" * 300 + b"\r\n"))
        assert too_long == ErrorReply(tag=0, code=OptodeErrorCode.LINE_TOO_LONG)
        # the port still works afterwards
        assert isinstance(await ask(port, OptodeCommand.SAMPLE, 4), Measurement)


async def test_a_request_may_arrive_in_pieces(port: serial.Serial) -> None:
    async with asyncio.timeout(BOUND_S):
        line = encode_request(OptodeRequest(command=OptodeCommand.SAMPLE, tag=5))
        port.write(line[:7])
        await asyncio.sleep(0.01)  # let the emulator read the first piece
        port.write(line[7:])
        reply = decode_reply(await asyncio.to_thread(port.readline))
        assert isinstance(reply, Measurement) and reply.tag == 5


@pytest.mark.parametrize(
    "fault",
    [
        Fault(kind=FaultKind.DROPOUT, chamber="c1", sensor="optode"),
        Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c1", sensor="optode"),
        Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c1"),
        Fault(kind=FaultKind.POWER_LOSS),
    ],
    ids=["dropout", "comm-timeout-optode", "comm-timeout-all", "power-loss"],
)
async def test_faults_leave_the_optode_silent(
    rack: Rack, server: RackServer, port: serial.Serial, fault: Fault
) -> None:
    async with asyncio.timeout(BOUND_S):
        rack.inject(fault)
        line = encode_request(OptodeRequest(command=OptodeCommand.SAMPLE, tag=6))
        assert await exchange(port, line) == b""
        assert server.optodes["c1"].silent == 1
        rack.clear_faults()
        reply = await ask(port, OptodeCommand.SAMPLE, 7)
        assert isinstance(reply, Measurement) and reply.tag == 7


async def test_other_chambers_optode_keeps_answering(rack: Rack, server: RackServer) -> None:
    async with asyncio.timeout(BOUND_S):
        rack.inject(Fault(kind=FaultKind.DROPOUT, chamber="c1", sensor="optode"))
        path = server.announcement.optodes["c2"]
        with serial.Serial(path, 9600, timeout=READ_TIMEOUT_S) as other:
            reply = await ask(other, OptodeCommand.SAMPLE, 8)
            assert isinstance(reply, Measurement)
        assert server.optodes["c1"].silent == 0


READING = dict(o2_umol_l=250.0, o2_sat_pct=95.0, temperature_c=20.0, phase_deg=40.0)


@pytest.mark.parametrize(
    ("changes", "expected", "status"),
    [
        ({}, {}, OptodeStatus.OK),
        ({"o2_umol_l": -150.0}, {"o2_umol_l": -100.0}, OptodeStatus.O2_RANGE),
        ({"o2_sat_pct": 620.0}, {"o2_sat_pct": 500.0}, OptodeStatus.O2_RANGE),
        ({"temperature_c": 71.5}, {"temperature_c": 60.0}, OptodeStatus.TEMPERATURE_RANGE),
        (
            {"temperature_c": -12.0, "o2_umol_l": 3100.0},
            {"temperature_c": -10.0, "o2_umol_l": 3000.0},
            OptodeStatus.TEMPERATURE_RANGE | OptodeStatus.O2_RANGE,
        ),
        ({"o2_umol_l": float("nan")}, {"o2_umol_l": -100.0}, OptodeStatus.O2_RANGE),
    ],
)
def test_out_of_range_readings_are_clamped_and_flagged(
    changes: dict[str, float], expected: dict[str, float], status: OptodeStatus
) -> None:
    reading = OptodeReading(**{**READING, **changes})
    measurement = measurement_from_reading(11, reading)
    assert measurement == Measurement(tag=11, status=status, **{**READING, **expected})


def test_calibration_needs_a_dated_rack() -> None:
    with pytest.raises(ValueError, match="start_utc"):
        OptodeEmulator(Rack(small_rig(), seed=0), "c1", serial="X1")
    emulator = OptodeEmulator(
        Rack(small_rig(), seed=0, start_utc=dt.datetime(2024, 2, 29, 23, 0, tzinfo=dt.UTC)),
        "c2",
        serial="X2",
    )
    assert emulator.calibration.date == dt.date(2024, 2, 29)
    with pytest.raises(KeyError):
        OptodeEmulator(Rack(small_rig(), seed=0, start_utc=START), "c9", serial="X3")
