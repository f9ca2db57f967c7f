"""The publisher task: a controller's samples, status, alarms and events to an MQTT broker.

Rules of this module
--------------------
- The control loop never waits for the network. It hands records over with
  :meth:`TelemetryPublisher.offer`, which is synchronous, O(1) per record, and only fills a
  bounded :class:`~controller.telemetry.TelemetryBuffer` and sets an event; everything that
  touches the broker happens in :meth:`TelemetryPublisher.run`, a task of its own.
- The status is derived from what is offered: run events set the state (``run_start`` →
  running, ``hold`` → held, ``hold_end`` → running, ``run_stop`` → finished, ``abort`` →
  aborted), samples and events carry the phase, the protocol time and the chambers.
  :meth:`describe_run` adds what the records do not carry (run id, protocol, duration).
  Status is retained, published on connection, on every change of state or phase, when
  the drop counters moved, and at least every ``status_interval_s``.
- Operator tasks (:meth:`describe_tasks`): a retained list of the run's tasks still to
  come, published on connection and whenever the list changes (tasks that are over drop out
  at the next status), and emptied by a clean stop.
- Broker loss: the session ends, the record being published goes back to the head of its
  lane, and the task reconnects after a back-off that doubles from ``reconnect_min_s`` to
  ``reconnect_max_s`` (with a jitter of ±20 % seeded by the controller id, so a rack of
  controllers does not reconnect in step). A successful connection resets the back-off.
  The last will (retained) marks the controller offline if the connection dies; a clean
  stop publishes a final retained status instead.
- Nothing here may end the run: :meth:`run` returns only by cancellation. Broker errors,
  refused logins and bugs in encoding one record are logged (once per streak) and the
  task carries on.
- Remote commands: the publisher always listens on its command topic, so every attempt is
  seen, answered on ``cmd/result`` and passed to ``log_command``; the checks are
  :class:`~controller.telemetry.CommandGate`'s.
- Time: back-off waits, status intervals and broker timeouts run on the event loop's clock,
  which is the controller's clock. That is real time for a real run; a simulated run that
  publishes should run at a modest ``speed`` (an as-fast-as-possible virtual clock would
  jump over the broker's answers).
"""

from __future__ import annotations

import asyncio
import logging
import random
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import aiomqtt

from controller import __version__
from controller.clock import Clock
from controller.storage import AlarmRecord, EventKind, EventRecord, SampleRow
from controller.telemetry._buffer import TelemetryBuffer
from controller.telemetry._commands import CommandGate, CommandHandler, CommandLog, CommandOutcome
from controller.telemetry._config import TelemetryConfig
from controller.telemetry._connect import make_client, raise_if_cancelling
from controller.telemetry._payloads import (
    CommandResult,
    ControllerState,
    ControllerStatus,
    TaskInfo,
    TaskList,
    encode_model,
    encode_record,
    task_list,
)
from controller.telemetry._publisher_types import (
    Offered,
    PublisherStats,
    TelemetrySink,
    TickLike,
    first_mqtt_error,
    payload_bytes,
)
from controller.telemetry._topics import Topics

__all__ = [
    "PublisherStats",
    "TelemetryPublisher",
    "TelemetrySink",
    "TickLike",
]

_log = logging.getLogger(__name__)

_STATES = {
    EventKind.RUN_START: ControllerState.RUNNING,
    EventKind.HOLD: ControllerState.HELD,
    EventKind.HOLD_END: ControllerState.RUNNING,
    EventKind.RUN_STOP: ControllerState.FINISHED,
    EventKind.ABORT: ControllerState.ABORTED,
}
_ENDED = (ControllerState.FINISHED, ControllerState.ABORTED)


class TelemetryPublisher:
    """Publishes one controller's telemetry; fed by the control loop through :meth:`offer`.

    Parameters
    ----------
    config
        Telemetry settings (broker, ids, credentials, TLS, buffer, commands).
    clock
        The controller's clock (back-off waits and status timing run on it).
    execute
        Carries out an accepted remote command; returns None when done or why it refused.
        Without it every command is refused.
    log_command
        Called with the outcome of every message on the command topic, accepted or not.
    base_dir
        Folder that a relative ``password_file``, ``ca_file``, ``cert_file`` or ``key_file``
        is relative to (the rig file's).
    software_version
        Version reported in the status.

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
        execute: CommandHandler | None = None,
        log_command: CommandLog | None = None,
        base_dir: Path | None = None,
        software_version: str = __version__,
    ) -> None:
        self.config = config
        self.clock = clock
        self.commands = CommandGate(config.commands, execute=execute, log_command=log_command)
        self.topics = Topics(config.prefix)
        self._username, self._password = config.credentials(base_dir)
        # TLS files, like the password file, are relative to the rig file's folder
        self._tls = None if config.tls is None else config.tls.resolved(base_dir)
        self._software_version = software_version
        self._buffer = TelemetryBuffer(config.buffer_samples, config.buffer_records)
        self._wake = asyncio.Event()
        self._connected = asyncio.Event()
        self._rng = random.Random(config.controller_id)
        # status fields
        self._state = ControllerState.IDLE
        self._run: dict[str, Any] = {}
        self._phase: str | None = None
        self._elapsed_s: float | None = None
        self._chambers: dict[str, None] = {}
        self._status_dirty = True
        self._last_status_s: float | None = None
        self._last_drops = (0, 0)
        # operator tasks: every task of the run, and the list last published
        self._tasks: tuple[TaskInfo, ...] | None = None
        self._tasks_sent: TaskList | None = None
        # counters
        self._connections = 0
        self._published = 0
        self._statuses = 0
        self._last_error = ""
        self._failing = False

    # ------------------------------------------------------------------ control-loop side
    @property
    def controller_id(self) -> str:
        """This controller's id in topics."""
        return self.config.controller_id

    @property
    def connected(self) -> bool:
        """Whether a broker session is up now."""
        return self._connected.is_set()

    def offer(self, item: Offered) -> None:
        """Hand over records to publish; returns at once, whatever the broker does.

        Parameters
        ----------
        item
            One tick's sample rows (a sequence), one sample row, an alarm record or an
            event record. When the buffer is full the oldest sample rows are dropped and
            counted; alarms and events are kept.
        """
        if isinstance(item, SampleRow | AlarmRecord | EventRecord):
            self._note(item)
            self._buffer.put(item)
        else:
            for row in item:
                self._note(row)
                self._buffer.put(row)
        self._wake.set()

    def _note(self, record: SampleRow | AlarmRecord | EventRecord) -> None:
        """Update the status fields from a record."""
        if isinstance(record, SampleRow):
            if record.chamber not in self._chambers:
                self._chambers[record.chamber] = None
                self._status_dirty = True
            self._elapsed_s = record.elapsed_s
            self._set_phase(record.phase)
            if self._state is ControllerState.IDLE:
                self._set_state(ControllerState.RUNNING)
        elif isinstance(record, EventRecord):
            if record.elapsed_s is not None:
                self._elapsed_s = record.elapsed_s
            if record.kind is EventKind.PHASE_CHANGE and record.phase is not None:
                self._set_phase(record.phase)
            state = _STATES.get(record.kind)
            if state is not None:
                self._set_state(state)

    def _set_phase(self, phase: str) -> None:
        if phase != self._phase:
            self._phase = phase
            self._status_dirty = True

    def _set_state(self, state: ControllerState) -> None:
        if state is not self._state:
            self._state = state
            self._status_dirty = True
            self._wake.set()

    def describe_run(
        self,
        *,
        run_id: str,
        protocol: str,
        chambers: Sequence[str],
        duration_s: float,
        period_s: float,
    ) -> None:
        """Tell the status what the records do not carry; call once when a run starts.

        Parameters
        ----------
        run_id
            Run identifier (the run log's name).
        protocol
            Protocol title or file name.
        chambers
            Chamber ids of the run, in display order.
        duration_s
            Protocol length, s.
        period_s
            Control tick period, s.

        Raises
        ------
        pydantic.ValidationError
            For a negative duration, a period that is not above 0, or a bad chamber id.
        """
        run = {
            "run_id": run_id,
            "protocol": protocol,
            "duration_s": duration_s,
            "period_s": period_s,
        }
        ControllerStatus(  # check now, in the caller, not later in the publishing task
            controller=self.controller_id, state=self._state, chambers=tuple(chambers), **run
        )
        self._run = run
        self._chambers = dict.fromkeys(chambers)
        self._status_dirty = True
        self._wake.set()

    def describe_tasks(self, tasks: Sequence[TaskInfo]) -> None:
        """Publish the run's operator tasks (retained); call when the run starts.

        Parameters
        ----------
        tasks
            Every task of the run, by start time; those that are over are left out when
            published.
        """
        self._tasks = tuple(tasks)
        self._tasks_sent = None
        self._status_dirty = True  # published with the next status
        self._wake.set()

    def task_list(self, *, ended: bool = False) -> TaskList | None:
        """The task list as it would be published now (None without tasks).

        Parameters
        ----------
        ended
            True for the empty list a clean stop leaves.

        Returns
        -------
        TaskList or None
            The tasks not yet over, as many as fit in one payload.
        """
        if self._tasks is None:
            return None
        tasks = () if ended else self._tasks
        run_id = self._run.get("run_id")
        return task_list(self.controller_id, run_id, tasks, self.clock.utc().timestamp())

    def on_tick(self, status: TickLike) -> None:
        """Progress callback of the control loop (``ControlLoop(progress=...)``).

        Parameters
        ----------
        status
            The tick's report: protocol time (s), protocol length (s) and phase.
        """
        self._elapsed_s = status.elapsed_s
        self._run.setdefault("duration_s", status.duration_s)
        self._set_phase(status.phase)

    def set_state(self, state: ControllerState) -> None:
        """Set the controller state directly (for states no run event reports).

        Parameters
        ----------
        state
            The new state (not offline: that is the broker's and the stop's business).
        """
        if state is ControllerState.OFFLINE:
            raise ValueError("offline is set by the last will or a clean stop")
        self._set_state(state)

    def status(self, *, online: bool = True) -> ControllerStatus:
        """The status as it would be published now.

        Parameters
        ----------
        online
            False for the farewell status of a clean stop.

        Returns
        -------
        ControllerStatus
            The status (drop counters included).
        """
        state = self._state
        if not online and state not in _ENDED:
            state = ControllerState.OFFLINE
        return ControllerStatus(
            controller=self.controller_id,
            online=online,
            state=state,
            software_version=self._software_version,
            phase=self._phase,
            elapsed_s=None if self._elapsed_s is None else max(0.0, self._elapsed_s),
            utc_s=self.clock.utc().timestamp(),
            chambers=tuple(self._chambers),
            dropped_samples=self._buffer.samples_dropped,
            dropped_records=self._buffer.records_dropped,
            remote_commands=self.config.commands.enabled,
            **self._run,
        )

    def stats(self) -> PublisherStats:
        """Current counters.

        Returns
        -------
        PublisherStats
            Connection state, published, queued and dropped counts.
        """
        buffered = self._buffer.stats()
        return PublisherStats(
            connected=self.connected,
            connections=self._connections,
            published=self._published,
            statuses=self._statuses,
            samples_queued=buffered.samples_queued,
            records_queued=buffered.records_queued,
            samples_dropped=buffered.samples_dropped,
            records_dropped=buffered.records_dropped,
            commands_accepted=self.commands.accepted,
            commands_refused=self.commands.refused,
            last_error=self._last_error,
        )

    async def wait_connected(self) -> None:
        """Return once a broker session is up (at once if it is)."""
        await self._connected.wait()

    # ------------------------------------------------------------------ network side
    async def run(self) -> None:
        """Publish until cancelled, reconnecting after every loss of the broker.

        Never returns otherwise and never raises anything but ``CancelledError``: telemetry
        problems must not end a run. On cancellation a connected publisher first publishes
        what it can of the buffer and a final retained status within ``timeout_s``.
        """
        config = self.config
        delay = config.reconnect_min_s
        while True:
            raise_if_cancelling()
            before = self._connections
            # Each session is a task of its own: on Python 3.11 a TaskGroup whose child fails
            # while the parent waits leaves the parent's cancellation count raised, which
            # must not outlive the session (``raise_if_cancelling`` reads that count).
            session = asyncio.get_running_loop().create_task(
                self._session(), name="telemetry-session"
            )
            try:
                await session
            except Exception as exc:
                self._problem(first_mqtt_error(exc))
            finally:
                self._connected.clear()
            if self._connections > before:
                delay = config.reconnect_min_s
            await self.clock.sleep(delay * (0.8 + 0.4 * self._rng.random()))
            delay = min(config.reconnect_max_s, delay * 2.0)

    def _problem(self, error: BaseException) -> None:
        """Log a connection problem once per streak (later ones at debug level)."""
        text = f"{type(error).__name__}: {error}" if str(error) else type(error).__name__
        self._last_error = text
        if isinstance(error, aiomqtt.MqttError):
            if self._failing:
                _log.debug("telemetry: broker %s still unavailable: %s", self.config.address, text)
            else:
                _log.warning("telemetry: broker %s unavailable: %s", self.config.address, text)
            self._failing = True
        else:
            _log.error("telemetry: publisher session failed", exc_info=error)

    def _will(self) -> aiomqtt.Will:
        gone = ControllerStatus(
            controller=self.controller_id,
            online=False,
            state=ControllerState.OFFLINE,
            software_version=self._software_version,
            remote_commands=self.config.commands.enabled,
        )
        return aiomqtt.Will(
            topic=self.topics.status(self.controller_id),
            payload=encode_model(gone),
            qos=1,
            retain=True,
        )

    async def _session(self) -> None:
        config = self.config
        client = make_client(
            config.address,
            identifier=f"squall-ctl-{self.controller_id}",
            username=self._username,
            password=self._password,
            tls=self._tls,
            keepalive_s=config.keepalive_s,
            timeout_s=config.timeout_s,
            will=self._will(),
        )
        async with client:
            self._connections += 1
            if self._failing:
                _log.info("telemetry: connected to %s again", config.address)
            self._failing = False
            self._last_error = ""
            await client.subscribe(self.topics.command(self.controller_id), qos=1)
            raise_if_cancelling()
            self._status_dirty = True
            self._tasks_sent = None  # a new session republishes the task list
            self._connected.set()
            try:
                async with asyncio.TaskGroup() as group:
                    group.create_task(self._receive(client), name="telemetry-commands")
                    group.create_task(self._send(client), name="telemetry-send")
            except asyncio.CancelledError:
                await self._farewell(client)
                raise

    async def _publish_status(self, client: aiomqtt.Client, *, online: bool = True) -> None:
        status = self.status(online=online)
        self._status_dirty = False
        self._last_status_s = self.clock.now_s()
        self._last_drops = (status.dropped_samples, status.dropped_records)
        await client.publish(
            self.topics.status(self.controller_id), encode_model(status), qos=1, retain=True
        )
        self._statuses += 1

    async def _publish_tasks(self, client: aiomqtt.Client, *, ended: bool = False) -> None:
        """Publish the task list when it differs from the one last published."""
        listed = self.task_list(ended=ended)
        if listed is None:
            return
        sent = self._tasks_sent
        if sent is not None and sent.tasks == listed.tasks and sent.more == listed.more:
            return
        await client.publish(
            self.topics.tasks(self.controller_id), encode_model(listed), qos=1, retain=True
        )
        self._tasks_sent = listed

    def _status_due(self) -> bool:
        if self._status_dirty or self._last_status_s is None:
            return True
        drops = (self._buffer.samples_dropped, self._buffer.records_dropped)
        if drops != self._last_drops:
            return True
        return self.clock.now_s() - self._last_status_s >= self.config.status_interval_s

    async def _publish_record(self, client: aiomqtt.Client) -> bool:
        """Publish the next buffered record; False when the buffer is empty."""
        record = self._buffer.pop()
        if record is None:
            return False
        topics, cid = self.topics, self.controller_id
        try:
            payload = encode_record(record)
            if isinstance(record, SampleRow):
                topic, qos = topics.sample(cid, record.chamber), self.config.sample_qos
            elif isinstance(record, AlarmRecord):
                topic, qos = topics.alarm(cid), 1
            else:
                topic, qos = topics.event(cid), 1
        except ValueError:
            _log.exception("telemetry: cannot encode %r; skipped", record)
            return True
        try:
            await client.publish(topic, payload, qos=qos)
        except BaseException:
            self._buffer.unpop(record)
            raise
        self._published += 1
        return True

    async def _send(self, client: aiomqtt.Client) -> None:
        while True:
            raise_if_cancelling()
            if self._status_due():
                await self._publish_status(client)
                await self._publish_tasks(client)
            if await self._publish_record(client):
                continue
            self._wake.clear()
            if self._status_due():
                continue
            last_s = self.clock.now_s() if self._last_status_s is None else self._last_status_s
            wait_s = last_s + self.config.status_interval_s - self.clock.now_s()
            try:
                async with asyncio.timeout(max(0.0, wait_s)):
                    await self._wake.wait()
            except TimeoutError:
                pass

    async def _farewell(self, client: aiomqtt.Client) -> None:
        """Flush what fits within the timeout, then the final retained status."""
        try:
            async with asyncio.timeout(self.config.timeout_s):
                while await self._publish_record(client):
                    pass
                await self._publish_tasks(client, ended=True)
                await self._publish_status(client, online=False)
        except (TimeoutError, aiomqtt.MqttError) as exc:
            _log.warning("telemetry: stopped before everything was published: %s", exc)

    # ------------------------------------------------------------------ commands
    async def _receive(self, client: aiomqtt.Client) -> None:
        command_topic = self.topics.command(self.controller_id)
        result_topic = self.topics.command_result(self.controller_id)
        async for message in client.messages:
            raise_if_cancelling()
            if message.topic.value != command_topic:
                continue
            outcome = self.handle_command(payload_bytes(message.payload))
            result = CommandResult(
                id=outcome.request_id,
                user=outcome.user,
                command=outcome.name,
                accepted=outcome.accepted,
                reason=outcome.reason,
                utc_s=outcome.utc_s,
            )
            await client.publish(result_topic, encode_model(result), qos=1)

    def handle_command(self, payload: bytes) -> CommandOutcome:
        """Check, carry out and log one command payload (what the command topic feeds).

        Parameters
        ----------
        payload
            The message payload as received.

        Returns
        -------
        CommandOutcome
            Accepted, or refused with the reason; also passed to ``log_command``.
        """
        return self.commands.handle(payload, self.clock.utc().timestamp())
