"""A stand-in controller for the control-socket tests, a server in a thread, and a client
run as another user in a forked child.

The stand-in has the control loop's hook names and behaves like one: hold twice or resume
while running is refused with ``ValueError``, abort ends it. Every call is recorded with the
user the server passed in.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import pwd
import socket
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from controller.errors import SquallError
from controller.runtime._ctl_server import ControlServer

ME = pwd.getpwuid(os.geteuid()).pw_name
"""The user running the tests, as the server records it."""


@dataclass
class FakeLoop:
    """Records hook calls; refuses what a control loop would refuse."""

    calls: list[tuple[Any, ...]] = field(default_factory=list)
    held: bool = False
    aborted: bool = False
    explode: bool = False

    def status(self) -> dict[str, Any]:
        self.calls.append(("status",))
        return {
            "phase": "heatwave-ramp",
            "elapsed_s": 3600.0,
            "held": self.held,
            "chambers": {
                "C1": {"temperature_c": 21.5, "temperature_setpoint_c": 21.6, "alarm": None},
                "C5": {"temperature_c": 18.1, "temperature_setpoint_c": 18.0, "alarm": "stale"},
            },
        }

    def hold(self, user: str) -> str:
        self.calls.append(("hold", user))
        if self.explode:
            raise TypeError("a bug in the hook")
        if self.held:
            raise ValueError("already held")
        self.held = True
        return "protocol clock held at 1 h 00 min"

    def resume(self, user: str) -> None:
        self.calls.append(("resume", user))
        if not self.held:
            raise ValueError("not held")
        self.held = False

    def skip_to(self, phase: str, user: str) -> None:
        self.calls.append(("skip_to", phase, user))
        if phase not in {"acclimation", "heatwave-ramp", "recovery"}:
            raise KeyError(f"no phase {phase!r}")

    async def abort(self, user: str) -> None:
        await asyncio.sleep(0)
        self.calls.append(("abort", user))
        self.aborted = True

    def ack(self, alarm_code: str, chamber: str | None, user: str) -> None:
        self.calls.append(("ack", alarm_code, chamber, user))

    def note(self, text: str, user: str) -> None:
        self.calls.append(("note", text, user))
        if text == "after the end":  # the control loop's OperatorError is a SquallError
            raise SquallError("the run has ended", field="note")


@contextlib.contextmanager
def served(server: ControlServer) -> Iterator[ControlServer]:
    """Run ``server`` in its own event loop on a thread for the ``with`` block."""
    loop = asyncio.new_event_loop()
    started = threading.Event()
    stop: list[asyncio.Event] = []
    failure: list[BaseException] = []

    async def main() -> None:
        stop.append(asyncio.Event())
        try:
            await server.start()
        except BaseException as exc:
            failure.append(exc)
            started.set()
            return
        started.set()
        try:
            await stop[0].wait()
        finally:
            await server.close()

    thread = threading.Thread(target=loop.run_until_complete, args=(main(),), daemon=True)
    thread.start()
    assert started.wait(30), "server did not start"
    if failure:
        thread.join(30)
        loop.close()
        raise failure[0]
    try:
        yield server
    finally:
        loop.call_soon_threadsafe(stop[0].set)
        thread.join(30)
        loop.close()


def exchange(path: Path, *lines: bytes, timeout_s: float = 10.0) -> list[dict[str, Any]]:
    """Send raw lines on one connection; return one decoded reply per line."""
    replies: list[dict[str, Any]] = []
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
        sock.settimeout(timeout_s)
        sock.connect(str(path))
        stream = sock.makefile("rb")
        for line in lines:
            sock.sendall(line)
            replies.append(json.loads(stream.readline()))
    return replies


def request(cmd: str, **args: Any) -> bytes:
    """A well-formed request line."""
    return (json.dumps({"v": 1, "cmd": cmd, "args": args}) + "\n").encode()


def unprivileged() -> pwd.struct_passwd | None:
    """An unprivileged local account to connect as, if there is one."""
    for name in ("nobody", "daemon"):
        try:
            entry = pwd.getpwnam(name)
        except KeyError:
            continue
        if entry.pw_uid != 0:
            return entry
    return None


def as_user(entry: pwd.struct_passwd, path: Path, line: bytes) -> dict[str, Any]:
    """Connect to ``path`` from a forked child running as ``entry``; send ``line``.

    Returns ``{"connect_error": errno name}`` when the connection itself is refused, else
    ``{"reply": reply or None, "closed": bool}`` (``closed``: the server hung up after it).
    """
    read_fd, write_fd = os.pipe()
    pid = os.fork()
    if pid == 0:  # child: drop to the other user, talk, report through the pipe, exit
        outcome: dict[str, Any]
        try:
            os.close(read_fd)
            os.setgroups([])
            os.setgid(entry.pw_gid)
            os.setuid(entry.pw_uid)
            sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            sock.settimeout(10.0)
            try:
                sock.connect(str(path))
            except OSError as exc:
                outcome = {"connect_error": type(exc).__name__}
            else:
                sock.sendall(line)
                stream = sock.makefile("rb")
                first = stream.readline()
                try:  # a second request: the server must have hung up
                    sock.sendall(line)
                    rest = stream.readline()
                except OSError:
                    rest = b""
                outcome = {"reply": json.loads(first) if first else None, "closed": rest == b""}
        except BaseException as exc:  # report anything rather than hang the parent
            outcome = {"child_error": repr(exc)}
        os.write(write_fd, json.dumps(outcome).encode())
        os._exit(0)
    os.close(write_fd)
    chunks = []
    with os.fdopen(read_fd, "rb") as pipe:
        while chunk := pipe.read():
            chunks.append(chunk)
    os.waitpid(pid, 0)
    return json.loads(b"".join(chunks))
