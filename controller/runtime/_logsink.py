"""The logger task: records queued by the control loop, written to the run log in order.

Rules of this module
--------------------
- The control loop never waits for the disk: it queues each tick's sample rows and any
  alarms, events, closed incubation windows and operator (audit) records with
  :meth:`LogSink.put`, and the sink's task writes them in the order
  they were queued (consecutive sample batches go down in one ``executemany``). The run log's
  writer commits alarms, events, windows and audit records at once and samples at its commit
  interval.
- A failed write (disk full, I/O error) is logged and counted, never raised into the loop:
  controlling the chambers matters more than recording them, and the writer stays usable
  for the next batch.
- :meth:`LogSink.drain` writes whatever is still queued; the shutdown path calls it after
  the task has stopped, so nothing queued is lost on a clean stop.
- Telemetry: a sink may carry a telemetry sink (:meth:`LogSink.attach_telemetry`; MQTT
  publishing, :mod:`controller.telemetry`). :meth:`LogSink.put` then also offers every
  tick's sample rows, alarms and events to it. ``offer`` is non-blocking by contract (it
  only fills the publisher's bounded buffer); an ``offer`` that raises is logged once and
  never reaches the loop, and the run log gets the item regardless. Windows and audit
  records are the run log's alone.
"""

from __future__ import annotations

import asyncio
import logging
from collections import deque
from collections.abc import Sequence
from typing import Protocol

from controller.control import EventKind as InterlockEventKind
from controller.control import InterlockEvent
from controller.errors import RuntimeFailure
from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    AuditRecord,
    EventRecord,
    RunLogWriter,
    SampleRow,
    WindowRecord,
)

__all__ = ["LogSink", "TelemetryFeed", "alarm_record"]

_log = logging.getLogger(__name__)

Item = list[SampleRow] | AlarmRecord | EventRecord | WindowRecord | AuditRecord
Record = AlarmRecord | EventRecord | WindowRecord | AuditRecord

_ACTIONS = {
    InterlockEventKind.RAISED: AlarmAction.RAISE,
    InterlockEventKind.CLEARED: AlarmAction.CLEAR,
    InterlockEventKind.ACKNOWLEDGED: AlarmAction.ACK,
}


def alarm_record(chamber: str, event: InterlockEvent, utc_s: float) -> AlarmRecord | None:
    """The run-log alarm record of an interlock event, if it is one the log keeps.

    Parameters
    ----------
    chamber
        Chamber the event concerns.
    event
        The interlock event (clock time ``t_s`` in s).
    utc_s
        UTC wall time of the event, POSIX s.

    Returns
    -------
    AlarmRecord or None
        Raised, cleared and acknowledged conditions become alarm records with the condition's
        code and reason; a latched condition is still raised for the log, and overall state
        changes are summaries of condition records, so both give None.
    """
    action = _ACTIONS.get(event.kind)
    if action is None or event.condition is None or event.level is None:
        return None
    return AlarmRecord(
        t_s=event.t_s,
        utc_s=utc_s,
        action=action,
        level=AlarmLevel(event.level.value),
        code=event.condition.value,
        reason=event.message,
        chamber=chamber,
    )


class TelemetryFeed(Protocol):
    """What a log sink hands telemetry to (``controller.telemetry.TelemetryPublisher`` fits)."""

    def offer(self, item: Sequence[SampleRow] | AlarmRecord | EventRecord) -> None:
        """Take one tick's sample rows, an alarm or an event; must return at once."""
        ...


class LogSink:
    """Queue between the control loop and the run-log writer.

    Parameters
    ----------
    writer
        The open run-log writer; the sink only appends (the caller finishes or closes it).
    """

    def __init__(self, writer: RunLogWriter) -> None:
        self.writer = writer
        self._queue: deque[Item] = deque()
        self._wake = asyncio.Event()
        self.rows_written = 0
        """Sample rows in the log (or pending in its open transaction), dimensionless."""
        self.rows_lost = 0
        """Sample rows a failed write dropped, dimensionless."""
        self.records_lost = 0
        """Alarm, event, window and audit records a failed write dropped, dimensionless."""
        self.telemetry: TelemetryFeed | None = None
        """Where sample rows, alarms and events are offered as well (None: nowhere)."""
        self.telemetry_failures = 0
        """Offers to the telemetry sink that raised, dimensionless."""

    def attach_telemetry(self, telemetry: TelemetryFeed | None) -> None:
        """Offer every tick's sample rows, alarms and events to ``telemetry`` too.

        Parameters
        ----------
        telemetry
            A non-blocking telemetry sink (the MQTT publisher); None detaches it.
        """
        self.telemetry = telemetry

    def put(self, item: Item) -> None:
        """Queue records for the log.

        Parameters
        ----------
        item
            One tick's sample rows, or an alarm, event, window or audit record.
        """
        self._queue.append(item)
        self._wake.set()
        telemetry = self.telemetry
        if telemetry is not None and isinstance(item, list | AlarmRecord | EventRecord):
            try:
                telemetry.offer(item)
            except Exception:  # telemetry must never cost a tick, nor the log its record
                self.telemetry_failures += 1
                if self.telemetry_failures == 1:
                    _log.exception("telemetry: offering a record failed (later failures quiet)")

    @property
    def pending(self) -> int:
        """Items queued and not yet written, dimensionless."""
        return len(self._queue)

    async def run(self) -> None:
        """Write queued items as they come, until cancelled (then :meth:`drain` the rest)."""
        while True:
            await self._wake.wait()
            self._wake.clear()
            self.drain()

    def drain(self) -> None:
        """Write everything queued now, in order."""
        queue = self._queue
        while queue:
            item = queue.popleft()
            if isinstance(item, list):
                rows = item
                while queue and isinstance(queue[0], list):
                    rows = rows + queue.popleft()  # type: ignore[operator]
                self._samples(rows)
            else:
                self._record(item)

    def _samples(self, rows: list[SampleRow]) -> None:
        uncommitted = self.writer.pending_rows
        try:
            self.writer.append_samples(rows)
        except RuntimeFailure as exc:
            # the writer rolled back this batch and the rows not yet committed before it
            self.rows_lost += len(rows) + uncommitted
            self.rows_written -= uncommitted
            _log.error("run log: %s", exc)
        else:
            self.rows_written += len(rows)

    def _record(self, record: Record) -> None:
        uncommitted = self.writer.pending_rows
        writer = self.writer
        try:
            if isinstance(record, AlarmRecord):
                writer.record_alarm(record)
            elif isinstance(record, EventRecord):
                writer.record_event(record)
            elif isinstance(record, WindowRecord):
                writer.record_window(record)
            else:
                writer.record_audit(record)
        except RuntimeFailure as exc:
            # the record commits together with pending samples, which are rolled back too
            self.records_lost += 1
            self.rows_lost += uncommitted
            self.rows_written -= uncommitted
            _log.error("run log: %s", exc)
