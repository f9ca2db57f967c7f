"""The control socket: operator commands to a running controller over a local Unix socket.

Rules of this module
--------------------
- Where: the run writing ``runs/x.sqlite`` listens on ``runs/x.sqlite.ctl/socket``
  (:func:`~controller.runtime._ctl_wire.control_path`): a folder of its own, mode 0700,
  holding the socket, mode 0600. Both are made under a restrictive umask, so there is no
  moment at which another user could reach them. A folder left by a crashed run is reused
  only when it is ours and not a symbolic link (its mode is set back to 0700); a socket left
  in it is removed when nothing answers on it, and a socket that answers means another
  controller is serving that run (refused). The umask is process-wide: it is changed only
  around the ``mkdir`` and ``bind`` at start-up.
- Who: file permissions are the first gate. The second is the peer's credentials, read with
  ``SO_PEERCRED`` (Linux) on every connection: only the controller's own user, root (who
  passes file permissions anyway) and the uids of an explicit allow-list may command. Any
  other peer gets one refusal line and is disconnected. Where the platform cannot tell the
  peer's uid, every connection is refused (fail closed). The user passed to the hooks and
  written to the audit trail is the name of the peer's uid, never a name the client claims.
- What: the wire protocol of :mod:`controller.runtime._ctl_wire`. A malformed request gets
  an error reply and the connection stays open; an over-long line is answered and skipped.
- Logging: every command is logged through :mod:`logging` (accepted ones at INFO, refusals
  at WARNING; ``status`` queries at DEBUG since views poll them). The target's hooks audit
  every command that reaches them, carried out or refused; what never reaches a hook (a
  malformed request, a refused peer, a hook that timed out or failed) goes to the ``audit``
  callable when one is given.
- The target is the running control loop, seen only through :class:`ControlTarget`. Hooks may
  be plain methods or coroutines and run in the loop's own event loop; a hook that refuses
  raises one of ``refusals`` and its message becomes the reply's error; any other exception
  is a bug, logged with its traceback and answered as a failure. The server runs as one task
  of the run's task group (:func:`serve_control`) or around the run
  (:func:`run_with_control`), and removes its socket when it stops.
"""

from __future__ import annotations

import asyncio
import contextlib
import inspect
import logging
import os
import pwd
import socket
import stat
import struct
from collections.abc import Callable, Collection, Mapping
from pathlib import Path
from typing import Any, Protocol

from controller.errors import SquallError
from controller.runtime._ctl_wire import (
    MAX_REQUEST_B,
    Request,
    RequestError,
    connect_path,
    decode_line,
    done_message,
    encode_reply,
)

__all__ = [
    "DEFAULT_REFUSALS",
    "AuditFn",
    "ControlServer",
    "ControlTarget",
    "loop_audit",
    "peer_uid",
    "run_with_control",
    "serve_control",
]

AuditFn = Callable[[str, str, str, str], None]
"""Records a command in the audit trail: ``(user, command, text, result)``."""

DEFAULT_REFUSALS: tuple[type[Exception], ...] = (SquallError, ValueError, LookupError)
"""Exceptions by which a hook refuses a request (their message is the reply's error)."""

_log = logging.getLogger(__name__)


class ControlTarget(Protocol):
    """What the control socket needs of a running controller (the control loop's hooks).

    Every hook takes the operating-system user who asked (no unit) and may return a short
    text for the operator (or None, or an awaitable of either). A hook refuses a request by
    raising (see ``ControlServer.refusals``) and audits what it carries out or refuses.
    """

    def status(self) -> Mapping[str, Any]:
        """The run's state for operators: JSON-serialisable values (units in the keys)."""
        ...

    def hold(self, user: str) -> object:
        """Freeze the protocol clock, setpoints kept; ``user`` asked (no unit)."""
        ...

    def resume(self, user: str) -> object:
        """Let the protocol clock run again; ``user`` asked (no unit)."""
        ...

    def skip_to(self, phase: str, user: str) -> object:
        """Jump to the start of ``phase`` (a phase name); ``user`` asked (no unit)."""
        ...

    def abort(self, user: str) -> object:
        """Drive every output safe and end the run; ``user`` asked (no unit)."""
        ...

    def ack(self, alarm_code: str, chamber: str | None, user: str) -> object:
        """Acknowledge ``alarm_code`` of ``chamber`` (None: every chamber); no unit."""
        ...

    def note(self, text: str, user: str) -> object:
        """Write ``text`` with time and ``user`` to the audit trail (no unit)."""
        ...


# ---------------------------------------------------------------------- peers
def _user_name(uid: int) -> str:
    """The login name of a uid, or ``uid N`` when the password database has none."""
    try:
        return pwd.getpwuid(uid).pw_name
    except KeyError:
        return f"uid {uid}"


def peer_uid(sock: socket.socket) -> int | None:
    """The uid of the process at the other end of a Unix socket, if the platform tells.

    Parameters
    ----------
    sock
        A connected ``AF_UNIX`` stream socket (no unit).

    Returns
    -------
    int or None
        The peer's effective uid as the kernel recorded it at connect time; None where
        ``SO_PEERCRED`` is not available (no unit).
    """
    option = getattr(socket, "SO_PEERCRED", None)
    if option is None:
        return None
    raw = sock.getsockopt(socket.SOL_SOCKET, option, struct.calcsize("3i"))
    _pid, uid, _gid = struct.unpack("3i", raw)
    return int(uid)


# ---------------------------------------------------------------------- server
class ControlServer:
    """The control socket of one run.

    Parameters
    ----------
    target
        The running controller's hooks (no unit).
    path
        The socket's path, e.g. :func:`control_path` of the run log (no unit).
    allowed_uids
        Further uids allowed to command besides the controller's own and root (no unit).
    audit
        Records refused commands in the run's audit trail, ``(user, command, text, result)``;
        accepted commands are audited by the hooks themselves (no unit).
    idle_timeout_s
        A connection silent for this long is closed, s (event-loop time).
    hook_timeout_s
        Longest a hook may take, s (event-loop time).
    max_connections
        Connections served at once; more are refused with an error line (no unit).
    refusals
        Exception types by which a hook refuses a request (no unit); default
        :data:`DEFAULT_REFUSALS`.
    """

    def __init__(
        self,
        target: ControlTarget,
        path: Path,
        *,
        allowed_uids: Collection[int] = (),
        audit: AuditFn | None = None,
        idle_timeout_s: float = 600.0,
        hook_timeout_s: float = 10.0,
        max_connections: int = 8,
        refusals: tuple[type[Exception], ...] = DEFAULT_REFUSALS,
    ) -> None:
        self.target = target
        self.path = Path(path)
        self.allowed_uids = frozenset({os.geteuid(), 0, *allowed_uids})
        self.audit = audit
        self.idle_timeout_s = idle_timeout_s
        self.hook_timeout_s = hook_timeout_s
        self.max_connections = max_connections
        self.refusals = refusals
        self._server: asyncio.AbstractServer | None = None
        self._inode: tuple[int, int] | None = None
        self._clients: dict[asyncio.Task[Any], asyncio.StreamWriter] = {}

    # ------------------------------------------------------------------ lifecycle
    async def start(self) -> None:
        """Make the private directory, bind the socket (mode 0600) and start listening.

        Raises
        ------
        SquallError
            The directory is not ours or not private, something else is in the way, or
            another controller already serves this socket.
        """
        folder = self.path.parent
        old_umask = os.umask(0o077)
        try:
            try:
                os.mkdir(folder, 0o700)
            except FileExistsError:
                self._check_folder(folder)
            except OSError as exc:
                raise SquallError(
                    f"cannot create the control folder: {exc.strerror}", file=folder
                ) from exc
            self._clear_stale()
            sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            try:
                os.umask(0o177)
                with connect_path(self.path) as where:
                    sock.bind(where)
                os.chmod(self.path, 0o600)
                info = os.stat(self.path)
                self._inode = (info.st_dev, info.st_ino)
                sock.setblocking(False)
                self._server = await asyncio.start_unix_server(
                    self._connection, sock=sock, limit=MAX_REQUEST_B + 1
                )
            except BaseException:
                sock.close()
                raise
        finally:
            os.umask(old_umask)
        _log.info("control socket listening at %s", self.path)

    def _check_folder(self, folder: Path) -> None:
        info = os.lstat(folder)
        if not stat.S_ISDIR(info.st_mode):
            raise SquallError("is in the way of the control folder (not a folder)", file=folder)
        if info.st_uid != os.geteuid():
            raise SquallError(
                f"the control folder belongs to {_user_name(info.st_uid)}, not to this user; "
                "remove it",
                file=folder,
            )
        if stat.S_IMODE(info.st_mode) != 0o700:
            os.chmod(folder, 0o700)

    def _clear_stale(self) -> None:
        """Remove a socket left by a crashed controller; refuse when one still answers."""
        try:
            info = os.lstat(self.path)
        except FileNotFoundError:
            return
        if not stat.S_ISSOCK(info.st_mode):
            raise SquallError("is in the way of the control socket (not a socket)", file=self.path)
        probe = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        probe.settimeout(1.0)
        try:
            with connect_path(self.path) as where:
                probe.connect(where)
        except OSError:
            os.unlink(self.path)  # nothing listens: a crashed run's leftover
            return
        finally:
            probe.close()
        raise SquallError(
            "another controller is serving commands on this socket; is the run still going?",
            file=self.path,
        )

    async def close(self) -> None:
        """Stop listening, drop every connection, remove the socket and its folder."""
        server, self._server = self._server, None
        if server is not None:
            server.close()
        for writer in list(self._clients.values()):
            writer.close()  # the handler's next read sees the end and returns
        if self._clients:
            _done, late = await asyncio.wait(list(self._clients), timeout=self.hook_timeout_s)
            for task in late:  # stuck in a hook: a last resort
                task.cancel()
        if server is not None:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(server.wait_closed(), 1.0)
        self._remove_socket()

    def _remove_socket(self) -> None:
        """Unlink the socket only if it is still the one we bound (not a successor's)."""
        if self._inode is None:
            return
        with contextlib.suppress(OSError):
            info = os.lstat(self.path)
            if (info.st_dev, info.st_ino) == self._inode:
                os.unlink(self.path)
        with contextlib.suppress(OSError):
            os.rmdir(self.path.parent)
        self._inode = None

    # ------------------------------------------------------------------ connections
    async def _connection(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        task = asyncio.current_task()
        if task is not None:
            self._clients[task] = writer
        try:
            await self._serve(reader, writer)
        except (ConnectionError, TimeoutError, asyncio.IncompleteReadError):
            pass
        except Exception:
            _log.exception("control socket: a connection failed")
        finally:
            if task is not None:
                self._clients.pop(task, None)
            writer.close()
            with contextlib.suppress(Exception):
                await asyncio.wait_for(writer.wait_closed(), 1.0)

    async def _turn_away(
        self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter, why: str
    ) -> None:
        """Answer a connection that may not be served, then hang up cleanly.

        Closing a Unix socket with unread data in it makes the peer's next read fail with
        a reset, which could swallow the refusal; so the peer's requests are read and
        dropped (a bounded amount, for a bounded time) until it hangs up too.
        """
        await self._send(writer, encode_reply(False, why))
        if writer.can_write_eof():
            writer.write_eof()
        with contextlib.suppress(TimeoutError, ConnectionError):
            async with asyncio.timeout(2.0):
                dropped = 0
                while dropped < 4 * MAX_REQUEST_B and (chunk := await reader.read(4096)):
                    dropped += len(chunk)

    async def _send(self, writer: asyncio.StreamWriter, line: bytes) -> None:
        writer.write(line)
        async with asyncio.timeout(self.hook_timeout_s):
            await writer.drain()

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        sock = writer.get_extra_info("socket")
        uid = peer_uid(sock) if sock is not None else None
        user = "unknown" if uid is None else _user_name(uid)
        if uid is None or uid not in self.allowed_uids:
            why = (
                "refused: cannot tell the connecting user on this platform"
                if uid is None
                else f"refused: user {user} (uid {uid}) may not command this controller"
            )
            _log.warning("control socket: %s", why)
            self._audit(user, "connect", "", why)
            await self._turn_away(reader, writer, why)
            return
        if len(self._clients) > self.max_connections:
            await self._turn_away(reader, writer, "refused: too many connections; try again")
            return
        skipping = False
        buffer = bytearray()
        while True:
            async with asyncio.timeout(self.idle_timeout_s):
                chunk = await reader.read(4096)
            if not chunk:
                return
            buffer += chunk
            while True:
                end = buffer.find(b"\n")
                if end < 0:
                    if len(buffer) > MAX_REQUEST_B:
                        if not skipping:
                            await self._refuse(
                                writer,
                                user,
                                "?",
                                "",
                                f"request longer than {MAX_REQUEST_B} bytes; skipped",
                            )
                        skipping = True
                        buffer.clear()
                    break
                line, buffer = bytes(buffer[:end]), buffer[end + 1 :]
                if skipping:
                    skipping = False
                    continue
                if len(line) > MAX_REQUEST_B:
                    await self._refuse(
                        writer, user, "?", "", f"request longer than {MAX_REQUEST_B} bytes; skipped"
                    )
                    continue
                if line.strip():
                    await self._handle(writer, user, line.rstrip(b"\r"))

    async def _handle(self, writer: asyncio.StreamWriter, user: str, line: bytes) -> None:
        try:
            request = decode_line(line)
        except RequestError as exc:
            await self._refuse(writer, user, "?", "", str(exc))
            return
        text = " ".join(str(v) for v in request.args.values() if v is not None)
        try:
            result = await self._call(request, user)
        except TimeoutError:
            await self._refuse(
                writer,
                user,
                request.cmd,
                text,
                f"{request.cmd}: the controller did not answer within {self.hook_timeout_s:g} s",
            )
            return
        except asyncio.CancelledError:
            raise
        except Exception as exc:  # a refusal by the hook: its message is the answer
            said: object = exc
            if isinstance(exc, SquallError):
                said = exc.message  # the field is the command itself
            elif isinstance(exc, KeyError) and exc.args:
                said = exc.args[0]  # str() of a KeyError quotes its message
            message = " ".join(str(said).split()) or type(exc).__name__
            refused = isinstance(exc, self.refusals)
            if not refused:
                _log.error("control socket: %s failed", request.cmd, exc_info=exc)
                message = f"{request.cmd} failed in the controller: {type(exc).__name__}: {message}"
            elif not message.startswith("refused"):
                message = f"refused: {message}"
            # a hook audits the requests it refuses itself; everything else is audited here
            await self._refuse(writer, user, request.cmd, text, message, audit=not refused)
            return
        level = logging.DEBUG if request.cmd == "status" else logging.INFO
        _log.log(
            level, "control socket: %s by %s%s", request.cmd, user, f": {text}" if text else ""
        )
        if result is None or (isinstance(result, str) and not result.strip()):
            result = done_message(request.cmd)
        await self._send(writer, encode_reply(True, result))

    async def _call(self, request: Request, user: str) -> Any:
        target, args = self.target, request.args
        calls: dict[str, Callable[[], Any]] = {
            "status": lambda: target.status(),
            "hold": lambda: target.hold(user),
            "resume": lambda: target.resume(user),
            "abort": lambda: target.abort(user),
            "skip-to": lambda: target.skip_to(args["phase"], user),
            "ack": lambda: target.ack(args["alarm_code"], args["chamber"], user),
            "note": lambda: target.note(args["text"], user),
        }
        async with asyncio.timeout(self.hook_timeout_s):
            result = calls[request.cmd]()
            if inspect.isawaitable(result):
                result = await result
        return result

    async def _refuse(
        self,
        writer: asyncio.StreamWriter,
        user: str,
        cmd: str,
        text: str,
        message: str,
        *,
        audit: bool = True,
    ) -> None:
        _log.warning("control socket: %s from %s refused: %s", cmd, user, message)
        if audit:
            self._audit(user, cmd, text, message)
        await self._send(writer, encode_reply(False, message))

    def _audit(self, user: str, cmd: str, text: str, result: str) -> None:
        if self.audit is None:
            return
        try:
            self.audit(user, cmd, text, result)
        except Exception:
            _log.exception("control socket: auditing a refusal failed")


async def serve_control(
    target: ControlTarget,
    path: Path,
    *,
    ready: asyncio.Event | None = None,
    allowed_uids: Collection[int] = (),
    audit: AuditFn | None = None,
) -> None:
    """Serve the control socket until cancelled (one task of the run's task group).

    Parameters
    ----------
    target
        The running controller's hooks (no unit).
    path
        The socket's path, e.g. :func:`control_path` of the run log (no unit).
    ready
        Set once the socket accepts connections (no unit).
    allowed_uids
        Further uids allowed to command (no unit).
    audit
        Records refused commands in the audit trail (no unit).
    """
    server = ControlServer(target, path, allowed_uids=allowed_uids, audit=audit)
    await server.start()
    try:
        if ready is not None:
            ready.set()
        await asyncio.Event().wait()
    finally:
        await asyncio.shield(server.close())


def loop_audit(loop: object) -> AuditFn | None:
    """An audit callable writing to a control loop's run log, if the loop has one.

    Parameters
    ----------
    loop
        A control loop with ``clock`` and ``sink`` (:class:`~controller.runtime.LogSink`;
        no unit).

    Returns
    -------
    AuditFn or None
        Queues an :class:`~controller.storage.AuditRecord` stamped with the loop's clock
        time (s) and its UTC (POSIX s); None when the loop has no clock or sink (no unit).
    """
    clock, sink = getattr(loop, "clock", None), getattr(loop, "sink", None)
    if clock is None or sink is None:
        return None
    from controller.storage import AuditRecord

    def audit(user: str, command: str, text: str, result: str) -> None:
        t_s = clock.now_s()
        sink.put(
            AuditRecord(
                t_s=t_s,
                utc_s=clock.utc(t_s).timestamp(),
                user=user,
                command=command,
                text=text,
                result=result,
            )
        )

    return audit


class _Runnable(ControlTarget, Protocol):
    """A control loop: the hooks plus ``run()``."""

    async def run(self) -> Any:
        """Run to the end and return the run's summary."""
        ...


async def run_with_control(
    loop: _Runnable,
    path: Path,
    *,
    allowed_uids: Collection[int] = (),
    audit: AuditFn | None = None,
) -> Any:
    """Run a control loop with its control socket open for the whole run.

    Parameters
    ----------
    loop
        The control loop (its hooks serve the commands; no unit).
    path
        The socket's path, e.g. :func:`control_path` of the run log (no unit).
    allowed_uids
        Further uids allowed to command (no unit).
    audit
        Records refused commands in the audit trail (no unit).

    Returns
    -------
    Any
        What ``loop.run()`` returns (the run summary; no unit). The socket is bound before
        the run starts (a problem with it is a :class:`SquallError` and nothing runs) and
        removed when the run ends, however it ends. Without ``audit``, refusals that never
        reach a hook go to the loop's own audit trail (:func:`loop_audit`).
    """
    audit = audit or loop_audit(loop)
    server = ControlServer(loop, path, allowed_uids=allowed_uids, audit=audit)
    await server.start()
    try:
        return await loop.run()
    finally:
        await asyncio.shield(server.close())
