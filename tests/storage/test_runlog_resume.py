"""Resuming an interrupted log appends after it without losing or duplicating anything."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from runlog_helpers import START_UTC_S, make_meta, tick_rows

from controller.storage import (
    EventKind,
    EventRecord,
    RunLogReader,
    RunLogWriter,
)


def _interrupted_log(log: Path, *, ticks: int = 8, closed_chamber: int | None = None) -> None:
    """A log whose writer stopped without marking the run finished (like a crash)."""
    with RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0) as writer:
        for k in range(ticks):
            phase = "baseline" if k < 5 else "heatwave"
            writer.append_samples(tick_rows(0.5 * k, phase=phase, closed_chamber=closed_chamber))


def test_resume_appends_without_duplicating_rows(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    _interrupted_log(log)
    gap_s = 600.0
    with RunLogWriter.resume(log) as writer:
        point = writer.resume_point
        assert point is not None
        assert writer.meta == make_meta(3)  # protocol and rig come back from the log
        # the new session's clock restarts at 0; UTC moved on by the gap
        writer.record_event(
            EventRecord(
                t_s=0.0,
                utc_s=point.last_utc_s + gap_s,
                kind=EventKind.GAP,
                elapsed_s=point.last_elapsed_s + gap_s,
                duration_s=gap_s,
            )
        )
        for k in range(4):
            writer.append_samples(tick_rows(0.5 * k, utc_offset_s=3.5 + gap_s, phase="heatwave"))
    with RunLogReader(log) as reader:
        frame = reader.samples(columns=["time", "chamber"])
        sessions = reader.sessions()
        events = reader.events()
        info = reader.info()
    assert len(frame) == 3 * 8 + 3 * 4
    assert not frame.duplicated(["time", "chamber"]).any()
    assert frame["time"].is_monotonic_increasing
    assert sessions["resumed"].tolist() == [False, True]
    assert sessions["first_sample_seq"].tolist() == [1, 25]
    assert info.sessions == 2 and not info.finished
    gap = events[events["kind"] == "gap"].iloc[0]
    assert gap["duration_s"] == gap_s
    assert gap["time"] == frame["time"].iloc[23] + pd.Timedelta(seconds=gap_s)


def test_resume_point_tells_where_the_run_stopped(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    _interrupted_log(log, closed_chamber=1)
    with RunLogWriter.resume(log) as writer:
        point = writer.resume_point
    assert point is not None
    assert point.session == 2
    assert point.last_seq == 24
    assert point.last_t_s == 3.5 and point.last_elapsed_s == 3.5
    assert point.last_utc_s == START_UTC_S + 3.5
    assert point.phases == {"A1": "heatwave", "A2": "heatwave", "A3": "heatwave"}
    assert point.closed == ("A2",)
    assert not point.held


@pytest.mark.parametrize(
    ("kinds", "held"),
    [
        ([EventKind.HOLD], True),
        ([EventKind.HOLD, EventKind.HOLD_END], False),
        ([EventKind.HOLD, EventKind.HOLD_END, EventKind.PHASE_CHANGE, EventKind.HOLD], True),
        ([EventKind.PHASE_CHANGE], False),
    ],
)
def test_a_run_interrupted_during_a_hold_resumes_held(
    tmp_path: Path, kinds: list[EventKind], held: bool
) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta()) as writer:
        for i, kind in enumerate(kinds):
            writer.record_event(EventRecord(t_s=float(i), utc_s=START_UTC_S + i, kind=kind))
    with RunLogWriter.resume(log) as writer:
        assert writer.resume_point is not None
        assert writer.resume_point.held is held


def test_rows_not_after_the_last_logged_sample_are_refused(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    _interrupted_log(log)
    with RunLogWriter.resume(log) as writer:
        with pytest.raises(ValueError, match="would log that time twice"):
            writer.append_samples(tick_rows(3.5))  # the last tick again
        writer.append_samples(tick_rows(4.0))
    with RunLogReader(log) as reader:
        assert reader.info().samples == 3 * 9


def test_resume_of_an_empty_interrupted_log(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    RunLogWriter(log, meta=make_meta()).close()
    with RunLogWriter.resume(log) as writer:
        point = writer.resume_point
        assert point is not None
        assert (point.last_seq, point.last_t_s, point.phases) == (0, None, {})
        writer.append_samples(tick_rows(0.0))
    with RunLogReader(log) as reader:
        assert reader.info().samples == 3
