"""Must-show: a simulated week on rack 8 run end to end by ``serve`` on one virtual clock — two
queued experiments on the same chambers, the second starting when the first releases them."""

from __future__ import annotations

import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path

from controller.runtime import RunSettings
from controller.schedule import ExperimentState, ScheduleStore
from controller.schedule._serve import ServeConfig, serve
from controller.storage import RunEndReason, RunLogReader

REPO = Path(__file__).resolve().parents[2]
WEEK_START = datetime(2026, 12, 1, 0, 0, tzinfo=UTC)  # rack 8's calibrations are fresh then
TICK_S = 300.0

PROTOCOL = """
format = "squall-protocol/1"
title = "{title}"

[groups.ambient]
role = "control"
chambers = ["C1", "C2", "C3", "C4"]

[groups.warm]
role = "treatment"
chambers = ["C5", "C6", "C7", "C8"]

[[phases]]
name = "settle"
duration = "1d"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = 18.0 }} ]
  light = [ {{ kind = "daylight", sunrise = "06:00", sunset = "20:00", peak = 300.0 }} ]
  flow = [ {{ kind = "hold", value = 4.0 }} ]

[[phases]]
name = "warm"
duration = "1d"
  [phases.groups.warm]
  temperature = [
    {{ kind = "ramp", to = 20.0, rate_per_h = 0.5 }},
    {{ kind = "hold", value = 20.0 }},
  ]
"""


def test_a_simulated_week_serves_two_queued_experiments_back_to_back(tmp_path: Path) -> None:
    rig = tmp_path / "rack8.toml"
    shutil.copy(REPO / "rigs" / "saltmarrow-rack8.toml", rig)
    first_file = tmp_path / "warm-step.toml"
    first_file.write_text(PROTOCOL.format(title="Warm step, first batch"), encoding="utf-8")
    second_file = tmp_path / "warm-again.toml"
    second_file.write_text(PROTOCOL.format(title="Warm step, second batch"), encoding="utf-8")
    schedule = tmp_path / "runs" / "schedule.sqlite"
    with ScheduleStore(schedule) as store:
        first = store.add(
            rig_path=rig,
            protocol_path=first_file,
            start_utc=WEEK_START + timedelta(hours=6),
            owner="ana",
        )
        # queued right after the first, on the same chambers: it may start only when the
        # first releases them
        second = store.add(
            rig_path=rig, protocol_path=second_file, start_utc=first.end_utc, owner="ben"
        )
    assert second.chambers == first.chambers == tuple(f"C{i}" for i in range(1, 9))

    lines: list[str] = []
    result = serve(
        ServeConfig(
            rig_path=rig,
            schedule_path=schedule,
            sim=True,
            start_utc=WEEK_START,
            for_s=7 * 86400.0,
            settings=RunSettings(period_s=TICK_S),
        ),
        notify=lines.append,
    )

    # the whole week passed on the virtual clock, and both experiments ran to the end
    assert result.started_utc == WEEK_START
    assert result.stopped_utc == WEEK_START + timedelta(days=7)
    assert result.outcomes == (
        (first.id, ExperimentState.DONE),
        (second.id, ExperimentState.DONE),
    )
    with ScheduleStore(schedule) as store:
        done = {e.id: e for e in store.experiments(rig_path=rig)}
        histories = {e: store.history(e) for e in done}
    for exp_id in (first.id, second.id):
        steps = [(h.from_state, h.to_state) for h in histories[exp_id]]
        assert steps == [
            (None, ExperimentState.PLANNED),
            (ExperimentState.PLANNED, ExperimentState.PREFLIGHT),
            (ExperimentState.PREFLIGHT, ExperimentState.RUNNING),
            (ExperimentState.RUNNING, ExperimentState.DONE),
        ]
        assert histories[exp_id][1].by == "serve"
        assert histories[exp_id][2].reason.startswith("preflight passed: 8 chambers")
    # history stamps are on the simulated clock: each started at its planned time, and the
    # second's preflight came the moment the first was done
    assert histories[first.id][1].time_utc == first.start_utc
    released = histories[first.id][3].time_utc
    assert released == first.end_utc == second.start_utc
    assert histories[second.id][1].time_utc == released
    assert histories[second.id][2].time_utc == released
    assert histories[second.id][3].time_utc == second.end_utc

    # both logs complete, named after the experiment, beside the schedule file
    ticks = round(2 * 86400 / TICK_S)
    spans = {}
    for exp_id, stem in ((first.id, "warm-step"), (second.id, "warm-again")):
        log = done[exp_id].log_path
        assert log == schedule.parent / f"{exp_id}-{stem}.sqlite"
        with RunLogReader(log) as reader:
            info = reader.info()
            assert info.end is not None and info.end.end_reason is RunEndReason.COMPLETED
            assert info.samples == ticks * 8
            times = reader.samples(columns=["time"])["time"]
            spans[exp_id] = (times.min().to_pydatetime(), times.max().to_pydatetime())
            assert info.meta.start_time == done[exp_id].start_utc
            assert 'title = "Warm step' in info.meta.protocol_text
    # the first held its chambers up to its end; the second began there, not before
    assert spans[first.id][0] == first.start_utc
    assert spans[first.id][1] == first.end_utc - timedelta(seconds=TICK_S)
    assert spans[second.id][0] == second.start_utc
    assert any(f"{second.id} running 'Warm step, second batch'" in line for line in lines)
    assert not any("ALARM" in line for line in lines)
