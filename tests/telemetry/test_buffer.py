"""The publisher's buffer: bounded for samples, never trading alarms or events for them."""

from __future__ import annotations

import pytest

from controller.storage import EventKind
from controller.telemetry import BufferStats, TelemetryBuffer

from ._helpers import alarm, event, sample


def drain(buffer: TelemetryBuffer) -> list[object]:
    out = []
    while (record := buffer.pop()) is not None:
        out.append(record)
    return out


def test_a_full_sample_lane_drops_its_oldest_rows_and_counts_them() -> None:
    buffer = TelemetryBuffer(max_samples=3, max_records=10)
    rows = [sample("A1", k) for k in range(5)]
    buffer.extend(rows)
    assert buffer.stats() == BufferStats(
        samples_queued=3, records_queued=0, samples_dropped=2, records_dropped=0
    )
    assert drain(buffer) == rows[2:]


def test_alarms_and_events_are_kept_and_served_first_in_order() -> None:
    buffer = TelemetryBuffer(max_samples=2, max_records=10)
    records = [alarm("A1", 1.0), event(EventKind.HOLD, 2.0), alarm("B", 3.0, code="low_o2")]
    buffer.put(sample("A1", 0))
    buffer.put(records[0])
    for k in range(1, 50):  # a long outage of samples does not push the alarms out
        buffer.put(sample("A1", k))
        if k == 20:
            buffer.put(records[1])
    buffer.put(records[2])
    assert drain(buffer) == [*records, sample("A1", 48), sample("A1", 49)]
    assert buffer.samples_dropped == 48 and buffer.records_dropped == 0


def test_a_record_put_back_after_a_failed_publish_is_next_again() -> None:
    buffer = TelemetryBuffer(max_samples=3, max_records=2)
    buffer.extend([sample("A1", 0), sample("A1", 1), alarm("A1", 1.0)])
    first = buffer.pop()
    assert first == alarm("A1", 1.0)
    buffer.unpop(first)
    assert buffer.pop() == first
    row = buffer.pop()
    assert row == sample("A1", 0)
    buffer.put(sample("A1", 2))
    buffer.unpop(row)
    assert drain(buffer) == [sample("A1", 0), sample("A1", 1), sample("A1", 2)]
    # into a full lane the row put back counts as the oldest, so it is the one dropped
    buffer.extend([sample("A1", 3), sample("A1", 4), sample("A1", 5)])
    buffer.unpop(sample("A1", 2))
    assert buffer.samples_dropped == 1
    assert drain(buffer) == [sample("A1", 3), sample("A1", 4), sample("A1", 5)]


def test_the_record_lane_guards_memory_by_dropping_its_oldest() -> None:
    buffer = TelemetryBuffer(max_samples=2, max_records=2)
    buffer.extend([alarm("A1", float(t)) for t in range(4)])
    assert buffer.records_dropped == 2
    assert drain(buffer) == [alarm("A1", 2.0), alarm("A1", 3.0)]


def test_only_records_and_sane_sizes_are_taken() -> None:
    with pytest.raises(ValueError, match="at least 1"):
        TelemetryBuffer(max_samples=0, max_records=1)
    with pytest.raises(TypeError, match="sample rows, alarms and events"):
        TelemetryBuffer(1, 1).put("A1")  # type: ignore[arg-type]
