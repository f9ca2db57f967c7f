"""Pure codec for the optode line protocol: typed requests and replies <-> ASCII lines.

Rules of this module
--------------------
- No I/O, no clock, no transport imports. Bytes in, typed records out, and back
  (``hardware-notes/optode-line-protocol.md`` is the prose version of this file).
- A line is ``BODY|CCCC`` plus CR LF. ``CCCC`` is the CRC-16/XMODEM of the BODY bytes
  (polynomial 0x1021, initial value 0, no reflection, no final XOR) as four upper-case hex
  digits. BODY is a keyword followed by ``key=value`` fields separated by single spaces, in the
  documented order; every value has one exact textual form, so any garbling is caught.
- Decoding never raises anything but :class:`OptodeLineError` (a
  :class:`~controller.errors.SquallError`) naming the field.
"""

from __future__ import annotations

import binascii
import re
from collections.abc import Sequence
from typing import Any

from controller.drivers._optode_records import (
    REPLY_FIELDS,
    TAG_REQUEST,
    CalibrationRecord,
    DeviceInfo,
    ErrorReply,
    FieldSpec,
    Measurement,
    OptodeCommand,
    OptodeErrorCode,
    OptodeLineError,
    OptodeReply,
    OptodeRequest,
)
from controller.errors import SquallError

__all__ = [
    "MAX_LINE_BYTES",
    "TERMINATOR",
    "LineSplitter",
    "crc16_xmodem",
    "decode_reply",
    "decode_request",
    "encode_reply",
    "encode_request",
]

TERMINATOR = b"\r\n"
"""Every line ends with CR LF; a bare LF is accepted on input."""
MAX_LINE_BYTES = 120
"""Longest legal line including its CR LF, bytes."""
_MAX_CONTENT = MAX_LINE_BYTES - len(TERMINATOR)


def crc16_xmodem(data: bytes) -> int:
    """CRC-16/XMODEM of ``data`` (poly 0x1021, init 0x0000, no reflection, xorout 0).

    Parameters
    ----------
    data
        Bytes to check (no unit).

    Returns
    -------
    int
        The CRC, 0..65535 (no unit). Check value: ``crc16_xmodem(b"123456789") == 0x31C3``.
    """
    return binascii.crc_hqx(data, 0)


_REPLY_KEYWORD: dict[type, str] = {
    Measurement: "DATA",
    DeviceInfo: "INFO",
    CalibrationRecord: "CAL",
    ErrorReply: "ERR",
}
_REPLY_CLASS: dict[str, type] = {v: k for k, v in _REPLY_KEYWORD.items()}


# --------------------------------------------------------------------------- framing


def _frame(body: str) -> bytes:
    raw = body.encode("ascii")
    line = raw + b"|" + f"{crc16_xmodem(raw):04X}".encode("ascii") + TERMINATOR
    if len(line) > MAX_LINE_BYTES:  # pragma: no cover - every record fits by construction
        raise SquallError(f"line of {len(line)} bytes exceeds {MAX_LINE_BYTES}", field="line")
    return line


def _unframe(line: bytes, *, source: str | None) -> list[str]:
    """Check framing and checksum; return the body's tokens."""

    def fail(message: str, code: OptodeErrorCode, field: str = "line") -> OptodeLineError:
        return OptodeLineError(message, code=code, field=field, file=source)

    if not isinstance(line, bytes | bytearray):
        raise fail(f"expected bytes, got {type(line).__name__}", OptodeErrorCode.BAD_ARGUMENT)
    content = bytes(line)
    if content.endswith(b"\n"):
        content = content[:-2] if content.endswith(b"\r\n") else content[:-1]
    if len(content) > _MAX_CONTENT:
        raise fail(
            f"line longer than {MAX_LINE_BYTES} bytes with its CR LF",
            OptodeErrorCode.LINE_TOO_LONG,
        )
    bad = next((b for b in content if not 0x20 <= b <= 0x7E), None)
    if bad is not None:
        raise fail(f"byte 0x{bad:02X} is not printable ASCII", OptodeErrorCode.BAD_ARGUMENT)
    text = content.decode("ascii")
    body, sep, crc_text = text.rpartition("|")
    if not sep or "|" in body:
        raise fail("expected exactly one '|' before the checksum", OptodeErrorCode.BAD_CHECKSUM)
    if not re.fullmatch(r"[0-9A-F]{4}", crc_text):
        raise fail(
            f"checksum {crc_text!r} is not four upper-case hex digits",
            OptodeErrorCode.BAD_CHECKSUM,
            "checksum",
        )
    expected = crc16_xmodem(body.encode("ascii"))
    if int(crc_text, 16) != expected:
        raise fail(
            f"checksum {crc_text} does not match the line (CRC-16/XMODEM {expected:04X})",
            OptodeErrorCode.BAD_CHECKSUM,
            "checksum",
        )
    tokens = body.split(" ")
    if not body or any(not t for t in tokens):
        raise fail("empty line or doubled/leading/trailing space", OptodeErrorCode.BAD_ARGUMENT)
    return tokens


def _parse_fields(
    tokens: Sequence[str],
    specs: Sequence[FieldSpec],
    *,
    prefix: str,
    source: str | None,
    code: OptodeErrorCode,
) -> dict[str, Any]:
    """Parse ``key=value`` tokens that must match ``specs`` one to one, in order."""
    values: dict[str, Any] = {}
    tag = 0
    for i, spec in enumerate(specs):
        field = f"{prefix}.{spec.key}"
        if i >= len(tokens):
            raise OptodeLineError(
                f"missing field {spec.key!r}", code=code, tag=tag, field=field, file=source
            )
        key, sep, text = tokens[i].partition("=")
        if not sep or key != spec.key:
            raise OptodeLineError(
                f"expected '{spec.key}=...' at position {i + 1}, got {tokens[i]!r}",
                code=code,
                tag=tag,
                field=field,
                file=source,
            )
        try:
            if not spec.pattern.fullmatch(text):
                raise ValueError("malformed")
            value = spec.parse(text)
        except ValueError:
            raise OptodeLineError(
                f"malformed value {text!r}", code=code, tag=tag, field=field, file=source
            ) from None
        problem = spec.check(value)
        if problem is not None:
            raise OptodeLineError(problem, code=code, tag=tag, field=field, file=source)
        values[spec.key] = value
        if spec.key == "tag":
            tag = value
    if len(tokens) > len(specs):
        extra = tokens[len(specs)].partition("=")[0]
        raise OptodeLineError(
            f"unexpected extra field {tokens[len(specs)]!r}",
            code=code,
            tag=tag,
            field=f"{prefix}.{extra}",
            file=source,
        )
    return values


def _body(keyword: str, record: object) -> str:
    parts = [keyword]
    for spec in REPLY_FIELDS[keyword]:
        parts.append(f"{spec.key}={spec.format(getattr(record, spec.key))}")
    return " ".join(parts)


# --------------------------------------------------------------------------- public API


def encode_request(request: OptodeRequest) -> bytes:
    """Encode a request line.

    Parameters
    ----------
    request
        The request (no unit).

    Returns
    -------
    bytes
        One line, ``KEYWORD tag=N|CCCC`` plus CR LF (no unit).
    """
    return _frame(f"{request.command.value} tag={request.tag}")


def decode_request(line: bytes, *, source: str | None = None) -> OptodeRequest:
    """Decode a request line (the optode's side).

    Parameters
    ----------
    line
        One line, with or without its CR LF (no unit).
    source
        Where the line came from (a port path), named in errors (no unit).

    Returns
    -------
    OptodeRequest
        The request (no unit).

    Raises
    ------
    OptodeLineError
        The line is malformed; ``code`` says which ERR reply a device sends back.
    """
    tokens = _unframe(line, source=source)
    try:
        command = OptodeCommand(tokens[0])
    except ValueError:
        tag = 0
        if len(tokens) == 2:
            key, _, text = tokens[1].partition("=")
            if key == "tag" and TAG_REQUEST.pattern.fullmatch(text):
                tag = int(text) if TAG_REQUEST.check(int(text)) is None else 0
        raise OptodeLineError(
            f"unknown command {tokens[0]!r}; known: {', '.join(c.value for c in OptodeCommand)}",
            code=OptodeErrorCode.UNKNOWN_COMMAND,
            tag=tag,
            field="request.command",
            file=source,
        ) from None
    values = _parse_fields(
        tokens[1:],
        (TAG_REQUEST,),
        prefix="request",
        source=source,
        code=OptodeErrorCode.BAD_ARGUMENT,
    )
    return OptodeRequest(command=command, tag=values["tag"])


def encode_reply(reply: OptodeReply) -> bytes:
    """Encode a reply line (the optode's side).

    Parameters
    ----------
    reply
        A :class:`Measurement`, :class:`DeviceInfo`, :class:`CalibrationRecord` or
        :class:`ErrorReply` (no unit).

    Returns
    -------
    bytes
        One line, ``KEYWORD key=value ...|CCCC`` plus CR LF (no unit).
    """
    keyword = _REPLY_KEYWORD.get(type(reply))
    if keyword is None:
        raise SquallError(f"cannot encode {type(reply).__name__} as an optode reply")
    return _frame(_body(keyword, reply))


def decode_reply(line: bytes, *, source: str | None = None) -> OptodeReply:
    """Decode a reply line (the controller's side).

    Parameters
    ----------
    line
        One line, with or without its CR LF (no unit).
    source
        Where the line came from (a port path), named in errors (no unit).

    Returns
    -------
    OptodeReply
        The typed reply (no unit).

    Raises
    ------
    OptodeLineError
        The line is malformed, garbled or out of range; the message names the field.
    """
    tokens = _unframe(line, source=source)
    keyword = tokens[0]
    cls = _REPLY_CLASS.get(keyword)
    if cls is None:
        raise OptodeLineError(
            f"unknown reply {keyword!r}; known: {', '.join(_REPLY_CLASS)}",
            code=OptodeErrorCode.BAD_ARGUMENT,
            field="reply.keyword",
            file=source,
        )
    values = _parse_fields(
        tokens[1:],
        REPLY_FIELDS[keyword],
        prefix="reply",
        source=source,
        code=OptodeErrorCode.BAD_ARGUMENT,
    )
    if cls is ErrorReply:
        try:
            values["code"] = OptodeErrorCode(values["code"])
        except ValueError:
            raise OptodeLineError(
                f"unknown error code {values['code']}",
                code=OptodeErrorCode.BAD_ARGUMENT,
                tag=values["tag"],
                field="reply.code",
                file=source,
            ) from None
    try:
        record: OptodeReply = cls(**values)
    except SquallError as exc:  # cross-field checks (e.g. phase100 below phase0)
        raise OptodeLineError(
            exc.message,
            code=OptodeErrorCode.BAD_ARGUMENT,
            tag=values["tag"],
            field=exc.field,
            file=source,
        ) from None
    return record


class LineSplitter:
    """Turns a byte stream into lines (sans I/O): feed bytes, get complete lines back.

    Lines are returned without their CR LF (or bare LF). A line longer than
    :data:`MAX_LINE_BYTES` is returned cut to one byte over the limit, so the decoder
    rejects it as too long instead of the splitter buffering without bound.
    """

    def __init__(self) -> None:
        self._buffer = bytearray()
        self._overlong = False

    def feed(self, data: bytes) -> list[bytes]:
        """Add received bytes; return the lines they complete.

        Parameters
        ----------
        data
            Bytes as read from the port (no unit).

        Returns
        -------
        list of bytes
            Complete lines, terminator removed, in order (no unit).
        """
        lines: list[bytes] = []
        start = 0
        limit = _MAX_CONTENT + 1  # content plus a CR; one byte more already marks "too long"
        while True:
            end = data.find(b"\n", start)
            chunk = data[start:] if end < 0 else data[start:end]
            room = limit - len(self._buffer)
            if len(chunk) > room:
                self._overlong = True
                chunk = chunk[:room]
            self._buffer += chunk
            if end < 0:
                return lines
            line = bytes(self._buffer)
            if line.endswith(b"\r") and not self._overlong:
                line = line[:-1]
            lines.append(line)
            self._buffer.clear()
            self._overlong = False
            start = end + 1

    @property
    def pending(self) -> int:
        """Bytes of an incomplete line held, count."""
        return len(self._buffer)
