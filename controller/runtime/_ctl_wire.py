"""The control socket's wire protocol and where the socket lives (shared by server and client).

Rules of this module
--------------------
- Where: the run writing ``runs/x.sqlite`` listens on ``runs/x.sqlite.ctl/socket``
  (:func:`control_path`), a private folder of its own next to the log.
- Version 1: UTF-8 text, one JSON object per line in each direction. Request
  ``{"v": 1, "cmd": "hold", "args": {}, "user": "..."}`` (``args`` and ``user`` optional;
  ``user`` is informational only: the server records the operating-system user of the
  peer). Reply ``{"ok": true, "result": ...}`` or ``{"ok": false, "error": "<one line>"}``.
- Commands and their arguments: ``status``, ``hold``, ``resume``, ``abort`` take none;
  ``skip-to`` takes ``phase``; ``ack`` takes ``alarm_code`` and optionally ``chamber``
  (null or absent: every chamber); ``note`` takes ``text``. Names are at most 64 printable
  characters, a note at most 4000 characters.
- :func:`decode_line` checks a request completely and says what is wrong in one line
  (:class:`RequestError`); unknown fields and arguments are refused, not ignored.
- Pure apart from :func:`connect_path`, which may open a folder descriptor to shorten a path
  that does not fit ``sun_path``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import enum
import json
import math
import os
from collections.abc import Iterator, Mapping
from datetime import datetime
from pathlib import Path
from typing import Any

__all__ = [
    "COMMANDS",
    "MAX_REQUEST_B",
    "PROTOCOL_VERSION",
    "Reply",
    "Request",
    "RequestError",
    "connect_path",
    "control_path",
    "decode_line",
    "decode_reply",
    "done_message",
    "encode_reply",
    "encode_request",
]

PROTOCOL_VERSION = 1
"""Version of the wire protocol spoken here (the ``v`` field), dimensionless."""
MAX_REQUEST_B = 16384
"""Longest request line accepted, bytes (a note of 4000 characters fits with room)."""
_MAX_NOTE_CHARS = 4000
_MAX_NAME_CHARS = 64
_SOCKET_NAME = "socket"
_SUN_PATH_MAX_B = 107  # sun_path holds 108 bytes with the terminating NUL (Linux)


def control_path(log_path: Path) -> Path:
    """The control socket of the run writing ``log_path``.

    Parameters
    ----------
    log_path
        The run log (no unit).

    Returns
    -------
    Path
        ``<log>.ctl/socket`` next to the log (no unit).
    """
    log_path = Path(log_path)
    return log_path.with_name(log_path.name + ".ctl") / _SOCKET_NAME


@contextlib.contextmanager
def connect_path(path: Path) -> Iterator[str]:
    """A path short enough for ``sun_path`` that names ``path`` (a context manager).

    Parameters
    ----------
    path
        The socket's real path (no unit).

    Yields
    ------
    str
        ``path`` itself, or on Linux ``/proc/self/fd/N/<name>`` through an open descriptor
        of its directory when ``path`` is longer than ``sun_path`` allows (no unit).
    """
    text = os.fspath(path)
    if len(os.fsencode(text)) <= _SUN_PATH_MAX_B or not os.path.isdir("/proc/self/fd"):
        yield text
        return
    fd = os.open(Path(path).parent, os.O_RDONLY | os.O_DIRECTORY)
    try:
        yield f"/proc/self/fd/{fd}/{Path(path).name}"
    finally:
        os.close(fd)


# ---------------------------------------------------------------------- wire format
class _Arg(enum.Enum):
    """Kinds of command argument."""

    NAME = "a name"
    OPTIONAL_NAME = "a name or null"
    TEXT = "text"


_COMMANDS: dict[str, dict[str, _Arg]] = {
    "status": {},
    "hold": {},
    "resume": {},
    "abort": {},
    "skip-to": {"phase": _Arg.NAME},
    "ack": {"alarm_code": _Arg.NAME, "chamber": _Arg.OPTIONAL_NAME},
    "note": {"text": _Arg.TEXT},
}
_OPTIONAL = {("ack", "chamber")}
_DONE = {
    "hold": "protocol clock held; setpoints kept",
    "resume": "protocol clock running again",
    "abort": "run aborted; every output driven safe",
    "skip-to": "skipped to the phase",
    "ack": "alarm acknowledged",
    "note": "note written to the audit trail",
}


class RequestError(ValueError):
    """A request line that cannot be carried out as sent; the message is the reply's error."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Request:
    """One valid request.

    Attributes
    ----------
    cmd
        Command name (no unit).
    args
        Arguments, checked against the command (no unit).
    """

    cmd: str
    args: Mapping[str, Any]


def _check_arg(cmd: str, name: str, kind: _Arg, value: Any) -> Any:
    if kind is _Arg.OPTIONAL_NAME and value is None:
        return None
    if not isinstance(value, str):
        raise RequestError(f"{cmd}: argument {name!r} must be {kind.value}, got {value!r}")
    value = value.strip()
    if not value:
        raise RequestError(f"{cmd}: argument {name!r} is empty")
    limit = _MAX_NOTE_CHARS if kind is _Arg.TEXT else _MAX_NAME_CHARS
    if len(value) > limit:
        raise RequestError(f"{cmd}: argument {name!r} is longer than {limit} characters")
    if kind is not _Arg.TEXT and any(not c.isprintable() for c in value):
        raise RequestError(f"{cmd}: argument {name!r} holds control characters")
    return value


def decode_line(line: bytes) -> Request:
    """Parse and check one request line.

    Parameters
    ----------
    line
        The line without its newline, UTF-8 JSON (no unit).

    Returns
    -------
    Request
        The checked request (no unit).

    Raises
    ------
    RequestError
        With a one-line message saying what is wrong.
    """
    try:
        text = line.decode("utf-8")
    except UnicodeDecodeError:
        raise RequestError("malformed request: not UTF-8 text") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise RequestError(
            f"malformed request: not JSON ({exc.msg} at column {exc.colno})"
        ) from None
    if not isinstance(data, dict):
        raise RequestError('malformed request: expected a JSON object {"v": 1, "cmd": ...}')
    unknown = sorted(set(data) - {"v", "cmd", "args", "user"})
    if unknown:
        raise RequestError(
            f"malformed request: unknown field {unknown[0]!r} (fields: v, cmd, args, user)"
        )
    version = data.get("v")
    if "v" not in data:
        raise RequestError(
            f"malformed request: missing 'v' (this controller speaks {PROTOCOL_VERSION})"
        )
    if version != PROTOCOL_VERSION or isinstance(version, bool):
        raise RequestError(
            f"unsupported protocol version {version!r}; this controller speaks {PROTOCOL_VERSION}"
        )
    cmd = data.get("cmd")
    if not isinstance(cmd, str):
        raise RequestError("malformed request: missing 'cmd' (a command name)")
    spec = _COMMANDS.get(cmd)
    if spec is None:
        raise RequestError(f"unknown command {cmd!r}; commands: {', '.join(_COMMANDS)}")
    user = data.get("user")
    if user is not None and not isinstance(user, str):
        raise RequestError("malformed request: 'user' must be text")
    args = data.get("args", {})
    if args is None:
        args = {}
    if not isinstance(args, dict):
        raise RequestError(f"{cmd}: 'args' must be a JSON object, got {args!r}")
    extra = sorted(set(args) - set(spec))
    if extra:
        takes = ", ".join(spec) if spec else "no arguments"
        raise RequestError(f"{cmd}: unknown argument {extra[0]!r} (takes {takes})")
    checked: dict[str, Any] = {}
    for name, kind in spec.items():
        if name not in args:
            if (cmd, name) in _OPTIONAL:
                checked[name] = None
                continue
            raise RequestError(f"{cmd}: missing argument {name!r} ({kind.value})")
        checked[name] = _check_arg(cmd, name, kind, args[name])
    return Request(cmd=cmd, args=checked)


def _jsonable(value: Any) -> Any:
    """A JSON encoder fallback for the values a status holds."""
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, enum.Enum):
        return value.value
    if isinstance(value, Path):
        return str(value)
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return dataclasses.asdict(value)
    if isinstance(value, Mapping):
        return dict(value)
    if isinstance(value, (set, frozenset, tuple)):
        return list(value)
    return str(value)


def _finite(value: Any) -> Any:
    """``value`` with non-finite floats replaced by None (JSON has no NaN or infinity)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _finite(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


def encode_reply(ok: bool, payload: Any) -> bytes:
    """One reply line.

    Parameters
    ----------
    ok
        Whether the command was carried out (no unit).
    payload
        The result (ok) or the one-line error message (not ok) (no unit).

    Returns
    -------
    bytes
        UTF-8 JSON and a newline (no unit).
    """
    if ok:
        body = {"ok": True, "result": _finite(json.loads(json.dumps(payload, default=_jsonable)))}
    else:
        body = {"ok": False, "error": " ".join(str(payload).split())}
    return (json.dumps(body, ensure_ascii=False, allow_nan=False) + "\n").encode("utf-8")


COMMANDS: tuple[str, ...] = tuple(_COMMANDS)
"""Command names of the wire protocol, in the order help texts list them."""


def done_message(cmd: str) -> str:
    """What a carried-out command says when its hook returns nothing.

    Parameters
    ----------
    cmd
        Command name (no unit).

    Returns
    -------
    str
        A short sentence (no unit).
    """
    return _DONE.get(cmd, "done")


def encode_request(cmd: str, args: Mapping[str, Any] | None = None, user: str = "") -> bytes:
    """One request line.

    Parameters
    ----------
    cmd
        Command name (no unit).
    args
        Its arguments (no unit).
    user
        Informational name of the person at the keyboard (no unit).

    Returns
    -------
    bytes
        UTF-8 JSON and a newline (no unit).
    """
    body: dict[str, Any] = {"v": PROTOCOL_VERSION, "cmd": cmd, "args": dict(args or {})}
    if user:
        body["user"] = user
    return (json.dumps(body, ensure_ascii=False) + "\n").encode("utf-8")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Reply:
    """A reply as the client sees it.

    Attributes
    ----------
    ok
        Whether the command was carried out (no unit).
    result
        What it returned (ok; no unit).
    error
        Why not, one line (not ok; no unit).
    """

    ok: bool
    result: Any = None
    error: str = ""

    @property
    def message(self) -> str:
        """The error, or the result when it is text (no unit)."""
        if not self.ok:
            return self.error
        return self.result if isinstance(self.result, str) else ""


def decode_reply(line: bytes) -> Reply:
    """Parse one reply line.

    Parameters
    ----------
    line
        The line, UTF-8 JSON (no unit).

    Returns
    -------
    Reply
        The reply (no unit).

    Raises
    ------
    RequestError
        When the line is not a reply of this protocol.
    """
    try:
        data = json.loads(line.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise RequestError("the controller's reply is not JSON") from None
    if not isinstance(data, dict) or not isinstance(data.get("ok"), bool):
        raise RequestError("the controller's reply has no 'ok' field")
    if data["ok"]:
        return Reply(ok=True, result=data.get("result"))
    return Reply(ok=False, error=" ".join(str(data.get("error", "refused")).split()))
