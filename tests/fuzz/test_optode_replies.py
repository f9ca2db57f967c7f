"""Optode line replies: whatever arrives on the serial line decodes to a record or to a clear,
declared error (:class:`OptodeLineError`, a ``SquallError``), never to another exception.

Beyond random bytes (``tests/drivers`` has those), the cases here get past the checksum: valid
replies have their body edited (fields dropped, doubled, reordered, renamed, given odd values)
and are framed again with a correct CRC, so the field parser and the range checks see them.
What decodes must be the line's one exact form (re-encoding gives the same bytes); what fails
must name a field (``line``, ``checksum`` or ``reply.<field>``) and say something.
"""

from __future__ import annotations

import datetime as dt

from hypothesis import event, given
from hypothesis import strategies as st

from controller.drivers import (
    CalibrationRecord,
    DeviceInfo,
    ErrorReply,
    LineSplitter,
    Measurement,
    OptodeErrorCode,
    OptodeLineError,
    OptodeReply,
    OptodeStatus,
    crc16_xmodem,
    decode_reply,
    decode_request,
    encode_reply,
)
from controller.errors import SquallError

from ._harness import budget


def framed(body: bytes) -> bytes:
    """``body`` framed as a line with a correct checksum (so only its content can be wrong)."""
    return body + b"|" + f"{crc16_xmodem(body):04X}".encode("ascii") + b"\r\n"


def grid(decimals: int, low: float, high: float) -> st.SearchStrategy[float]:
    """Values on the wire's resolution inside a range."""
    scale = 10**decimals
    return st.integers(round(low * scale), round(high * scale)).map(lambda n: n / scale)


_TAGS = st.integers(0, 65535)
_TOKENS = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9._-]{0,23}", fullmatch=True)
REPLIES: st.SearchStrategy[OptodeReply] = st.one_of(
    st.builds(
        Measurement,
        tag=_TAGS,
        o2_umol_l=grid(2, -100, 3000),
        o2_sat_pct=grid(2, -10, 500),
        temperature_c=grid(3, -10, 60),
        phase_deg=grid(3, 0, 90),
        status=st.sampled_from(list(OptodeStatus)),
    ),
    st.builds(DeviceInfo, tag=_TAGS, serial=_TOKENS, firmware=_TOKENS, protocol=st.integers(1, 99)),
    st.builds(
        CalibrationRecord,
        tag=_TAGS,
        phase0_deg=grid(3, 45, 90),
        phase100_deg=grid(3, 0, 44.999),
        temperature_c=grid(3, -10, 60),
        pressure_hpa=grid(1, 500, 1100),
        date=st.dates(dt.date(1000, 1, 1), dt.date(9999, 12, 31)),
    ),
    st.builds(ErrorReply, tag=_TAGS, code=st.sampled_from(OptodeErrorCode)),
)

_ODD_VALUES = st.one_of(
    st.sampled_from(
        [
            "",
            "nan",
            "NaN",
            "inf",
            "-inf",
            "1e3",
            "1E-3",
            "+1",
            "-0",
            "-0.000",
            "00.5",
            ".5",
            "5.",
            "1_000",
            "0x1F",
            "99999999999999999999",
            "-99999999999999999999.999",
            "2027-02-30",
            "2027-13-01",
            "0000-01-01",
            "20270101",
            "65536",
            "-1",
            "0",
            "1",
            "DATA",
            "a=b",
            "=",
        ]
    ),
    st.text(alphabet="0123456789.-+eE:abcdefABCDEF_=", max_size=12),
)
_KEYWORDS = st.sampled_from(["DATA", "INFO", "CAL", "ERR", "SAMPLE", "IDENT", "data", "", "X"])


@st.composite
def edited_body(draw: st.DrawFn) -> bytes:
    """The body of a valid reply with one to three edits of its fields."""
    line = encode_reply(draw(REPLIES))
    body = line[: line.rindex(b"|")].decode("ascii")
    tokens = body.split(" ")
    for _ in range(draw(st.integers(1, 3))):
        edit = draw(
            st.sampled_from(["value", "key", "drop", "double", "swap", "keyword", "join", "space"])
        )
        k = draw(st.integers(0, len(tokens) - 1)) if tokens else 0
        if not tokens:
            tokens = [draw(_KEYWORDS)]
        elif edit == "value" and k > 0:
            key = tokens[k].partition("=")[0]
            tokens[k] = f"{key}={draw(_ODD_VALUES)}"
        elif edit == "key" and k > 0:
            value = tokens[k].partition("=")[2]
            tokens[k] = f"{draw(st.sampled_from(['tag', 'o2', 'code', 'date', 'x', '']))}={value}"
        elif edit == "drop":
            del tokens[k]
        elif edit == "double":
            tokens.insert(k, tokens[k])
        elif edit == "swap":
            j = draw(st.integers(0, len(tokens) - 1))
            tokens[k], tokens[j] = tokens[j], tokens[k]
        elif edit == "keyword":
            tokens[0] = draw(_KEYWORDS)
        elif edit == "join" and len(tokens) > 1:
            tokens[k : k + 2] = ["".join(tokens[k : k + 2])]
        else:
            tokens.insert(k, "")  # a doubled space
    return " ".join(tokens).encode("ascii")


def judge(line: bytes) -> OptodeReply | None:
    """Decode ``line``; a record must be the line's one exact form, an error must be clear."""
    try:
        reply = decode_reply(line)
    except OptodeLineError as error:
        assert isinstance(error, SquallError)
        assert isinstance(error.code, OptodeErrorCode)
        assert (
            error.field == "line"
            or error.field == "checksum"
            or (error.field is not None and error.field.startswith("reply."))
        ), error.field
        assert len(error.message.strip()) >= 8, error.message
        assert "\n" not in error.one_line()
        event(f"refused: {error.field.split('.')[0]}")
        return None
    content = line[:-2] if line.endswith(b"\r\n") else line.removesuffix(b"\n")
    assert encode_reply(reply) == content + b"\r\n"
    event("decoded")
    return reply


@budget(500)
@given(body=edited_body())
def test_edited_replies_with_good_checksums(body: bytes) -> None:
    judge(framed(body))


@budget(300)
@given(
    body=st.text(alphabet=st.characters(min_codepoint=0x20, max_codepoint=0x7E), max_size=118).map(
        str.encode
    )
)
def test_printable_bodies_with_good_checksums(body: bytes) -> None:
    judge(framed(body))


@budget(300)
@given(data=st.binary(max_size=200))
def test_arbitrary_bytes_requests_too(data: bytes) -> None:
    judge(data)
    try:  # the simulator's side of the same line protocol
        decode_request(data)
    except OptodeLineError as error:
        assert error.field is not None and len(error.message.strip()) >= 8


@budget(100)
@given(
    stream=st.lists(
        st.one_of(
            REPLIES.map(lambda r: ("good", encode_reply(r))),
            st.binary(max_size=60)
            .map(lambda b: b.replace(b"\n", b""))
            .map(lambda b: ("junk", b + b"\n")),
        ),
        max_size=12,
    ),
    cuts=st.lists(st.integers(0, 2000), max_size=8),
)
def test_a_noisy_stream_never_corrupts_its_good_lines(
    stream: list[tuple[str, bytes]], cuts: list[int]
) -> None:
    """Junk lines between good ones, the stream read in random chunks: every good line still
    decodes to its record, every junk line to a record or a clear error."""
    data = b"".join(chunk for _, chunk in stream)
    splitter = LineSplitter()
    lines: list[bytes] = []
    start = 0
    for cut in [*sorted({c % (len(data) + 1) for c in cuts}), len(data)]:
        lines.extend(splitter.feed(data[start:cut]))
        start = cut
    assert len(lines) == len(stream)
    for (kind, original), line in zip(stream, lines, strict=True):
        reply = judge(line)
        if kind == "good":
            assert reply is not None and encode_reply(reply) == original
