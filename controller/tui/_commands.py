"""Operator commands from the UI to the controller, behind one small interface.

Rules of this module
--------------------
- The views never talk to a controller directly. The app calls a :class:`CommandChannel`;
  what carries the command (the local control socket, an authenticated broker topic) is the
  channel's business. A channel that cannot command (``can_command`` False) makes the app
  hide hold, resume, abort, acknowledge and note altogether.
- Every call returns a :class:`CommandResult`; a refusal is a result, not an exception, so
  the UI can show the controller's reason on one line.
- :class:`NoCommands` is the channel of replays and of watch sessions without a control
  socket. :class:`RecordingChannel` is a stand-in controller for tests and demos: it records
  every command and, given an open :class:`RunLogWriter`, writes what a controller would
  write (hold events, acknowledgements, audit records) so the views see the effect through
  the very log they read.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from typing import Protocol, runtime_checkable

from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    AuditRecord,
    EventKind,
    EventRecord,
    RunLogWriter,
)

__all__ = [
    "Command",
    "CommandChannel",
    "CommandKind",
    "CommandResult",
    "NoCommands",
    "RecordingChannel",
]


class CommandKind(StrEnum):
    """Commands the UI can send."""

    HOLD = "hold"
    RESUME = "resume"
    ABORT = "abort"
    ACK = "ack"
    NOTE = "note"


@dataclass(frozen=True, slots=True, kw_only=True)
class CommandResult:
    """What the controller answered.

    Attributes
    ----------
    ok
        Whether the command was carried out.
    message
        The controller's words (why it refused, or what it did).
    """

    ok: bool
    message: str = ""


@dataclass(frozen=True, slots=True, kw_only=True)
class Command:
    """One command as a :class:`RecordingChannel` received it.

    Attributes
    ----------
    kind
        Which command.
    alarm_code
        Alarm code (ack only).
    chamber
        Chamber of the alarm (ack only; None for a rig-wide alarm).
    text
        Note text (note only).
    """

    kind: CommandKind
    alarm_code: str | None = None
    chamber: str | None = None
    text: str = ""


@runtime_checkable
class CommandChannel(Protocol):
    """Where the UI sends operator commands."""

    @property
    def can_command(self) -> bool:
        """Whether this user may command the controller through this channel."""
        ...

    @property
    def why_not(self) -> str:
        """Why commands are not offered (when ``can_command`` is False), in words."""
        ...

    async def hold(self) -> CommandResult:
        """Freeze the protocol clock, keeping the setpoints."""
        ...

    async def resume(self) -> CommandResult:
        """Let the protocol clock run again after a hold."""
        ...

    async def abort(self) -> CommandResult:
        """Drive every output safe and end the run."""
        ...

    async def ack(self, alarm_code: str, chamber: str | None) -> CommandResult:
        """Acknowledge an alarm of a chamber (None: a rig-wide alarm)."""
        ...

    async def note(self, text: str) -> CommandResult:
        """Write a note to the run's audit trail."""
        ...


class NoCommands:
    """A channel that offers no commands (replays; watch without a control socket).

    Parameters
    ----------
    reason
        Why commands are not available, shown to the user.
    """

    def __init__(self, reason: str = "this view cannot command the controller") -> None:
        self._reason = reason

    @property
    def can_command(self) -> bool:
        """Always False."""
        return False

    @property
    def why_not(self) -> str:
        """Why commands are not available."""
        return self._reason

    def _refuse(self) -> CommandResult:
        return CommandResult(ok=False, message=self._reason)

    async def hold(self) -> CommandResult:
        """Refused."""
        return self._refuse()

    async def resume(self) -> CommandResult:
        """Refused."""
        return self._refuse()

    async def abort(self) -> CommandResult:
        """Refused."""
        return self._refuse()

    async def ack(self, alarm_code: str, chamber: str | None) -> CommandResult:
        """Refused."""
        return self._refuse()

    async def note(self, text: str) -> CommandResult:
        """Refused."""
        return self._refuse()


class RecordingChannel:
    """A stand-in controller for tests and demos: records commands, optionally logs them.

    Parameters
    ----------
    writer
        An open writer of the log the UI watches; when given, commands are written as a
        controller would (hold/hold-end/abort events, alarm acknowledgements, audit records).
    times
        Returns (clock time in s, UTC POSIX s) for records written; required with ``writer``.
    user
        Name written as the operator.
    can_command
        Whether the channel offers commands at all.
    """

    def __init__(
        self,
        *,
        writer: RunLogWriter | None = None,
        times: Callable[[], tuple[float, float]] | None = None,
        user: str = "operator",
        can_command: bool = True,
    ) -> None:
        if writer is not None and times is None:
            raise ValueError("a RecordingChannel that writes a log needs 'times'")
        self._writer = writer
        self._times = times
        self._user = user
        self._can = can_command
        self.commands: list[Command] = []
        """Every command received, in order (refused ones included)."""
        self.held = False
        """Whether the stand-in controller is holding."""
        self.aborted = False
        """Whether it was aborted."""

    @property
    def can_command(self) -> bool:
        """As given."""
        return self._can

    @property
    def why_not(self) -> str:
        """Why commands are not available."""
        return "" if self._can else "commands are switched off"

    def _audit(self, command: str, text: str, result: str) -> None:
        if self._writer is None or self._times is None:
            return
        t_s, utc_s = self._times()
        self._writer.record_audit(
            AuditRecord(
                t_s=t_s, utc_s=utc_s, user=self._user, command=command, text=text, result=result
            )
        )

    def _event(self, kind: EventKind, detail: str) -> None:
        if self._writer is None or self._times is None:
            return
        t_s, utc_s = self._times()
        self._writer.record_event(EventRecord(t_s=t_s, utc_s=utc_s, kind=kind, detail=detail))

    def _refused(self, command: str, text: str, why: str) -> CommandResult:
        self._audit(command, text, why)
        return CommandResult(ok=False, message=why)

    async def hold(self) -> CommandResult:
        """Hold unless already held or aborted."""
        self.commands.append(Command(kind=CommandKind.HOLD))
        if not self._can or self.aborted:
            return self._refused("hold", "", "refused: the run is not commandable")
        if self.held:
            return self._refused("hold", "", "refused: already held")
        self.held = True
        self._event(EventKind.HOLD, f"held by {self._user}")
        self._audit("hold", "", "ok")
        return CommandResult(ok=True, message="protocol clock held; setpoints kept")

    async def resume(self) -> CommandResult:
        """Resume when held."""
        self.commands.append(Command(kind=CommandKind.RESUME))
        if not self._can or self.aborted:
            return self._refused("resume", "", "refused: the run is not commandable")
        if not self.held:
            return self._refused("resume", "", "refused: not held")
        self.held = False
        self._event(EventKind.HOLD_END, f"resumed by {self._user}")
        self._audit("resume", "", "ok")
        return CommandResult(ok=True, message="protocol clock running again")

    async def abort(self) -> CommandResult:
        """Abort once."""
        self.commands.append(Command(kind=CommandKind.ABORT))
        if not self._can or self.aborted:
            return self._refused("abort", "", "refused: the run is not commandable")
        self.aborted = True
        self.held = False
        self._event(EventKind.ABORT, f"aborted by {self._user}")
        self._audit("abort", "", "ok")
        return CommandResult(ok=True, message="run aborted; outputs safe")

    async def ack(self, alarm_code: str, chamber: str | None) -> CommandResult:
        """Acknowledge an alarm (written as an ``ack`` alarm record)."""
        self.commands.append(Command(kind=CommandKind.ACK, alarm_code=alarm_code, chamber=chamber))
        target = f"{alarm_code} {chamber or 'rig'}"
        if not self._can:
            return self._refused("ack", target, "refused: the run is not commandable")
        if self._writer is not None and self._times is not None:
            t_s, utc_s = self._times()
            self._writer.record_alarm(
                AlarmRecord(
                    t_s=t_s,
                    utc_s=utc_s,
                    action=AlarmAction.ACK,
                    level=AlarmLevel.ALARM,
                    code=alarm_code,
                    reason=f"acknowledged by {self._user}",
                    chamber=chamber,
                    user=self._user,
                )
            )
        self._audit("ack", target, "ok")
        return CommandResult(ok=True, message=f"acknowledged {target}")

    async def note(self, text: str) -> CommandResult:
        """Write a note to the audit trail (empty notes are refused)."""
        self.commands.append(Command(kind=CommandKind.NOTE, text=text))
        if not self._can:
            return self._refused("note", text, "refused: the run is not commandable")
        if not text.strip():
            return CommandResult(ok=False, message="refused: the note is empty")
        self._audit("note", text, "ok")
        return CommandResult(ok=True, message="note written to the audit trail")
