"""Data sources: what the views are given from a real simulated log and from invented live
logs; bounded polls, hold and silence, replay play/pause/seek/speed, folding alarms."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from controller.errors import SquallError
from controller.storage import (
    AlarmAction,
    AlarmLevel,
    EventKind,
    EventRecord,
    IncubationState,
    RunLogReader,
)
from controller.tui import LogSource, ReplaySource, RunMode, RunStatus
from controller.tui._fold import AlarmRow, apply_alarms, fold_alarms
from controller.tui._snapshot import ChamberState

from .conftest import SIM_CHAMBERS, MakeSynthetic, with_trip


class Clock:
    """A hand-moved clock (s) for sources: tests step it instead of sleeping."""

    def __init__(self, t: float = 1000.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def test_a_finished_simulated_run_shows_every_chamber_its_trip_and_its_end(sim_log: Path) -> None:
    source = LogSource(sim_log, real_clock=Clock())
    snap = source.open()
    source.close()
    assert [c.chamber for c in snap.chambers] == list(SIM_CHAMBERS)
    assert snap.run.status is RunStatus.FINISHED and snap.run.end_reason == "completed"
    assert snap.run.mode is RunMode.LIVE
    assert snap.run.elapsed_s == pytest.approx(2 * 3600 - 20)  # the last 20 s tick
    tripped = snap.chamber("P2")
    assert tripped is not None and tripped.alarm_level is AlarmLevel.TRIP
    assert tripped.alarm_code == "over-temperature" and not tripped.alarm_acked
    quiet = snap.chamber("P1")
    assert quiet is not None and quiet.alarm_level is None
    assert quiet.temperature_setpoint_c == 20.0
    assert quiet.deviation_c is not None and abs(quiet.deviation_c) < 0.5
    codes = {(a.code, a.chamber) for a in snap.alarms}
    assert ("over-temperature", "P2") in codes


def test_open_reads_only_the_last_ticks_and_polls_are_bounded(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=4, period_s=60.0)
    run.run_ticks(500)
    source = LogSource(run.writer.path, max_rows_per_poll=8, real_clock=Clock())
    snap = source.open()
    assert snap.run.elapsed_s == 499 * 60.0  # newest tick at once, not the whole history
    assert source.poll() is None  # nothing new
    run.run_ticks(1)
    nxt = source.poll()
    assert nxt is not None and nxt.run.elapsed_s == 500 * 60.0
    assert nxt.version == snap.version + 1
    run.run_ticks(50)  # 200 rows behind, polls read at most 8: it skips to the newest
    caught = source.poll()
    assert caught is not None and caught.run.elapsed_s == 550 * 60.0
    source.close()


def test_a_hold_event_shows_as_held_and_silence_as_silent(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=2)
    run.run_ticks(10)
    clock = Clock()
    source = LogSource(run.writer.path, real_clock=clock, silent_after_s=60.0)
    assert source.open().run.status is RunStatus.RUNNING
    t, utc = run.times
    run.writer.record_event(EventRecord(t_s=t, utc_s=utc, kind=EventKind.HOLD))
    held = source.poll()
    assert held is not None and held.run.status is RunStatus.HELD
    run.writer.record_event(EventRecord(t_s=t, utc_s=utc, kind=EventKind.HOLD_END))
    resumed = source.poll()
    assert resumed is not None and resumed.run.status is RunStatus.RUNNING
    clock.t += 61.0  # a minute without a new sample
    silent = source.poll()
    assert silent is not None and silent.run.status is RunStatus.SILENT
    assert silent.run.age_s == pytest.approx(61.0)
    run.run_ticks(1)
    back = source.poll()
    assert back is not None and back.run.status is RunStatus.RUNNING
    source.close()


def test_history_is_the_span_before_the_newest_sample_with_closed_windows(
    synthetic: MakeSynthetic,
) -> None:
    run = synthetic(chambers=2, period_s=60.0)
    run.run_ticks(600)  # 10 h
    source = LogSource(run.writer.path)
    trace = source.history("C01", 6 * 3600.0)
    source.close()
    assert len(trace) == 360  # 6 h of minute ticks
    assert trace.utc_s[-1] - trace.utc_s[0] == pytest.approx(359 * 60.0)
    with RunLogReader(run.writer.path) as reader:
        frame = reader.samples("C01", columns=["incubation"])
    closed_in_log = (frame["incubation"].astype(object) == "closed").to_numpy()[-360:]
    assert np.array_equal(trace.closed, closed_in_log)
    spans = trace.closed_spans()
    assert spans and all(b >= a for a, b in spans)


def test_a_file_that_is_not_a_run_log_is_one_user_error(tmp_path: Path) -> None:
    bad = tmp_path / "notes.sqlite"
    bad.write_text("not a database")
    with pytest.raises(SquallError, match="not a squall run log"):
        LogSource(bad)
    with pytest.raises(SquallError, match="no such run log"):
        ReplaySource(tmp_path / "missing.sqlite")


def test_replay_advances_by_speed_times_real_time_and_pauses(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=3, period_s=60.0)
    run.run_ticks(1440)
    run.finish()
    clock = Clock()
    replay = ReplaySource(run.writer.path, speed=600.0, real_clock=clock)
    first = replay.open()
    assert first.run.mode is RunMode.REPLAY and first.run.elapsed_s == 0.0
    clock.t += 2.0
    snap = replay.poll()
    assert snap is not None and snap.run.elapsed_s == pytest.approx(1200.0)
    replay.pause()
    clock.t += 5.0
    assert replay.poll() is not None  # the pause itself is news
    assert replay.poll() is None  # paused: nothing moves
    replay.seek_by(3600.0)
    sought = replay.poll()
    assert sought is not None and sought.run.elapsed_s == pytest.approx(4800.0)
    assert not sought.run.playing
    replay.faster()
    assert replay.speed == 1200.0
    replay.play()
    clock.t += 1.0
    moved = replay.poll()
    assert moved is not None and moved.run.elapsed_s == pytest.approx(6000.0)
    replay.seek_fraction(1.0)
    clock.t += 1.0
    end = replay.poll()
    assert end is not None and end.run.status is RunStatus.FINISHED
    assert not end.run.playing  # a finished log stops at its end
    replay.close()


def test_replay_loads_in_bounded_chunks_and_folds_alarms_up_to_its_position(
    synthetic: MakeSynthetic,
) -> None:
    run = with_trip(synthetic(chambers=4, period_s=60.0), ticks=200)
    run.run_ticks(100)
    clock = Clock()
    replay = ReplaySource(run.writer.path, speed=60.0, max_rows_per_poll=100, real_clock=clock)
    first = replay.open()
    assert replay.loaded_rows == 100  # the first chunk only
    assert first.alarms == ()  # the trip lies ahead of the position
    while replay.poll() is not None and replay.loaded_rows < 4 * 303:
        pass
    assert replay.loaded_rows == 4 * 303
    replay.seek_fraction(1.0)
    snap = replay.poll()
    assert snap is not None
    c03 = snap.chamber("C03")
    assert c03 is not None and c03.alarm_level is AlarmLevel.TRIP
    assert snap.run.status is RunStatus.RUNNING  # not finished: the log is still live
    replay.close()


def _row(t: float, action: AlarmAction, code: str = "low-flow", chamber: str = "C1") -> AlarmRow:
    return AlarmRow(
        utc_s=t,
        action=action,
        level=AlarmLevel.WARNING,
        code=code,
        reason="flow 1.2 cm/s below 2.0",
        chamber=chamber,
        user="ana" if action is AlarmAction.ACK else None,
    )


def test_alarm_folding_keeps_the_latest_raise_its_ack_and_its_clear() -> None:
    rows = [
        _row(5.0, AlarmAction.ACK),  # before any raise: ignored
        _row(10.0, AlarmAction.RAISE),
        _row(20.0, AlarmAction.ACK),
        _row(30.0, AlarmAction.CLEAR),
        _row(40.0, AlarmAction.RAISE),  # raised again: a new, unacknowledged alarm
        _row(50.0, AlarmAction.RAISE, code="over-temperature", chamber="C2"),
        _row(60.0, AlarmAction.ACK, code="over-temperature", chamber="C2"),
    ]
    alarms = fold_alarms(rows)
    assert [(a.code, a.chamber) for a in alarms] == [
        ("low-flow", "C1"),  # needs attention first
        ("over-temperature", "C2"),  # active, acknowledged
    ]
    flow, temp = alarms
    assert flow.needs_attention and flow.times_raised == 2 and flow.raised_utc_s == 40.0
    assert temp.acked and temp.acked_by == "ana" and temp.active
    state = apply_alarms(ChamberState(chamber="C2", incubation=IncubationState.OPEN), alarms)
    assert state.alarm_level is AlarmLevel.WARNING and state.alarm_acked
    assert state.alarm_code == "over-temperature"
    cleared = fold_alarms([*rows, _row(70.0, AlarmAction.CLEAR)])
    assert not cleared[-1].active and cleared[-1].code == "low-flow"


def test_an_alarm_code_in_the_samples_without_a_record_still_needs_attention() -> None:
    state = apply_alarms(ChamberState(chamber="C9", alarm_code="sensor-stale"), ())
    assert state.alarm_level is AlarmLevel.ALARM and not state.alarm_acked
