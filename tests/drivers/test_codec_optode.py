"""Optode line protocol codec: framing, checksum, fields, errors, and the documented example."""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from controller.drivers import (
    MAX_LINE_BYTES,
    CalibrationRecord,
    DeviceInfo,
    ErrorReply,
    LineSplitter,
    Measurement,
    OptodeCommand,
    OptodeErrorCode,
    OptodeLineError,
    OptodeReply,
    OptodeRequest,
    OptodeStatus,
    crc16_xmodem,
    decode_reply,
    decode_request,
    encode_reply,
    encode_request,
)
from controller.errors import SquallError

DOC = Path(__file__).resolve().parents[2] / "hardware-notes" / "optode-line-protocol.md"


def crc16_bitwise(data: bytes) -> int:
    """Textbook bit-serial CRC-16/XMODEM, independent of binascii (poly 0x1021, init 0)."""
    crc = 0
    for byte in data:
        crc ^= byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else (crc << 1)
            crc &= 0xFFFF
    return crc


def framed(body: str) -> bytes:
    return body.encode() + b"|" + f"{crc16_bitwise(body.encode()):04X}".encode() + b"\r\n"


# --------------------------------------------------------------------------- checksum


def test_crc_check_value() -> None:
    # CRC-16/XMODEM check value 0x31C3 for "123456789" (CRC catalogue, from memory)
    assert crc16_xmodem(b"123456789") == 0x31C3
    assert crc16_bitwise(b"123456789") == 0x31C3


@given(data=st.binary(max_size=200))
def test_crc_matches_the_bitwise_definition(data: bytes) -> None:
    assert crc16_xmodem(data) == crc16_bitwise(data)


# --------------------------------------------------------------------------- the documented example


def doc_example(label: str) -> bytes:
    text = DOC.read_text(encoding="utf-8")
    match = re.search(rf"<!-- example: {label} -->\s*```\n(.*?)\n```", text, re.S)
    assert match, f"no '{label}' example in {DOC.name}"
    return match.group(1).encode("ascii")


def test_doc_request_example_decodes() -> None:
    assert decode_request(doc_example("request")) == OptodeRequest(
        command=OptodeCommand.SAMPLE, tag=7
    )
    assert encode_request(OptodeRequest(command=OptodeCommand.SAMPLE, tag=7)) == (
        doc_example("request") + b"\r\n"
    )


def test_doc_reply_example_decodes_to_the_stated_values() -> None:
    reply = decode_reply(doc_example("reply"))
    assert reply == Measurement(
        tag=7,
        o2_umol_l=231.45,
        o2_sat_pct=98.12,
        temperature_c=18.503,
        phase_deg=32.114,
        status=OptodeStatus.OK,
    )


def test_doc_error_example_is_what_the_garbled_request_earns() -> None:
    with pytest.raises(OptodeLineError) as info:
        decode_request(b"SAMPLE tag=|6351")
    assert decode_reply(doc_example("error")) == ErrorReply(
        tag=info.value.tag, code=info.value.code
    )


def test_doc_crc_table_matches_the_bitwise_crc() -> None:
    text = DOC.read_text(encoding="utf-8")
    row = re.search(r"^\| CRC \|(.*)\|$", text, re.M)
    assert row
    documented = [cell.strip() for cell in row.group(1).split("|")]
    body = b"SAMPLE tag=7"
    assert documented == [f"{crc16_bitwise(body[: i + 1]):04X}" for i in range(len(body))]


# --------------------------------------------------------------------------- tables


REPLIES: list[tuple[OptodeReply, bytes]] = [
    (
        Measurement(
            tag=65535,
            o2_umol_l=-3.5,
            o2_sat_pct=0.0,
            temperature_c=-1.25,
            phase_deg=60.0,
            status=OptodeStatus.LOW_SIGNAL | OptodeStatus.O2_RANGE,
        ),
        framed(
            "DATA tag=65535 o2_umol_l=-3.50 o2_sat_pct=0.00 temperature_c=-1.250 "
            "phase_deg=60.000 status=05"
        ),
    ),
    (
        DeviceInfo(tag=8, serial="SL-OPT-0003", firmware="2.1.0"),
        framed("INFO tag=8 serial=SL-OPT-0003 firmware=2.1.0 protocol=1"),
    ),
    (
        CalibrationRecord(
            tag=9,
            phase0_deg=61.25,
            phase100_deg=28.93,
            temperature_c=20.0,
            pressure_hpa=1013.2,
            date=dt.date(2025, 3, 14),
        ),
        framed(
            "CAL tag=9 phase0_deg=61.250 phase100_deg=28.930 temperature_c=20.000 "
            "pressure_hpa=1013.2 date=2025-03-14"
        ),
    ),
    (ErrorReply(tag=10, code=OptodeErrorCode.UNKNOWN_COMMAND), framed("ERR tag=10 code=1")),
]


@pytest.mark.parametrize(("reply", "line"), REPLIES, ids=lambda x: type(x).__name__)
def test_reply_table(reply: OptodeReply, line: bytes) -> None:
    assert encode_reply(reply) == line
    assert decode_reply(line) == reply
    assert decode_reply(line.rstrip(b"\r\n") + b"\n") == reply  # bare LF accepted
    assert decode_reply(line.rstrip(b"\r\n")) == reply  # terminator already stripped


@pytest.mark.parametrize("command", list(OptodeCommand))
def test_request_table(command: OptodeCommand) -> None:
    line = framed(f"{command.value} tag=42")
    assert encode_request(OptodeRequest(command=command, tag=42)) == line
    assert decode_request(line) == OptodeRequest(command=command, tag=42)


GOOD_DATA = "DATA tag=7 o2_umol_l=231.45 o2_sat_pct=98.12 temperature_c=18.503 phase_deg=32.114"

# (line, field named in the error, message fragment)
BAD_REPLIES: list[tuple[bytes, str, str]] = [
    (framed(GOOD_DATA + " status=00").replace(b"|", b"|0"), "checksum", "four upper-case"),
    (b"ERR tag=10 code=1|2ae3", "checksum", "four upper-case"),  # right CRC, lower case
    (GOOD_DATA.encode() + b" status=00|0000", "checksum", "does not match"),
    (GOOD_DATA.encode() + b" status=00", "line", "exactly one '|'"),
    (framed(GOOD_DATA + " status=00|x"), "line", "exactly one '|'"),
    (framed(GOOD_DATA + " status=0"), "reply.status", "malformed value '0'"),
    (framed(GOOD_DATA + " status=0a"), "reply.status", "malformed value '0a'"),
    (framed(GOOD_DATA + " status=10"), "reply.status", "malformed value '10'"),
    (framed(GOOD_DATA), "reply.status", "missing field 'status'"),
    (framed(GOOD_DATA + " status=00 extra=1"), "reply.extra", "unexpected extra field"),
    (framed(GOOD_DATA.replace("231.45", "231.4") + " status=00"), "reply.o2_umol_l", "malformed"),
    (framed(GOOD_DATA.replace("231.45", "abc") + " status=00"), "reply.o2_umol_l", "malformed"),
    (framed(GOOD_DATA.replace("231.45", "+231.45") + " status=00"), "reply.o2_umol_l", "malformed"),
    (framed(GOOD_DATA.replace("231.45", "0231.45") + " status=00"), "reply.o2_umol_l", "malformed"),
    (framed(GOOD_DATA.replace("231.45", "3000.01") + " status=00"), "reply.o2_umol_l", "outside"),
    (framed(GOOD_DATA.replace("32.114", "90.001") + " status=00"), "reply.phase_deg", "outside"),
    (framed(GOOD_DATA.replace("18.503", "1e1") + " status=00"), "reply.temperature_c", "malformed"),
    (framed(GOOD_DATA.replace("tag=7", "tag=07") + " status=00"), "reply.tag", "malformed"),
    (framed(GOOD_DATA.replace("tag=7", "tag=65536") + " status=00"), "reply.tag", "outside"),
    (
        framed(GOOD_DATA.replace("o2_sat_pct", "sat_pct") + " status=00"),
        "reply.o2_sat_pct",
        "expected",
    ),
    (framed(GOOD_DATA.replace(" o2_sat", "  o2_sat") + " status=00"), "line", "doubled"),
    (framed(" " + GOOD_DATA + " status=00"), "line", "doubled/leading"),
    (framed(""), "line", "empty line"),
    (framed("HELLO tag=1"), "reply.keyword", "unknown reply 'HELLO'"),
    (framed("ERR tag=1 code=9"), "reply.code", "unknown error code 9"),
    (framed("INFO tag=1 serial=a/b firmware=1 protocol=1"), "reply.serial", "malformed"),
    (framed("INFO tag=1 serial=a firmware=1 protocol=0"), "reply.protocol", "outside 1..99"),
    (
        framed(
            "CAL tag=1 phase0_deg=20.000 phase100_deg=30.000 temperature_c=20.000 "
            "pressure_hpa=1013.2 date=2025-03-14"
        ),
        "reply.phase100_deg",
        "must be below phase0_deg",
    ),
    (
        framed(
            "CAL tag=1 phase0_deg=60.000 phase100_deg=30.000 temperature_c=20.000 "
            "pressure_hpa=1013.2 date=2025-02-30"
        ),
        "reply.date",
        "malformed value '2025-02-30'",
    ),
    (b"DATA \xff|0000", "line", "not printable ASCII"),
    (b"DATA\ttag=1|0000", "line", "not printable ASCII"),
    (b"x" * 119, "line", "longer than 120 bytes"),
]


@pytest.mark.parametrize(("line", "field", "message"), BAD_REPLIES)
def test_malformed_replies_name_the_field(line: bytes, field: str, message: str) -> None:
    with pytest.raises(OptodeLineError, match=re.escape(message)) as info:
        decode_reply(line, source="/dev/pts/9")
    assert info.value.field == field
    assert info.value.file == "/dev/pts/9"
    assert isinstance(info.value, SquallError)
    assert info.value.one_line().startswith(f"/dev/pts/9: {field}: ")


BAD_REQUESTS: list[tuple[bytes, OptodeErrorCode, int, str]] = [
    (framed("MEASURE tag=5"), OptodeErrorCode.UNKNOWN_COMMAND, 5, "request.command"),
    (framed("MEASURE"), OptodeErrorCode.UNKNOWN_COMMAND, 0, "request.command"),
    (framed("MEASURE tag=0"), OptodeErrorCode.UNKNOWN_COMMAND, 0, "request.command"),
    (b"SAMPLE tag=5|0000", OptodeErrorCode.BAD_CHECKSUM, 0, "checksum"),
    (framed("SAMPLE tag=0"), OptodeErrorCode.BAD_ARGUMENT, 0, "request.tag"),
    (framed("SAMPLE"), OptodeErrorCode.BAD_ARGUMENT, 0, "request.tag"),
    (framed("SAMPLE tag=5 now=1"), OptodeErrorCode.BAD_ARGUMENT, 5, "request.now"),
    (b"S" * 200, OptodeErrorCode.LINE_TOO_LONG, 0, "line"),
]


@pytest.mark.parametrize(("line", "code", "tag", "field"), BAD_REQUESTS)
def test_malformed_requests_carry_the_error_reply_code(
    line: bytes, code: OptodeErrorCode, tag: int, field: str
) -> None:
    with pytest.raises(OptodeLineError) as info:
        decode_request(line)
    assert (info.value.code, info.value.tag, info.value.field) == (code, tag, field)


def test_records_refuse_invalid_values() -> None:
    with pytest.raises(SquallError) as info:
        Measurement(tag=1, o2_umol_l=float("nan"), o2_sat_pct=0, temperature_c=0, phase_deg=0)
    assert info.value.field == "reply.o2_umol_l"
    with pytest.raises(SquallError, match="reserved bits"):
        Measurement(
            tag=1,
            o2_umol_l=0,
            o2_sat_pct=0,
            temperature_c=0,
            phase_deg=0,
            status=OptodeStatus(0x30),
        )
    with pytest.raises(SquallError) as info:
        OptodeRequest(command=OptodeCommand.SAMPLE, tag=0)
    assert info.value.field == "request.tag"
    with pytest.raises(SquallError) as info:
        DeviceInfo(tag=1, serial="with space", firmware="1")
    assert info.value.field == "reply.serial"
    with pytest.raises(SquallError) as info:
        ErrorReply(tag=1, code=3)  # type: ignore[arg-type]
    assert info.value.field == "reply.code"
    with pytest.raises(SquallError, match="cannot encode"):
        encode_reply(OptodeRequest(command=OptodeCommand.SAMPLE, tag=1))  # type: ignore[arg-type]


# --------------------------------------------------------------------------- properties


def grid(decimals: int, low: float, high: float) -> st.SearchStrategy[float]:
    scale = 10**decimals
    return st.integers(round(low * scale), round(high * scale)).map(lambda i: i / scale)


tags = st.integers(0, 65535)
measurements = st.builds(
    Measurement,
    tag=tags,
    o2_umol_l=grid(2, -100, 3000),
    o2_sat_pct=grid(2, -10, 500),
    temperature_c=grid(3, -10, 60),
    phase_deg=grid(3, 0, 90),
    status=st.integers(0, 15).map(OptodeStatus),
)
tokens = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9._-]{0,23}", fullmatch=True)
infos = st.builds(DeviceInfo, tag=tags, serial=tokens, firmware=tokens, protocol=st.integers(1, 99))
calibrations = st.builds(
    CalibrationRecord,
    tag=tags,
    phase0_deg=grid(3, 45, 90),
    phase100_deg=grid(3, 0, 44.999),
    temperature_c=grid(3, -10, 60),
    pressure_hpa=grid(1, 500, 1100),
    date=st.dates(dt.date(1000, 1, 1), dt.date(9999, 12, 31)),
)
errors = st.builds(ErrorReply, tag=tags, code=st.sampled_from(OptodeErrorCode))
replies = st.one_of(measurements, infos, calibrations, errors)
requests = st.builds(
    OptodeRequest, command=st.sampled_from(OptodeCommand), tag=st.integers(1, 65535)
)


@given(reply=replies)
def test_reply_round_trip(reply: OptodeReply) -> None:
    line = encode_reply(reply)
    assert len(line) <= MAX_LINE_BYTES
    assert line.endswith(b"\r\n")
    assert decode_reply(line) == reply


@given(request=requests)
def test_request_round_trip(request: OptodeRequest) -> None:
    assert decode_request(encode_request(request)) == request


@given(data=st.binary(max_size=160))
def test_random_bytes_only_raise_squall_error(data: bytes) -> None:
    for decode in (decode_reply, decode_request):
        try:
            decode(data)
        except SquallError:
            pass


@given(
    text=st.text(
        alphabet="DATSMPLEINFOCRGK |=._-0123456789ABCDEFtagos2umlpcrehdz\r\n", max_size=120
    )
)
def test_random_protocol_alphabet_only_raises_squall_error(text: str) -> None:
    for data in (text.encode(), framed(text)):
        for decode in (decode_reply, decode_request):
            try:
                decode(data)
            except SquallError:
                pass


@given(reply=replies, position=st.integers(min_value=0), replacement=st.integers(0, 255))
def test_any_single_byte_substitution_is_detected(
    reply: OptodeReply, position: int, replacement: int
) -> None:
    line = bytearray(encode_reply(reply))
    index = position % len(line)
    if line[index] == replacement:
        return
    line[index] = replacement
    # CRC-16 catches every burst error of up to 16 bits (standard CRC property, from memory);
    # checksum digits themselves must stay upper-case hex.
    with pytest.raises(SquallError):
        decode_reply(bytes(line))


# --------------------------------------------------------------------------- line splitting


def test_splitter_reassembles_lines_across_chunks() -> None:
    splitter = LineSplitter()
    assert splitter.feed(b"SAMPLE ta") == []
    assert splitter.pending == 9
    assert splitter.feed(b"g=7|6351\r\nIDENT tag=7|2FD0\nCAL") == [
        b"SAMPLE tag=7|6351",
        b"IDENT tag=7|2FD0",
    ]
    assert splitter.feed(b"GET tag=7|0F02\r\n") == [b"CALGET tag=7|0F02"]
    assert splitter.pending == 0


def test_splitter_bounds_an_overlong_line_and_recovers() -> None:
    splitter = LineSplitter()
    out = splitter.feed(b"x" * 500)
    assert out == [] and splitter.pending <= MAX_LINE_BYTES
    (long_line, next_line) = splitter.feed(b"yyy\r\nSAMPLE tag=7|6351\r\n")
    with pytest.raises(OptodeLineError) as info:
        decode_request(long_line)
    assert info.value.code is OptodeErrorCode.LINE_TOO_LONG
    assert decode_request(next_line).tag == 7


@pytest.mark.parametrize("content_length", [117, 118, 119, 120])
def test_splitter_limit_is_exactly_the_protocol_limit(content_length: int) -> None:
    body = "SAMPLE tag=1 " + "a" * (content_length - 18)
    line = framed(body)
    assert len(line) == content_length + 2
    (got,) = LineSplitter().feed(line)
    if content_length <= MAX_LINE_BYTES - 2:
        with pytest.raises(OptodeLineError) as info:
            decode_request(got)
        assert info.value.code is OptodeErrorCode.BAD_ARGUMENT  # complete, just not a request
    else:
        with pytest.raises(OptodeLineError) as info:
            decode_request(got)
        assert info.value.code is OptodeErrorCode.LINE_TOO_LONG


@given(chunks=st.lists(st.binary(max_size=40), max_size=20))
def test_splitter_never_loses_or_invents_lines(chunks: list[bytes]) -> None:
    splitter = LineSplitter()
    lines: list[bytes] = []
    for chunk in chunks:
        lines.extend(splitter.feed(chunk))
    assert len(lines) == b"".join(chunks).count(b"\n")
    assert all(len(line) <= MAX_LINE_BYTES - 1 for line in lines)
