"""``squall ctl [--socket PATH | --log LOG] COMMAND``: operator commands to a running run.

COMMAND is ``status``, ``hold``, ``resume``, ``skip-to PHASE``, ``abort [--yes]``,
``ack ALARM [--chamber C]`` or ``note TEXT``.

Rules
-----
- Which run: ``--socket PATH`` names the control socket itself; ``--log LOG`` names the run's
  log, whose socket is ``<LOG>.ctl/socket``; with neither, the one run of the working folder
  whose socket under ``runs/*.ctl/`` answers (``runs/`` is where ``squall run`` puts logs by
  default). No socket, several live runs, a refusal or a malformed command: one line, exit 2.
  A controller that accepts the connection but does not answer in time: one line, exit 1.
- The reply is printed: ``status`` as a table (``--json`` for the reply's raw result), the
  other commands as the controller's one-line answer. Exit 0 when the command was carried out.
- ``abort`` asks for confirmation on a terminal; without one it needs ``--yes``.
- :class:`ControlClient` is the asynchronous client, usable by the terminal UI as its command
  channel (``can_command``, ``why_not``, ``hold``, ``resume``, ``abort``, ``ack``, ``note``,
  each returning a result with ``ok`` and ``message``).
"""

from __future__ import annotations

import argparse
import asyncio
import getpass
import json
import socket
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from controller.errors import RuntimeFailure, SquallError
from controller.runtime._ctl_wire import (
    Reply,
    RequestError,
    connect_path,
    control_path,
    decode_reply,
    encode_request,
)

if TYPE_CHECKING:
    from controller.tui._commands import CommandResult

__all__ = ["ControlClient", "find_socket", "register"]

_DEFAULT_RUNS = Path("runs")
_REPLY_LIMIT_B = 1 << 20


def _who() -> str:
    """The name this client gives (informational: the server records the peer's uid)."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return ""


class ControlClient:
    """Client of a run's control socket; one connection per command.

    Parameters
    ----------
    path
        The control socket (no unit).
    timeout_s
        Longest wait for connecting and for the reply, s (real time).
    """

    def __init__(self, path: Path, *, timeout_s: float = 5.0) -> None:
        self.path = Path(path)
        self.timeout_s = float(timeout_s)
        self._why_not = ""

    # ------------------------------------------------------------------ requests
    async def request(self, cmd: str, args: Mapping[str, Any] | None = None) -> Reply:
        """Send one command and wait for its reply.

        Parameters
        ----------
        cmd
            Command name of the wire protocol (``status``, ``hold``, ``skip-to``, ...; no unit).
        args
            Its arguments (no unit).

        Returns
        -------
        Reply
            The controller's reply, ok or not (no unit).

        Raises
        ------
        SquallError
            No controller at the socket (missing, nothing listening, or permission denied).
        RuntimeFailure
            The controller did not answer in time, or broke the connection.
        """
        try:
            async with asyncio.timeout(self.timeout_s):
                with connect_path(self.path) as where:
                    reader, writer = await asyncio.open_unix_connection(where, limit=_REPLY_LIMIT_B)
        except TimeoutError:
            raise RuntimeFailure(
                f"{self.path}: the controller did not accept a connection"
            ) from None
        except FileNotFoundError:
            raise SquallError(
                "no controller running: no control socket here", file=self.path
            ) from None
        except PermissionError:
            raise SquallError(
                "permission denied: the run belongs to another user", file=self.path
            ) from None
        except ConnectionRefusedError:
            raise SquallError(
                "no controller running: nothing answers on this socket", file=self.path
            ) from None
        except OSError as exc:
            raise SquallError(
                f"cannot reach the controller: {exc.strerror or exc}", file=self.path
            ) from None
        try:
            async with asyncio.timeout(self.timeout_s):
                writer.write(encode_request(cmd, args, _who()))
                await writer.drain()
                line = await reader.readline()
        except TimeoutError:
            raise RuntimeFailure(
                f"{self.path}: the controller did not answer within {self.timeout_s:g} s"
            ) from None
        except ConnectionError:
            line = b""  # reported below, like a hang-up after the request
        except ValueError:
            raise RuntimeFailure(f"{self.path}: the controller's reply is too long") from None
        finally:
            writer.close()
        if not line:
            raise RuntimeFailure(
                f"{self.path}: the controller closed the connection without an answer"
            )
        try:
            return decode_reply(line)
        except RequestError as exc:
            raise RuntimeFailure(f"{self.path}: {exc}") from None

    async def status(self) -> Reply:
        """Ask for the run's status.

        Returns
        -------
        Reply
            The reply; its result is the status mapping (units in its keys).
        """
        return await self.request("status")

    async def skip_to(self, phase: str) -> CommandResult:
        """Jump to the start of a phase.

        Parameters
        ----------
        phase
            Phase name (no unit).

        Returns
        -------
        CommandResult
            Whether it was done and the controller's words (no unit).
        """
        return await self._command("skip-to", {"phase": phase})

    # ------------------------------------------------------------------ command channel
    @property
    def can_command(self) -> bool:
        """Whether the socket exists, accepts this user and answers ``status`` (no unit).

        Checked afresh on every call with a blocking connection of at most ``timeout_s``;
        a local socket answers in well under a millisecond.
        """
        try:
            reply = self._probe()
        except OSError as exc:
            self._why_not = f"no controller at {self.path}: {exc.strerror or exc}"
            return False
        except (RequestError, ValueError) as exc:
            self._why_not = f"the controller at {self.path} answered oddly: {exc}"
            return False
        if not reply.ok:
            self._why_not = reply.error
            return False
        self._why_not = ""
        return True

    @property
    def why_not(self) -> str:
        """Why commands are not available, after ``can_command`` said False (no unit)."""
        return self._why_not or f"no controller answers at {self.path}"

    def _probe(self) -> Reply:
        with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
            sock.settimeout(self.timeout_s)
            with connect_path(self.path) as where:
                sock.connect(where)
            sock.sendall(encode_request("status", None, _who()))
            data = b""
            while not data.endswith(b"\n") and len(data) < _REPLY_LIMIT_B:
                chunk = sock.recv(65536)
                if not chunk:
                    break
                data += chunk
        return decode_reply(data)

    async def _command(self, cmd: str, args: Mapping[str, Any] | None = None) -> CommandResult:
        from controller.tui._commands import CommandResult

        try:
            reply = await self.request(cmd, args)
        except (SquallError, RuntimeFailure) as exc:
            text = exc.one_line() if isinstance(exc, SquallError) else str(exc)
            return CommandResult(ok=False, message=text)
        return CommandResult(ok=reply.ok, message=reply.message)

    async def hold(self) -> CommandResult:
        """Freeze the protocol clock, keeping the setpoints (result: ok and message)."""
        return await self._command("hold")

    async def resume(self) -> CommandResult:
        """Let the protocol clock run again (result: ok and message)."""
        return await self._command("resume")

    async def abort(self) -> CommandResult:
        """Drive every output safe and end the run (result: ok and message)."""
        return await self._command("abort")

    async def ack(self, alarm_code: str, chamber: str | None) -> CommandResult:
        """Acknowledge an alarm.

        Parameters
        ----------
        alarm_code
            The alarm's code (no unit).
        chamber
            Its chamber; None for every chamber (no unit).

        Returns
        -------
        CommandResult
            Whether it was done and the controller's words (no unit).
        """
        return await self._command("ack", {"alarm_code": alarm_code, "chamber": chamber})

    async def note(self, text: str) -> CommandResult:
        """Write a note to the run's audit trail.

        Parameters
        ----------
        text
            The note (no unit).

        Returns
        -------
        CommandResult
            Whether it was written and the controller's words (no unit).
        """
        return await self._command("note", {"text": text})


# ---------------------------------------------------------------------- finding the run
def _answers(path: Path) -> bool:
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
            sock.settimeout(1.0)
            with connect_path(path) as where:
                sock.connect(where)
    except OSError:
        return False
    return True


def find_socket(socket_path: Path | None, log: Path | None, runs: Path = _DEFAULT_RUNS) -> Path:
    """The control socket a ``squall ctl`` command goes to.

    Parameters
    ----------
    socket_path
        ``--socket``, used as given (no unit).
    log
        ``--log``: the run log, whose socket is ``<log>.ctl/socket`` (no unit).
    runs
        Folder searched when neither is given (no unit).

    Returns
    -------
    Path
        The socket (no unit).

    Raises
    ------
    SquallError
        Both options given, no live run found, or several.
    """
    if socket_path is not None and log is not None:
        raise SquallError("give either --socket or --log, not both", field="--socket")
    if socket_path is not None:
        return Path(socket_path)
    if log is not None:
        return control_path(Path(log))
    live = sorted(p for p in runs.glob("*.ctl/socket") if _answers(p))
    if not live:
        raise SquallError(
            f"no controller running: no live control socket under {runs}/; name the run "
            "with --log LOG or --socket PATH"
        )
    if len(live) > 1:
        names = ", ".join(p.parent.name.removesuffix(".ctl") for p in live)
        raise SquallError(f"several runs are going ({names}); choose one with --log LOG")
    return live[0]


# ---------------------------------------------------------------------- command line
def register(sub: Any) -> None:
    """Add the ``ctl`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser (no unit).
    """
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument(
        "--socket",
        metavar="PATH",
        type=Path,
        default=argparse.SUPPRESS,
        help="the run's control socket",
    )
    common.add_argument(
        "--log",
        metavar="LOG",
        type=Path,
        default=argparse.SUPPRESS,
        help="the run's log; its socket is LOG.ctl/socket",
    )
    common.add_argument(
        "--json", action="store_true", default=argparse.SUPPRESS, help="print the raw reply"
    )
    parser = sub.add_parser(
        "ctl",
        parents=[common],
        help="command a running controller (status, hold, resume, skip-to, abort, ack, note)",
        description=(
            "Send an operator command to a running controller through its local control "
            "socket (only the user running the controller, and root, may). Without --socket "
            "or --log, the one live run under runs/ is commanded."
        ),
    )
    actions = parser.add_subparsers(dest="ctl_command", metavar="COMMAND")
    actions.required = True

    def action(name: str, text: str) -> argparse.ArgumentParser:
        return actions.add_parser(name, parents=[common], help=text, description=text + ".")

    action("status", "show the run's state: phase, protocol time, hold, chambers, alarms")
    action("hold", "freeze the protocol clock; setpoints are kept")
    action("resume", "let the protocol clock run again after a hold")
    skip = action("skip-to", "jump to the start of a phase")
    skip.add_argument("phase", metavar="PHASE", help="phase name")
    abort = action("abort", "drive every output safe and end the run")
    abort.add_argument("--yes", action="store_true", help="do not ask for confirmation")
    ack = action("ack", "acknowledge an alarm")
    ack.add_argument("alarm", metavar="ALARM", help="the alarm's code")
    ack.add_argument("--chamber", metavar="C", default=None, help="its chamber (default: every)")
    note = action("note", "write a note with time and user to the run's audit trail")
    note.add_argument("text", metavar="TEXT", nargs="+", help="the note")
    parser.set_defaults(handler=_handle)


def _confirm(path: Path) -> bool:
    if not sys.stdin.isatty():
        raise SquallError("abort needs confirmation: add --yes (no terminal to ask on)")
    run = path.parent.name.removesuffix(".ctl")
    answer = input(f"Abort the run {run}? Every output is driven safe and the run ends. [y/N] ")
    return answer.strip().lower() in {"y", "yes"}


def _handle(args: argparse.Namespace) -> int:
    """Send one command; print the reply."""
    path = find_socket(getattr(args, "socket", None), getattr(args, "log", None))
    cmd = args.ctl_command
    wire: dict[str, Any] = {}
    if cmd == "skip-to":
        wire = {"phase": args.phase}
    elif cmd == "ack":
        wire = {"alarm_code": args.alarm, "chamber": args.chamber}
    elif cmd == "note":
        wire = {"text": " ".join(args.text)}
    elif cmd == "abort" and not args.yes and not _confirm(path):
        print("not aborted")
        return 0
    reply = asyncio.run(ControlClient(path).request(cmd, wire))
    if not reply.ok:
        raise SquallError(f"the controller refused: {reply.error}")
    if getattr(args, "json", False):
        print(json.dumps(reply.result, indent=2, ensure_ascii=False))
    elif cmd == "status" and isinstance(reply.result, Mapping):
        _print_status(reply.result)
    else:
        print(reply.message or json.dumps(reply.result, ensure_ascii=False))
    return 0


def _cell(value: Any, key: str = "") -> str:
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if key.endswith("_s") and isinstance(value, (int, float)) and value >= 0:
        from controller.protocol import format_duration

        return format_duration(float(value))
    if isinstance(value, float):
        return format(value, ".6g")
    if isinstance(value, (list, tuple)) and all(not isinstance(v, (dict, list)) for v in value):
        return ", ".join(_cell(v) for v in value) or "–"
    if isinstance(value, (dict, list)):
        return json.dumps(value, ensure_ascii=False)
    return str(value)


def _rows_table(title: str, rows: list[tuple[str, Mapping[str, Any]]]) -> Any:
    from rich.table import Table

    columns: list[str] = []
    for _, row in rows:
        columns.extend(k for k in row if k not in columns)
    table = Table(title=title, title_justify="left")
    table.add_column(title.rstrip("s") if title.endswith("s") else "", style="bold")
    for column in columns:
        table.add_column(column)
    for key, row in rows:
        table.add_row(key, *(_cell(row.get(c), c) for c in columns))
    return table


def _print_status(status: Mapping[str, Any]) -> None:
    """Status as tables: scalars first, then one table per mapping or list of records."""
    from rich.console import Console
    from rich.table import Table

    console = Console(highlight=False)
    scalars = Table(show_header=False, box=None, pad_edge=False)
    scalars.add_column(style="bold")
    scalars.add_column()
    nested: list[Any] = []
    for key, value in status.items():
        if (
            isinstance(value, Mapping)
            and value
            and all(isinstance(v, Mapping) for v in value.values())
        ):
            nested.append(_rows_table(key, [(str(k), v) for k, v in value.items()]))
        elif isinstance(value, list) and value and all(isinstance(v, Mapping) for v in value):
            nested.append(_rows_table(key, [(str(i + 1), v) for i, v in enumerate(value)]))
        else:
            scalars.add_row(key, _cell(value, key))
    console.print(scalars)
    for table in nested:
        console.print(table)
