"""The publisher's bounded buffer: the control loop drops records in, never waits.

Rules of this module
--------------------
- :meth:`TelemetryBuffer.put` is synchronous, O(1) per record and never blocks or raises
  for a full buffer: it is what the control loop's ``offer`` calls every tick.
- Two lanes. Sample rows go to a lane of fixed size; when it is full the *oldest* row is
  dropped and counted (the newest state of a chamber matters most after an outage). Alarm
  and event records go to their own lane and are never dropped to make room for samples.
  That lane has a limit too, only as a memory guard for an outage that lasts days while
  alarms keep coming; past it the oldest record is dropped and counted separately.
- :meth:`TelemetryBuffer.pop` serves alarms and events before samples, each lane in order,
  so an alarm raised during an outage reaches watchers first when the broker is back.
- :meth:`TelemetryBuffer.unpop` puts back a record whose publication failed, at the head of
  its lane, so a broken connection loses nothing that was still in the buffer.
- This is a plain two-lane deque rather than an ``asyncio.Queue``: a queue cannot drop its
  oldest entry of one kind, and the publisher waits on an event the buffer does not need to
  know about.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass

from controller.storage import AlarmRecord, EventRecord, SampleRow

__all__ = ["BufferStats", "TelemetryBuffer"]

Record = SampleRow | AlarmRecord | EventRecord


@dataclass(frozen=True, slots=True, kw_only=True)
class BufferStats:
    """Counters of a :class:`TelemetryBuffer`.

    Attributes
    ----------
    samples_queued
        Sample rows waiting, dimensionless.
    records_queued
        Alarm and event records waiting, dimensionless.
    samples_dropped
        Sample rows dropped because the sample lane was full, dimensionless.
    records_dropped
        Records dropped by the record lane's memory guard, dimensionless.
    """

    samples_queued: int
    records_queued: int
    samples_dropped: int
    records_dropped: int


class TelemetryBuffer:
    """Two-lane bounded buffer between the control loop and the publisher task.

    Parameters
    ----------
    max_samples
        Sample rows kept, at least 1, dimensionless.
    max_records
        Alarm and event records kept, at least 1, dimensionless.
    """

    def __init__(self, max_samples: int, max_records: int) -> None:
        if max_samples < 1 or max_records < 1:
            raise ValueError("buffer sizes must be at least 1")
        self.max_samples = max_samples
        self.max_records = max_records
        self._samples: deque[SampleRow] = deque()
        self._records: deque[AlarmRecord | EventRecord] = deque()
        self.samples_dropped = 0
        """Sample rows dropped for room, dimensionless."""
        self.records_dropped = 0
        """Records dropped by the memory guard, dimensionless."""

    def __len__(self) -> int:
        return len(self._samples) + len(self._records)

    def put(self, record: Record) -> None:
        """Queue one record; a full lane drops its oldest entry (counted).

        Parameters
        ----------
        record
            A sample row, alarm record or event record.
        """
        if isinstance(record, SampleRow):
            if len(self._samples) >= self.max_samples:
                self._samples.popleft()
                self.samples_dropped += 1
            self._samples.append(record)
        elif isinstance(record, AlarmRecord | EventRecord):
            if len(self._records) >= self.max_records:
                self._records.popleft()
                self.records_dropped += 1
            self._records.append(record)
        else:
            raise TypeError(f"telemetry takes sample rows, alarms and events, not {record!r}")

    def extend(self, records: Iterable[Record]) -> None:
        """Queue several records in order (see :meth:`put`).

        Parameters
        ----------
        records
            Sample rows, alarm records or event records.
        """
        for record in records:
            self.put(record)

    def pop(self) -> Record | None:
        """Take the next record to publish: alarms and events first, then samples.

        Returns
        -------
        SampleRow or AlarmRecord or EventRecord or None
            The record, or None when both lanes are empty.
        """
        if self._records:
            return self._records.popleft()
        if self._samples:
            return self._samples.popleft()
        return None

    def unpop(self, record: Record) -> None:
        """Put back a record :meth:`pop` gave out, at the head of its lane.

        A full lane makes room the same way :meth:`put` does, except that it is the record
        put back that counts as the oldest.

        Parameters
        ----------
        record
            The record whose publication failed.
        """
        if isinstance(record, SampleRow):
            if len(self._samples) >= self.max_samples:
                self.samples_dropped += 1
                return
            self._samples.appendleft(record)
        else:
            if len(self._records) >= self.max_records:
                self.records_dropped += 1
                return
            self._records.appendleft(record)

    def stats(self) -> BufferStats:
        """Current counters.

        Returns
        -------
        BufferStats
            Queued and dropped counts.
        """
        return BufferStats(
            samples_queued=len(self._samples),
            records_queued=len(self._records),
            samples_dropped=self.samples_dropped,
            records_dropped=self.records_dropped,
        )
