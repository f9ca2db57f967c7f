"""The logger task: records queued by the control loop, written to the run log in order.

Rules of this module
--------------------
- The control loop never waits for the disk: it queues each tick's sample rows and any
  alarms, events, closed incubation windows and operator (audit) records with
  :meth:`LogSink.put` (the loop's rows as value tuples with :meth:`LogSink.put_samples`), and
  the sink's task writes them in the order they were queued (consecutive sample batches go
  down in one ``executemany``). The run log's writer commits alarms, events, windows and
  audit records at once and samples at its commit interval.
- Samples that the writer would not commit yet, with nothing queued before them, go to it at
  once (it holds them until their commit, :mod:`controller.storage._writer`; nothing waits
  for the disk) instead of waking the task; the task is woken for every record and for
  samples whose commit is due. The rows, their order and the commits are the same as
  through the task, and a simulated run at full speed does not turn the event loop once a
  tick to log it.
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
from collections.abc import Mapping, Sequence
from typing import Any, Protocol

from controller.control import EventKind as InterlockEventKind
from controller.control import InterlockEvent
from controller.errors import RuntimeFailure
from controller.runtime._decide import Decision, Target
from controller.runtime._io import ChamberReadings
from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    AuditRecord,
    EventRecord,
    IncubationState,
    RunLogWriter,
    SampleRow,
    WindowRecord,
)

__all__ = ["LogSink", "TelemetryFeed", "alarm_record", "tick_values"]

_log = logging.getLogger(__name__)

Values = list[tuple[Any, ...]]
"""Sample rows as value tuples in :class:`SampleRow` field order."""
Item = list[SampleRow] | AlarmRecord | EventRecord | WindowRecord | AuditRecord
Record = AlarmRecord | EventRecord | WindowRecord | AuditRecord
_T_S = 0  # index of t_s in a sample's values (the first field of SampleRow)

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


# a row's incubation as the state's plain text value (SampleRow.from_values takes it)
_INCUBATION = {state.value: state.value for state in IncubationState}
_OPEN, _CLOSED = _INCUBATION["open"], _INCUBATION["closed"]


def tick_values(
    when: tuple[float, float, float, str],
    chambers: Sequence[str],
    readings: Mapping[str, ChamberReadings],
    targets: Mapping[str, Target],
    decision: Decision,
    holding: dict[str, str],
) -> list[tuple[Any, ...]]:
    """One tick's sample rows as value tuples (:meth:`SampleRow.values`), one per chamber.

    Parameters
    ----------
    when
        The tick's clock time (s), UTC (POSIX s), protocol time (s) and phase.
    chambers
        Protocol chambers, in log order.
    readings
        Readings as read, by chamber (°C, µmol photons m⁻² s⁻¹, cm s⁻¹, µmol L⁻¹, %).
    targets
        The protocol's setpoints, by chamber (same units).
    decision
        What was decided (outputs in %, alarm, incubation status).
    holding
        Active alarm code by chamber; brought up to date with this tick's decision.

    Returns
    -------
    list of tuple
        Per chamber its row's values in :class:`SampleRow` field order. The incubation is
        the cycle's status, else open while the pump runs.
    """
    now, utc_s, elapsed, phase = when
    chosen_of = decision.chambers
    rows = []
    append = rows.append
    for chamber in chambers:
        reading, target, chosen = readings[chamber], targets[chamber], chosen_of[chamber]
        out = chosen.outputs
        alarm = None if chosen.alarm is None else chosen.alarm.value
        if alarm is not None:
            holding[chamber] = alarm
        elif holding:
            holding.pop(chamber, None)
        if chosen.incubation is not None:
            incubation = _INCUBATION[chosen.incubation.value]
        else:
            incubation = _OPEN if out.pump_pct > 0 else _CLOSED
        append(
            (
                now,
                utc_s,
                elapsed,
                chamber,
                phase,
                reading.temperature_c,
                target.temperature_c,
                reading.par,
                target.par,
                reading.flow_cm_s,
                target.flow_cm_s,
                reading.o2_umol_l,
                reading.o2_sat_pct,
                out.heater_pct,
                out.chiller_pct,
                out.lamp_pct,
                out.pump_pct,
                incubation,
                alarm,
            )
        )
    return rows


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
        self._queue: deque[Values | Record] = deque()
        self._wake = asyncio.Event()
        self.rows_written = 0
        """Sample rows in the log (or handed to its writer, not yet committed), dimensionless."""
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
        if isinstance(item, list):
            self._enqueue_samples([row.values() for row in item])
        else:
            self._queue.append(item)
            self._wake.set()
        if self.telemetry is not None and isinstance(item, list | AlarmRecord | EventRecord):
            self._offer(item)

    def put_samples(self, values: Values) -> None:
        """Queue one tick's sample rows given as value tuples (:meth:`SampleRow.values`).

        Parameters
        ----------
        values
            Per chamber the row's values in :class:`SampleRow` field order (units as the
            fields name them); not to be changed afterwards.
        """
        self._enqueue_samples(values)
        if self.telemetry is not None:  # telemetry takes rows: build them only for it
            self._offer([SampleRow.from_values(v) for v in values])

    def _enqueue_samples(self, values: Values) -> None:
        if not values:
            return
        writer = self.writer
        if not self._queue and not writer.commit_due(values[-1][_T_S]):
            # held by the writer until its commit: no SQLite call, so no write can fail now
            writer.append_sample_values(values)
            self.rows_written += len(values)
            return
        self._queue.append(values)
        self._wake.set()

    def _offer(self, item: Sequence[SampleRow] | AlarmRecord | EventRecord) -> None:
        telemetry = self.telemetry
        assert telemetry is not None
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
                if queue and isinstance(queue[0], list):
                    rows = list(rows)  # the caller may keep its list: gather into a new one
                    while queue and isinstance(queue[0], list):
                        rows.extend(queue.popleft())  # type: ignore[arg-type]
                self._samples(rows)
            else:
                self._record(item)

    def _samples(self, rows: Values) -> None:
        uncommitted = self.writer.pending_rows
        try:
            self.writer.append_sample_values(rows)
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
