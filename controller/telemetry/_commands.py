"""Remote commands: checked, carried out only when allowed, and every one logged.

Rules of this module
--------------------
- :class:`CommandGate` turns one payload from the command topic into a
  :class:`CommandOutcome`. The checks, in order: the payload validates (size, JSON, version,
  schema; an unknown command is named), remote commands are enabled, the command's user is on
  the allow-list, a handler exists; only then is the handler called, and it may still refuse
  (it returns why). A handler that raises refuses the command with the error; it never
  propagates.
- Every outcome, accepted or refused, goes to the command log callback (the run's audit
  trail) and to the ``logging`` module. The gate never raises.
- The gate cannot know who published a message (MQTT 3.1.1 does not say): the broker's ACL
  must let only operators write the command topic. The allow-list is the second check.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable
from dataclasses import dataclass

from controller.telemetry._config import CommandsConfig
from controller.telemetry._payloads import (
    MAX_COMMAND_BYTES,
    CommandName,
    PayloadError,
    RemoteCommand,
    decode_model,
)

__all__ = ["CommandGate", "CommandHandler", "CommandLog", "CommandOutcome"]

_log = logging.getLogger(__name__)


@dataclass(frozen=True, slots=True, kw_only=True)
class CommandOutcome:
    """What became of one message on the command topic.

    Attributes
    ----------
    accepted
        Whether the command was carried out.
    reason
        Why it was refused; empty when accepted.
    command
        The validated command, or None when the payload did not validate.
    request_id, user, name
        Request id, user and command name as far as they could be read, else None.
    utc_s
        When it was handled, UTC POSIX s.
    """

    accepted: bool
    reason: str
    command: RemoteCommand | None
    request_id: str | None
    user: str | None
    name: str | None
    utc_s: float


#: Carries out an accepted command; returns None when done, or why it was refused.
CommandHandler = Callable[[RemoteCommand], str | None]
#: Records every command outcome (e.g. in the run's audit trail).
CommandLog = Callable[[CommandOutcome], None]


class CommandGate:
    """Checks, carries out and logs remote commands.

    Parameters
    ----------
    settings
        Whether commands are enabled and who may send them.
    execute
        Carries out an accepted command; returns None when done or why it refused. Without
        it every command is refused.
    log_command
        Called with the outcome of every command, accepted or not.
    """

    def __init__(
        self,
        settings: CommandsConfig,
        *,
        execute: CommandHandler | None = None,
        log_command: CommandLog | None = None,
    ) -> None:
        self.settings = settings
        self.execute = execute
        self.log_command = log_command
        self.accepted = 0
        """Commands carried out, dimensionless."""
        self.refused = 0
        """Commands refused, dimensionless."""

    def handle(self, payload: bytes, utc_s: float) -> CommandOutcome:
        """Check, carry out and log one command payload (what the command topic feeds).

        Parameters
        ----------
        payload
            The message payload as received.
        utc_s
            Wall time it is handled at, UTC POSIX s.

        Returns
        -------
        CommandOutcome
            Accepted, or refused with the reason; also passed to ``log_command``.
        """
        command: RemoteCommand | None = None
        request_id = user = name = None
        try:
            command = decode_model(payload, RemoteCommand, limit=MAX_COMMAND_BYTES)
        except PayloadError as exc:
            request_id, user, name = _loose_fields(payload)
            known = [c.value for c in CommandName]
            if exc.field == "command" and name is not None and name not in known:
                reason = f"unknown command {name!r} (known: {', '.join(known)})"
            else:
                reason = f"malformed command: {exc}"
        else:
            request_id, user, name = command.id, command.user, command.command.value
            reason = self._refusal(command) or ""
        outcome = CommandOutcome(
            accepted=not reason,
            reason=reason,
            command=command,
            request_id=request_id,
            user=user,
            name=name,
            utc_s=utc_s,
        )
        if outcome.accepted:
            self.accepted += 1
            _log.info("telemetry: command %s from %s carried out", name, user)
        else:
            self.refused += 1
            _log.warning("telemetry: command %s from %s refused: %s", name, user, reason)
        if self.log_command is not None:
            try:
                self.log_command(outcome)
            except Exception:
                _log.exception("telemetry: logging a command failed")
        return outcome

    def _refusal(self, command: RemoteCommand) -> str | None:
        """Why ``command`` is refused, or None once it has been carried out."""
        settings = self.settings
        if not settings.enabled:
            return "remote commands are disabled on this controller"
        if command.user not in settings.allowed_users:
            return f"user {command.user!r} may not command this controller"
        if self.execute is None:
            return "this controller takes no remote commands (no handler)"
        try:
            return self.execute(command)
        except Exception as exc:
            _log.exception("telemetry: command %s failed", command.command.value)
            return f"failed: {type(exc).__name__}: {exc}"


def _loose_fields(payload: bytes) -> tuple[str | None, str | None, str | None]:
    """Request id, user and command name of a payload that did not validate, if readable."""
    try:
        data = json.loads(payload[:MAX_COMMAND_BYTES])
    except (ValueError, UnicodeDecodeError):
        return None, None, None
    if not isinstance(data, dict):
        return None, None, None

    def text(key: str) -> str | None:
        value = data.get(key)
        return value[:64] if isinstance(value, str) else None

    return text("id"), text("user"), text("command")
