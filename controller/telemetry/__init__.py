"""MQTT telemetry: controllers publish to a broker, watchers anywhere read them.

Topic layout (under a prefix, default ``squall``; ids are single topic levels)::

    <prefix>/<controller>/status                        retained, QoS 1: ControllerStatus
    <prefix>/<controller>/chamber/<chamber>/sample      QoS 0: the run log's SampleRow
    <prefix>/<controller>/alarm                         QoS 1: the run log's AlarmRecord
    <prefix>/<controller>/event                         QoS 1: the run log's EventRecord
    <prefix>/<controller>/tasks                         retained, QoS 1: TaskList
    <prefix>/<controller>/cmd                           in, QoS 1: RemoteCommand (off by default)
    <prefix>/<controller>/cmd/result                    QoS 1: CommandResult

Every payload is a JSON object with ``"v": 1``; sample, alarm and event payloads carry the
fields of the run-log records (plus ``time``, ISO 8601 UTC). The last will sets the status
to ``online: false, state: offline``. ``hardware-notes/mqtt-topics.md`` documents the
schemas, the broker set-up and the access rules.

- :class:`TelemetryPublisher`: the controller side, an asyncio task fed through the
  non-blocking :meth:`TelemetryPublisher.offer` (a :class:`TelemetrySink`), with a bounded
  :class:`TelemetryBuffer` that drops the oldest samples but keeps alarms and events.
- :class:`CommandGate`: remote commands (off by default) checked against the settings and
  an allow-list, carried out through a handler, every one logged.
- :class:`TelemetryWatcher`: the watch side; ``async for`` over typed updates.
- :class:`TelemetryConfig`: the ``[telemetry]`` table a rig file can carry.

Names are re-exported lazily (see :mod:`controller._lazy`), so naming this package does
not load the MQTT client library.
"""

from typing import TYPE_CHECKING

from controller._lazy import lazy_exports

if TYPE_CHECKING:
    from controller.telemetry._buffer import BufferStats, TelemetryBuffer
    from controller.telemetry._commands import (
        CommandGate,
        CommandHandler,
        CommandLog,
        CommandOutcome,
    )
    from controller.telemetry._config import (
        BrokerAddress,
        CommandsConfig,
        TelemetryConfig,
        TlsConfig,
    )
    from controller.telemetry._connect import make_client
    from controller.telemetry._payloads import (
        MAX_COMMAND_BYTES,
        MAX_PAYLOAD_BYTES,
        PAYLOAD_VERSION,
        CommandName,
        CommandResult,
        ControllerState,
        ControllerStatus,
        PayloadError,
        RemoteCommand,
        TaskInfo,
        TaskList,
        decode_model,
        decode_record,
        encode_model,
        encode_record,
        task_list,
    )
    from controller.telemetry._publisher import TelemetryPublisher
    from controller.telemetry._publisher_types import PublisherStats, TelemetrySink, TickLike
    from controller.telemetry._topics import (
        DEFAULT_PREFIX,
        ID_PATTERN,
        PREFIX_PATTERN,
        ParsedTopic,
        TopicKind,
        Topics,
        check_id,
    )
    from controller.telemetry._watcher import (
        AlarmUpdate,
        CommandResultUpdate,
        ConnectionUpdate,
        EventUpdate,
        SampleUpdate,
        StatusUpdate,
        TasksUpdate,
        TelemetryUpdate,
        TelemetryWatcher,
    )

_NAMES = {
    "AlarmUpdate": "_watcher",
    "BrokerAddress": "_config",
    "BufferStats": "_buffer",
    "CommandGate": "_commands",
    "CommandHandler": "_commands",
    "CommandLog": "_commands",
    "CommandName": "_payloads",
    "CommandOutcome": "_commands",
    "CommandResult": "_payloads",
    "CommandResultUpdate": "_watcher",
    "CommandsConfig": "_config",
    "ConnectionUpdate": "_watcher",
    "ControllerState": "_payloads",
    "ControllerStatus": "_payloads",
    "DEFAULT_PREFIX": "_topics",
    "EventUpdate": "_watcher",
    "ID_PATTERN": "_topics",
    "MAX_COMMAND_BYTES": "_payloads",
    "MAX_PAYLOAD_BYTES": "_payloads",
    "PAYLOAD_VERSION": "_payloads",
    "PREFIX_PATTERN": "_topics",
    "ParsedTopic": "_topics",
    "PayloadError": "_payloads",
    "PublisherStats": "_publisher_types",
    "RemoteCommand": "_payloads",
    "SampleUpdate": "_watcher",
    "StatusUpdate": "_watcher",
    "TaskInfo": "_payloads",
    "TaskList": "_payloads",
    "TasksUpdate": "_watcher",
    "TelemetryBuffer": "_buffer",
    "TelemetryConfig": "_config",
    "TelemetryPublisher": "_publisher",
    "TelemetrySink": "_publisher_types",
    "TelemetryUpdate": "_watcher",
    "TelemetryWatcher": "_watcher",
    "TickLike": "_publisher_types",
    "TlsConfig": "_config",
    "TopicKind": "_topics",
    "Topics": "_topics",
    "check_id": "_topics",
    "decode_model": "_payloads",
    "decode_record": "_payloads",
    "encode_model": "_payloads",
    "encode_record": "_payloads",
    "make_client": "_connect",
    "task_list": "_payloads",
}

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)

__all__ = [
    "DEFAULT_PREFIX",
    "ID_PATTERN",
    "MAX_COMMAND_BYTES",
    "MAX_PAYLOAD_BYTES",
    "PAYLOAD_VERSION",
    "PREFIX_PATTERN",
    "AlarmUpdate",
    "BrokerAddress",
    "BufferStats",
    "CommandGate",
    "CommandHandler",
    "CommandLog",
    "CommandName",
    "CommandOutcome",
    "CommandResult",
    "CommandResultUpdate",
    "CommandsConfig",
    "ConnectionUpdate",
    "ControllerState",
    "ControllerStatus",
    "EventUpdate",
    "ParsedTopic",
    "PayloadError",
    "PublisherStats",
    "RemoteCommand",
    "SampleUpdate",
    "StatusUpdate",
    "TaskInfo",
    "TaskList",
    "TasksUpdate",
    "TelemetryBuffer",
    "TelemetryConfig",
    "TelemetryPublisher",
    "TelemetrySink",
    "TelemetryUpdate",
    "TelemetryWatcher",
    "TickLike",
    "TlsConfig",
    "TopicKind",
    "Topics",
    "check_id",
    "decode_model",
    "decode_record",
    "encode_model",
    "encode_record",
    "make_client",
    "task_list",
]
