"""Sample rows as plain value tuples (the control loop's fast path into the run log): the
same rows, the same commits and the same refusals as :meth:`RunLogWriter.append_samples`."""

from __future__ import annotations

import dataclasses
import sqlite3
from pathlib import Path

import pandas as pd
import pytest
from runlog_helpers import START_UTC_S, make_meta, tick_rows

from controller.errors import RuntimeFailure
from controller.storage import (
    EventKind,
    EventRecord,
    IncubationState,
    RunLogReader,
    RunLogWriter,
    SampleRow,
)
from controller.storage._records import SAMPLE_FIELDS


def test_values_are_every_field_in_order_and_make_the_same_row_again() -> None:
    row = tick_rows(12.5, 3, alarm_chamber=1, closed_chamber=2)[1]
    values = row.values()
    assert values == tuple(getattr(row, f.name) for f in dataclasses.fields(SampleRow))
    assert SampleRow.from_values(values) == row
    with pytest.raises(ValueError):  # one value short: refused, not silently shifted
        SampleRow.from_values(values[:-1])


def test_value_tuples_log_what_rows_log_and_commit_at_the_same_moments(tmp_path: Path) -> None:
    logs = {}
    commits: dict[str, list[float | None]] = {"rows": [], "values": []}
    for how in ("rows", "values"):
        log = logs[how] = tmp_path / f"{how}.sqlite"
        with RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0) as writer:
            for k in range(9):  # every 0.25 s of clock time: commits at 0, 1 and 2 s
                rows = tick_rows(0.25 * k, 3, alarm_chamber=k % 3, closed_chamber=2)
                due = writer.commit_due(rows[-1].t_s)
                if how == "rows":
                    writer.append_samples(rows)
                else:
                    writer.append_sample_values([r.values() for r in rows])
                assert due == (writer.pending_rows == 0)  # commit_due foretold it
                commits[how].append(writer.last_commit_t_s)
    assert commits["rows"] == commits["values"]
    assert commits["values"] == [0.0] * 4 + [1.0] * 4 + [2.0]
    with RunLogReader(logs["rows"]) as a, RunLogReader(logs["values"]) as b:
        pd.testing.assert_frame_equal(a.samples(), b.samples(), check_exact=True)
        assert len(b.samples()) == 27


def test_commit_due_for_a_clock_that_went_back(tmp_path: Path) -> None:
    with RunLogWriter(tmp_path / "run.sqlite", meta=make_meta(3), commit_interval_s=5.0) as w:
        assert w.commit_due(100.0)  # nothing committed yet: a session's first rows go at once
        w.append_sample_values([r.values() for r in tick_rows(100.0)])
        assert not w.commit_due(101.0)
        assert w.commit_due(105.0)
        assert w.commit_due(99.0)  # the clock went back: commit rather than wait


def test_a_resumed_log_refuses_value_tuples_it_already_has(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta(3)) as writer:
        writer.append_sample_values([r.values() for r in tick_rows(5.0)])
    writer = RunLogWriter.resume(log)
    try:
        again = [r.values() for r in tick_rows(5.0)]
        with pytest.raises(ValueError, match="log that time twice"):
            writer.append_sample_values(again)
        later = [r.values() for r in tick_rows(0.0, utc_offset_s=10.0)]  # a new session's clock
        writer.append_sample_values(later)
        assert later[0][1] == START_UTC_S + 10.0
    finally:
        writer.close()
    with RunLogReader(log) as reader:
        assert len(reader.samples()) == 6


def test_incubation_may_be_given_as_its_text_value() -> None:
    row = tick_rows(3.0, 3, closed_chamber=2)[2]
    values = list(row.values())
    values[SAMPLE_FIELDS.index("incubation")] = "closed"
    again = SampleRow.from_values(values)
    assert again == row and again.incubation is IncubationState.CLOSED
    values[SAMPLE_FIELDS.index("incubation")] = "ajar"
    with pytest.raises(ValueError):
        SampleRow.from_values(values)


def _committed(log: Path) -> list[float]:
    """Clock times of the committed sample rows, in seq order (a reader sees only those)."""
    with RunLogReader(log) as reader:
        return reader.samples(columns=["t_s"])["t_s"].tolist()


def test_held_value_rows_go_in_at_their_commit_in_the_order_they_came(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta(2), commit_interval_s=1.0) as writer:
        writer.append_sample_values([r.values() for r in tick_rows(0.0, 2)])  # first: at once
        writer.append_sample_values([r.values() for r in tick_rows(0.25, 2)])  # held
        assert writer._held and writer.pending_rows == 2
        writer.append_samples(tick_rows(0.5, 2))  # records go in at once, after the held rows
        assert not writer._held and writer.pending_rows == 4
        writer.append_sample_values([r.values() for r in tick_rows(0.75, 2)])  # held
        assert _committed(log) == [0.0] * 2  # held or pending rows are not in the log yet
        writer.record_event(EventRecord(t_s=0.8, utc_s=START_UTC_S + 0.8, kind=EventKind.HOLD))
        assert (writer.pending_rows, writer.last_commit_t_s) == (0, 0.8)
        assert _committed(log) == [0.0] * 2 + [0.25] * 2 + [0.5] * 2 + [0.75] * 2
        writer.append_sample_values([r.values() for r in tick_rows(1.5, 2)])  # held
        writer.append_sample_values([r.values() for r in tick_rows(1.8, 2)])  # due: written
        assert not writer._held and writer.last_commit_t_s == 1.8
        writer.append_sample_values([r.values() for r in tick_rows(2.0, 2)])  # held: close
    assert _committed(log) == (
        [0.0] * 2 + [0.25] * 2 + [0.5] * 2 + [0.75] * 2 + [1.5] * 2 + [1.8] * 2 + [2.0] * 2
    )
    conn = sqlite3.connect(log)
    try:  # seq follows the order the rows came in: time, then chamber within a tick
        order = conn.execute("SELECT t_s, chamber FROM samples ORDER BY seq").fetchall()
    finally:
        conn.close()
    assert order == sorted(order)


def test_a_full_disk_at_the_commit_drops_every_held_row_and_says_how_many(
    tmp_path: Path,
) -> None:
    log = tmp_path / "run.sqlite"
    writer = RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0)
    try:
        writer.append_sample_values([r.values() for r in tick_rows(0.0)])  # committed
        big = [r.values() for k in range(400) for r in tick_rows(0.1 + 0.001 * k)]
        writer.append_sample_values(big)  # held: nothing written yet
        conn = writer._conn
        assert conn is not None
        pages = conn.execute("PRAGMA page_count").fetchone()[0]
        conn.execute(f"PRAGMA max_page_count = {pages}")  # a full disk
        with pytest.raises(RuntimeFailure) as caught:
            writer.append_sample_values([r.values() for r in tick_rows(1.0)])  # commit due
        assert f"{len(big) + 3} row(s) not yet committed were dropped" in str(caught.value)
        assert writer.pending_rows == 0 and not writer._held
        conn.execute("PRAGMA max_page_count = 1073741823")  # space is back: usable again
        writer.append_sample_values([r.values() for r in tick_rows(2.0)])
    finally:
        writer.close()
    assert _committed(log) == [0.0] * 3 + [2.0] * 3


def test_a_malformed_held_row_raises_at_its_commit_and_drops_the_uncommitted(
    tmp_path: Path,
) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0) as writer:
        writer.append_sample_values([r.values() for r in tick_rows(0.0)])
        bad = [r.values() for r in tick_rows(0.5)]
        bad[1] = (*bad[1][:3], None, *bad[1][4:])  # chamber (index 3): NOT NULL
        writer.append_sample_values(bad)  # held
        with pytest.raises(sqlite3.IntegrityError):
            writer.append_sample_values([r.values() for r in tick_rows(1.0)])
        assert writer.pending_rows == 0
        writer.append_sample_values([r.values() for r in tick_rows(2.0)])
    assert _committed(log) == [0.0] * 3 + [2.0] * 3
