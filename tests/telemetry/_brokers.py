"""MQTT brokers for the telemetry tests: a real Mosquitto, or an in-process fallback.

- :class:`MosquittoBroker` runs the ``mosquitto`` binary on 127.0.0.1 with an ephemeral
  port and a temporary config (anonymous, or a password file made with
  ``mosquitto_passwd``; optional ACL file and TLS listener). Readiness is read from its log
  ("... running"), never guessed with a sleep.
- :class:`AmqttBroker` runs the pure-Python ``amqtt`` broker in a child process
  (``amqtt_child.py``), with the same options (password file with argon2 hashes; no ACL).
  It is the fallback when Mosquitto is not installed, so the README's test command still
  passes. A process of its own, like Mosquitto, so stopping it drops every connection at
  once and its work does not share the tests' interpreter.
- Both can be stopped and started again on the same port (a broker outage), and both lose
  their retained messages when stopped (no persistence), as a restarted broker would.
- ``SQUALL_TEST_BROKER=mosquitto|amqtt`` forces one kind.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import pwd
import shutil
import socket
import subprocess
import sys
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

#: Longest wait for a broker to start or stop, s (real time).
START_TIMEOUT_S = 10.0


@dataclass(frozen=True)
class TlsFiles:
    """A throw-away certificate authority and a server certificate for 127.0.0.1."""

    ca_file: Path
    cert_file: Path
    key_file: Path


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def mosquitto_binary() -> str | None:
    """Path of the mosquitto binary (also looked up in /usr/sbin), or None."""
    found = shutil.which("mosquitto")
    if found is None and Path("/usr/sbin/mosquitto").exists():
        found = "/usr/sbin/mosquitto"
    return found


def broker_kind() -> str:
    """Which broker the tests use: ``mosquitto`` when installed, else ``amqtt``."""
    forced = os.environ.get("SQUALL_TEST_BROKER", "").strip().lower()
    if forced in ("mosquitto", "amqtt"):
        return forced
    return "mosquitto" if mosquitto_binary() is not None else "amqtt"


def make_tls_files(folder: Path) -> TlsFiles | None:
    """Create a CA and a server certificate for localhost/127.0.0.1 with ``openssl``.

    Returns None when the openssl command is missing.
    """
    openssl = shutil.which("openssl")
    if openssl is None:
        return None
    folder.mkdir(parents=True, exist_ok=True)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    ext = folder / "san.cnf"
    ext.write_text("subjectAltName=DNS:localhost,IP:127.0.0.1\n")

    def run(*args: str) -> None:
        subprocess.run([openssl, *args], cwd=folder, check=True, capture_output=True, timeout=60)

    run("req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.crt", "-days", "2",
        "-subj", "/CN=squall test authority")  # fmt: skip
    run("req", *ec, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=localhost")
    run("x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "server.crt", "-days", "2", "-extfile", str(ext))  # fmt: skip
    return TlsFiles(folder / "ca.crt", folder / "server.crt", folder / "server.key")


def _wait_for_line(proc: subprocess.Popen[str], marker: str, log: list[str]) -> bool:
    """Wait until the process prints a line containing ``marker``; keep reading its output
    into ``log`` afterwards (so its pipe never fills). False if it ended or timed out."""
    stream = proc.stderr if proc.stderr is not None else proc.stdout
    assert stream is not None
    seen = threading.Event()

    def read() -> None:
        for line in stream:
            log.append(line.rstrip())
            if marker in line:
                seen.set()
        seen.set()  # the process ended: stop waiting

    threading.Thread(target=read, daemon=True).start()
    return seen.wait(START_TIMEOUT_S) and proc.poll() is None


def _terminate(proc: subprocess.Popen[str]) -> None:
    """End a broker process and reap it."""
    proc.terminate()
    try:
        proc.wait(START_TIMEOUT_S)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(START_TIMEOUT_S)


class Broker(Protocol):
    """What the tests need of a broker."""

    kind: str
    host: str
    port: int
    tls: bool

    def start(self) -> None: ...

    def stop(self) -> None: ...

    def url(self, user: str | None = None, password: str | None = None) -> str: ...


class _UrlMixin:
    host: str
    port: int
    tls: bool

    def url(self, user: str | None = None, password: str | None = None) -> str:
        """Broker URL, with credentials when given."""
        login = ""
        if user is not None:
            login = user + (f":{password}" if password is not None else "") + "@"
        return f"{'mqtts' if self.tls else 'mqtt'}://{login}{self.host}:{self.port}"


class MosquittoBroker(_UrlMixin):
    """A mosquitto process on 127.0.0.1 (see the module notes)."""

    kind = "mosquitto"

    def __init__(
        self,
        folder: Path,
        *,
        users: Mapping[str, str] | None = None,
        acl: str | None = None,
        tls: TlsFiles | None = None,
    ) -> None:
        exe = mosquitto_binary()
        if exe is None:
            raise RuntimeError("mosquitto is not installed")
        self.exe = exe
        self.host = "127.0.0.1"
        self.port = free_port()
        self.tls = tls is not None
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        lines = [
            f"listener {self.port} 127.0.0.1",
            f"allow_anonymous {'false' if users else 'true'}",
            "persistence false",
            f"user {pwd.getpwuid(os.getuid()).pw_name}",
            "log_dest stderr",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
        ]
        if users:
            pwfile = folder / "passwords"
            pwfile.touch()
            passwd = Path(exe).with_name("mosquitto_passwd")
            passwd_exe = str(passwd) if passwd.exists() else shutil.which("mosquitto_passwd")
            if passwd_exe is None:
                raise RuntimeError("mosquitto_passwd is not installed")
            for user, password in users.items():
                subprocess.run(
                    [passwd_exe, "-b", str(pwfile), user, password],
                    check=True,
                    capture_output=True,
                    timeout=30,
                )
            lines.append(f"password_file {pwfile}")
        if acl is not None:
            aclfile = folder / "acl"
            aclfile.write_text(acl)
            lines.append(f"acl_file {aclfile}")
        if tls is not None:
            lines += [
                f"cafile {tls.ca_file}",
                f"certfile {tls.cert_file}",
                f"keyfile {tls.key_file}",
            ]
        self.config = folder / "mosquitto.conf"
        self.config.write_text("\n".join(lines) + "\n")
        self.log: list[str] = []
        self._proc: subprocess.Popen[str] | None = None

    def start(self) -> None:
        """Start the broker and wait until it listens."""
        if self._proc is not None:
            raise RuntimeError("already running")
        proc = subprocess.Popen(
            [self.exe, "-c", str(self.config)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,  # its log: stderr is unbuffered, stdout is not
            text=True,
        )
        self._proc = proc
        if not _wait_for_line(proc, " running", self.log):
            self.stop()
            raise RuntimeError("mosquitto did not start:\n" + "\n".join(self.log))

    def stop(self) -> None:
        """Stop the broker (its retained messages are lost)."""
        proc, self._proc = self._proc, None
        if proc is not None:
            _terminate(proc)


class AmqttBroker(_UrlMixin):
    """The amqtt broker in a child process (``amqtt_child.py``; see the module notes)."""

    kind = "amqtt"

    def __init__(
        self,
        folder: Path,
        *,
        users: Mapping[str, str] | None = None,
        acl: str | None = None,
        tls: TlsFiles | None = None,
    ) -> None:
        if acl is not None:
            raise RuntimeError("the amqtt fallback broker is run without ACLs")
        self.host = "127.0.0.1"
        self.port = free_port()
        self.tls = tls is not None
        folder.mkdir(parents=True, exist_ok=True)
        listener: dict[str, Any] = {"type": "tcp", "bind": f"{self.host}:{self.port}"}
        if tls is not None:
            listener.update(ssl=True, certfile=str(tls.cert_file), keyfile=str(tls.key_file))
        plugins: dict[str, Any] = {
            "amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": not users},
        }
        if users:
            from pwdlib.hashers.argon2 import Argon2Hasher

            hasher = Argon2Hasher()
            pwfile = folder / "passwords"
            pwfile.write_text("".join(f"{u}:{hasher.hash(p)}\n" for u, p in users.items()))
            plugins["amqtt.plugins.authentication.FileAuthPlugin"] = {"password_file": str(pwfile)}
        self.config = folder / "amqtt.json"
        self.config.write_text(json.dumps({"listeners": {"default": listener}, "plugins": plugins}))
        self.log: list[str] = []
        self._proc: subprocess.Popen[str] | None = None

    def start(self) -> None:
        """Start the broker process and wait until it listens."""
        if self._proc is not None:
            raise RuntimeError("already running")
        child = Path(__file__).with_name("amqtt_child.py")
        proc = subprocess.Popen(
            [sys.executable, str(child), str(self.config)],
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
        )
        self._proc = proc
        if not _wait_for_line(proc, "ready", self.log):
            self.stop()
            raise RuntimeError("the amqtt broker did not start:\n" + "\n".join(self.log))

    def stop(self) -> None:
        """Stop the broker process (its connections drop, its retained messages are lost)."""
        proc, self._proc = self._proc, None
        if proc is not None:
            _terminate(proc)


def make_broker(
    folder: Path,
    *,
    users: Mapping[str, str] | None = None,
    acl: str | None = None,
    tls: TlsFiles | None = None,
) -> MosquittoBroker | AmqttBroker:
    """A started broker of the kind :func:`broker_kind` picks."""
    cls = MosquittoBroker if broker_kind() == "mosquitto" else AmqttBroker
    broker = cls(folder, users=users, acl=acl, tls=tls)
    broker.start()
    return broker


#: What the ``broker_factory`` fixture gives: ``factory(users=..., acl=..., tls=...)``.
BrokerFactory = Callable[..., MosquittoBroker | AmqttBroker]


def close_broker(broker: MosquittoBroker | AmqttBroker) -> None:
    """Stop a broker made by :func:`make_broker`."""
    broker.stop()


class CutProxy:
    """A TCP relay in front of a broker whose connections the test can cut abruptly.

    Cutting aborts both sides of every relayed connection (no MQTT DISCONNECT), which is
    what a broker sees when a controller's computer loses power or its network.
    """

    def __init__(self, target_host: str, target_port: int) -> None:
        self.target = (target_host, target_port)
        self.host = "127.0.0.1"
        self.port = 0
        self._server: asyncio.Server | None = None
        self._transports: list[asyncio.WriteTransport] = []
        self._tasks: set[asyncio.Task[None]] = set()

    async def start(self) -> None:
        """Listen (on an ephemeral port the first time, then on the same port again)."""
        self._server = await asyncio.start_server(self._relay, self.host, self.port)
        self.port = int(self._server.sockets[0].getsockname()[1])

    async def go_down(self) -> None:
        """Cut every connection and refuse new ones until :meth:`start` (a network outage)."""
        self.cut()
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
            self._server = None

    async def _relay(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        up_reader, up_writer = await asyncio.open_connection(*self.target)
        self._transports += [writer.transport, up_writer.transport]

        async def pump(src: asyncio.StreamReader, dst: asyncio.StreamWriter) -> None:
            with contextlib.suppress(ConnectionError, OSError):
                while data := await src.read(65536):
                    dst.write(data)
                    await dst.drain()
            dst.transport.abort()

        for task in (pump(reader, up_writer), pump(up_reader, writer)):
            handle = asyncio.get_running_loop().create_task(task)
            self._tasks.add(handle)
            handle.add_done_callback(self._tasks.discard)

    def cut(self) -> None:
        """Abort every relayed connection (both directions, no goodbye)."""
        for transport in self._transports:
            transport.abort()
        self._transports.clear()

    async def close(self) -> None:
        """Cut everything, stop listening and end the relay tasks."""
        await self.go_down()
        for task in list(self._tasks):
            task.cancel()
        if self._tasks:
            await asyncio.gather(*self._tasks, return_exceptions=True)
