"""What the publisher shows the control loop: the sink it feeds, the tick report it reads,
and the counters it keeps (kept apart so :mod:`._publisher` stays one sitting long).

Rules of this module
--------------------
- Plain types and two helpers of the publisher; no broker, no clock.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Protocol

import aiomqtt

from controller.storage import AlarmRecord, EventRecord, SampleRow

__all__ = [
    "Offered",
    "PublisherStats",
    "TelemetrySink",
    "TickLike",
    "first_mqtt_error",
    "payload_bytes",
]

Offered = SampleRow | Sequence[SampleRow] | AlarmRecord | EventRecord
"""What the publisher takes: one tick's sample rows, one row, an alarm or an event."""


class TelemetrySink(Protocol):
    """What the control loop feeds: anything with a non-blocking ``offer``."""

    def offer(self, item: Offered) -> None:
        """Take one tick's sample rows, one sample row, an alarm or an event; never block."""
        ...


class TickLike(Protocol):
    """The fields of a tick report :meth:`TelemetryPublisher.on_tick` reads (the runtime's
    ``TickStatus`` fits)."""

    @property
    def elapsed_s(self) -> float:
        """Protocol time, s."""
        ...

    @property
    def duration_s(self) -> float:
        """Protocol length, s."""
        ...

    @property
    def phase(self) -> str:
        """Phase in force."""
        ...

    @property
    def utc(self) -> datetime:
        """Wall time of the tick, aware UTC."""
        ...


@dataclass(frozen=True, slots=True, kw_only=True)
class PublisherStats:
    """Counters of a :class:`TelemetryPublisher`.

    Attributes
    ----------
    connected
        Whether a broker session is up.
    connections
        Sessions established so far, dimensionless.
    published
        Records published (samples, alarms, events), dimensionless.
    statuses
        Status messages published, dimensionless.
    samples_queued, records_queued
        Records waiting in the buffer, dimensionless.
    samples_dropped, records_dropped
        Records the buffer dropped, dimensionless.
    commands_accepted, commands_refused
        Remote commands carried out and refused, dimensionless.
    last_error
        The last connection problem, or empty.
    """

    connected: bool
    connections: int
    published: int
    statuses: int
    samples_queued: int
    records_queued: int
    samples_dropped: int
    records_dropped: int
    commands_accepted: int
    commands_refused: int
    last_error: str


def payload_bytes(payload: Any) -> bytes:
    """A message payload as bytes (aiomqtt hands over bytes, text or None).

    Parameters
    ----------
    payload
        The payload as received.

    Returns
    -------
    bytes
        Its bytes; empty for None.
    """
    if isinstance(payload, bytes | bytearray):
        return bytes(payload)
    if isinstance(payload, str):
        return payload.encode()
    return b"" if payload is None else str(payload).encode()


def first_mqtt_error(error: BaseException) -> BaseException:
    """The first MQTT error inside an exception group, else ``error`` itself.

    Parameters
    ----------
    error
        What ended a session.

    Returns
    -------
    BaseException
        The MQTT error to report.
    """
    if isinstance(error, BaseExceptionGroup):
        for inner in error.exceptions:
            found = first_mqtt_error(inner)
            if isinstance(found, aiomqtt.MqttError):
                return found
    return error
