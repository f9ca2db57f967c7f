"""Sample rows as plain value tuples (the control loop's fast path into the run log): the
same rows, the same commits and the same refusals as :meth:`RunLogWriter.append_samples`."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pandas as pd
import pytest
from runlog_helpers import START_UTC_S, make_meta, tick_rows

from controller.storage import IncubationState, RunLogReader, RunLogWriter, SampleRow
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
