"""A run's link to MQTT telemetry: the publisher task beside the control loop.

Rules of this module
--------------------
- A run publishes when its rig file has a ``[telemetry]`` table with ``enabled = true``
  (:func:`telemetry_link` builds the link, or None). Nothing here is imported by a run
  without telemetry, so the MQTT client library is loaded only when it is needed.
- The control loop never waits for the network: :meth:`TelemetryLink.attach` gives the
  loop's :class:`~controller.runtime.LogSink` the publisher as its telemetry sink (each
  ``put`` of sample rows, alarms and events is also offered to the publisher's bounded
  buffer) and chains the publisher's ``on_tick`` after the loop's own progress callback.
- :meth:`TelemetryLink.run` runs the publisher as a task of the run's event loop for as long
  as the run goes on, then cancels it: a connected publisher flushes what it can within its
  ``timeout_s`` and leaves its final retained status (``finished`` or ``aborted``).
- Remote commands (off unless ``[telemetry.commands] enabled = true``) reach the loop's
  operator hooks from the publisher's task, in the loop's own thread, between two awaits:
  hold, resume, abort, acknowledge and note, as ``mqtt:<user>``. The hooks write the audit
  trail of what reached them (carried out or refused); a command the gate refused before
  (disabled, user not allowed, malformed) is audited here, so every message on the command
  topic leaves one audit record.
- Operator tasks: :func:`run_tasks` derives the run's tasks (sampling, calibrations,
  cleaning, daily checks, start and end; ``tasks_for_run`` of :mod:`controller.schedule`) and
  :meth:`TelemetryLink.publish_tasks` hands them to the publisher, which keeps them retained
  on ``<prefix>/<controller>/tasks``. A protocol or rig the tasks cannot be derived from
  is logged and publishes no tasks; it never stops the run.
- Publishing needs a paced clock (real time, or a simulation at ``--speed N``): a simulated
  run as fast as possible jumps its clock over the broker's answers, so
  :func:`telemetry_link` says why it does not publish (:data:`NEEDS_PACE`) and the run goes
  on without telemetry.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Awaitable, Callable, Sequence
from datetime import UTC
from pathlib import Path
from typing import TYPE_CHECKING, TypeVar

from controller.clock import Clock
from controller.errors import SquallError
from controller.runtime._ctl_server import loop_audit
from controller.runtime._inputs import RunInputs
from controller.runtime._loop import ControlLoop, TickStatus
from controller.runtime._operator import OperatorError

if TYPE_CHECKING:
    from controller.schedule._tasks import OperatorTask
    from controller.telemetry import (
        CommandOutcome,
        RemoteCommand,
        TaskInfo,
        TelemetryConfig,
        TelemetryPublisher,
    )

__all__ = [
    "NEEDS_PACE",
    "REMOTE_USER_PREFIX",
    "TelemetryLink",
    "run_tasks",
    "task_infos",
    "telemetry_link",
]

_log = logging.getLogger(__name__)

T = TypeVar("T")

REMOTE_USER_PREFIX = "mqtt:"
"""Prefix of the user name under which remote commands reach the audit trail."""

NEEDS_PACE = (
    "telemetry is not published by a simulated run at --speed max (its clock jumps over the "
    "broker's answers); run it with --speed N to publish"
)
"""Why a simulated run as fast as possible does not publish."""


class TelemetryLink:
    """The publisher of one run, tied to its control loop.

    Parameters
    ----------
    config
        The rig's ``[telemetry]`` table.
    clock
        The run's clock (the publisher's back-off and status timing run on it).
    run_id
        Run identifier for the status (the run log's name).
    protocol
        Protocol title for the status.
    chambers
        Chamber ids of the run, in display order.
    duration_s
        Protocol length, s.
    period_s
        Control tick period, s.
    base_dir
        Folder a relative ``password_file`` is relative to (the rig file's).

    Raises
    ------
    SquallError
        When the password file cannot be read.
    """

    def __init__(
        self,
        config: TelemetryConfig,
        *,
        clock: Clock,
        run_id: str,
        protocol: str,
        chambers: Sequence[str],
        duration_s: float,
        period_s: float,
        base_dir: Path | None = None,
    ) -> None:
        from controller.telemetry import TelemetryPublisher

        self.publisher: TelemetryPublisher = TelemetryPublisher(
            config,
            clock=clock,
            execute=self._execute,
            log_command=self._log_command,
            base_dir=base_dir,
        )
        self.publisher.describe_run(
            run_id=run_id,
            protocol=protocol,
            chambers=chambers,
            duration_s=duration_s,
            period_s=period_s,
        )
        self._loop: ControlLoop | None = None
        self._at_hook: RemoteCommand | None = None  # the command a hook is auditing

    # ------------------------------------------------------------------ wiring
    def attach(self, loop: ControlLoop) -> None:
        """Feed the loop's records and ticks to the publisher; route commands to its hooks.

        Parameters
        ----------
        loop
            The control loop, not yet running.
        """
        publisher = self.publisher
        loop.sink.attach_telemetry(publisher)
        before = loop.progress

        def progress(status: TickStatus) -> None:
            if before is not None:
                before(status)
            publisher.on_tick(status)

        loop.progress = progress
        self._loop = loop

    async def run(self, loop: ControlLoop, inner: Callable[[ControlLoop], Awaitable[T]]) -> T:
        """Run ``inner(loop)`` with the publisher publishing beside it.

        Parameters
        ----------
        loop
            The control loop (attached here if it is not yet).
        inner
            Runs the loop (``ControlLoop.run``, or with the control socket open).

        Returns
        -------
        T
            What ``inner`` returned (the run summary). The publisher is stopped afterwards,
            however the run ended, after it has flushed what it could.
        """
        if self._loop is not loop:
            self.attach(loop)
        task = asyncio.get_running_loop().create_task(self.publisher.run(), name="telemetry")
        try:
            return await inner(loop)
        finally:
            task.cancel()
            await asyncio.wait({task})  # the farewell is bounded by the config's timeout_s

    def runner(
        self, inner: Callable[[ControlLoop], Awaitable[T]] | None = None
    ) -> Callable[[ControlLoop], Awaitable[T]]:
        """A ``runner`` for ``SimulatedRun.run`` / ``HardwareRun.run`` that publishes.

        Parameters
        ----------
        inner
            The runner it wraps; default ``loop.run()``.

        Returns
        -------
        callable
            Takes the control loop, returns an awaitable of the run summary.
        """

        def run_loop(loop: ControlLoop) -> Awaitable[T]:
            return loop.run()  # type: ignore[return-value]

        wrapped = inner or run_loop

        def runner(loop: ControlLoop) -> Awaitable[T]:
            return self.run(loop, wrapped)

        return runner

    def publish_tasks(self, tasks: Sequence[OperatorTask]) -> None:
        """Keep the run's operator tasks retained on the broker.

        Parameters
        ----------
        tasks
            Every task of the run, by start time (those already over are left out).
        """
        self.publisher.describe_tasks(task_infos(tasks))

    # ------------------------------------------------------------------ commands
    def _execute(self, command: RemoteCommand) -> str | None:
        """Carry out an accepted command on the loop's hooks; why it was refused, or None."""
        loop = self._loop
        if loop is None:
            return "the run has not started"
        self._at_hook = command
        user = f"{REMOTE_USER_PREFIX}{command.user}"
        name = command.command.value
        try:
            if name == "hold":
                loop.hold(user)
            elif name == "resume":
                loop.resume(user)
            elif name == "abort":
                loop.abort(user)
            elif name == "acknowledge":  # the payload's model requires the code
                loop.ack(command.code or "", command.chamber, user)
            else:
                loop.note(command.text, user)
        except OperatorError as exc:  # refused by the hook, which audited it
            return exc.message
        except Exception:  # a bug below the hook: nothing audited it, so the gate's log will
            self._at_hook = None
            raise
        return None

    def _log_command(self, outcome: CommandOutcome) -> None:
        """Audit a command the gate refused before any hook saw it (hooks audit the rest)."""
        command = outcome.command
        if command is not None and command is self._at_hook:
            self._at_hook = None
            return
        loop = self._loop
        audit = None if loop is None else loop_audit(loop)
        if audit is None:
            _log.warning(
                "telemetry: command %s refused before the run: %s", outcome.name, outcome.reason
            )
            return
        text = "" if command is None else command.text
        result = "ok" if outcome.accepted else f"refused: {outcome.reason}"
        audit(f"{REMOTE_USER_PREFIX}{outcome.user or '?'}", outcome.name or "?", text, result)


def telemetry_link(
    config: TelemetryConfig | None,
    *,
    clock: Clock,
    run_id: str,
    protocol: str,
    chambers: Sequence[str],
    duration_s: float,
    period_s: float,
    base_dir: Path | None = None,
    paced: bool = True,
    notice: Callable[[str], None] | None = None,
) -> TelemetryLink | None:
    """The telemetry link of a run, or None when its rig publishes nothing.

    Parameters
    ----------
    config
        The rig's ``[telemetry]`` table, or None.
    clock
        The run's clock.
    run_id
        Run identifier (the run log's name).
    protocol
        Protocol title.
    chambers
        Chamber ids of the run.
    duration_s
        Protocol length, s.
    period_s
        Control tick period, s.
    base_dir
        Folder of the rig file (for a relative ``password_file``).
    paced
        False for a simulated run as fast as possible: no link, and ``notice`` says why.
    notice
        Told, in one line, why a configured rig does not publish.

    Returns
    -------
    TelemetryLink or None
        The link (not yet attached), or None without a table, with ``enabled = false`` or
        an unpaced run.
    """
    if config is None or not config.enabled:
        return None
    if not paced:
        if notice is not None:
            notice(NEEDS_PACE)
        return None
    return TelemetryLink(
        config,
        clock=clock,
        run_id=run_id,
        protocol=protocol,
        chambers=chambers,
        duration_s=duration_s,
        period_s=period_s,
        base_dir=base_dir,
    )


def task_infos(tasks: Sequence[OperatorTask]) -> list[TaskInfo]:
    """Operator tasks as telemetry payload entries.

    Parameters
    ----------
    tasks
        The tasks (start times aware UTC, lengths in minutes).

    Returns
    -------
    list of TaskInfo
        One entry per task, in the same order; start as POSIX s and ISO 8601 UTC.
    """
    from controller.telemetry import TaskInfo

    return [
        TaskInfo(
            uid=t.uid,
            kind=str(t.kind),
            title=t.title,
            start_utc_s=t.start_utc.timestamp(),
            start=t.start_utc.astimezone(UTC).isoformat().replace("+00:00", "Z"),
            minutes=t.minutes,
            chambers=t.chambers,
            experiment_id=t.experiment_id,
            detail=t.detail,
        )
        for t in tasks
    ]


def run_tasks(inputs: RunInputs, *, experiment_id: str | None = None) -> list[OperatorTask]:
    """The operator tasks of a run (empty, with a warning, when they cannot be derived).

    Parameters
    ----------
    inputs
        The run's protocol and rig (its compiled start is the tasks' start).
    experiment_id
        The scheduled experiment, if the run is one.

    Returns
    -------
    list of OperatorTask
        By start time.
    """
    from controller.files import parse_toml, validate_data
    from controller.protocol import Protocol
    from controller.schedule._tasks import tasks_for_run

    text, file = inputs.protocol_text, inputs.protocol_path
    try:
        protocol = validate_data(parse_toml(text, file=file), Protocol, text=text, file=file)
        return tasks_for_run(
            protocol, inputs.rig, inputs.compiled.start_utc, experiment_id=experiment_id
        )
    except SquallError as exc:
        _log.warning("telemetry: the run's operator tasks are not published: %s", exc.one_line())
        return []
