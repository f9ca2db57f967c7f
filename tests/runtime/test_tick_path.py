"""The simulated tick's fast path keeps the loop's promises.

A tick with nothing else due at its instant runs without extra turns of the event loop, yet
an E-stop pressed or a fault injected at that very instant still reaches its reads; sample
rows go into the run log's open transaction without waking the logger task, records still
wake it and keep their order; setpoints shared between chambers keep every value exact;
the operator's status shows the latest tick's rows.
"""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from controller.clock import Clock, run_with_clock
from controller.rig import Fault, FaultKind
from controller.runtime import (
    ControlLoop,
    LogSink,
    RunSettings,
    RunSummary,
    SimulatedRun,
    _setpoints,
)
from controller.runtime._setpoints import SetpointTable
from controller.storage import (
    ChamberRecord,
    ClockKind,
    EventKind,
    EventRecord,
    IncubationState,
    RunLogReader,
    RunLogWriter,
    RunMeta,
    SampleRow,
)

from ._sim import Files, drive

PERIOD_S = 10.0


def prepare(
    files: Files, chambers: tuple[str, ...] = ("A1", "B"), hours: float = 0.5
) -> SimulatedRun:
    proto, rig, log = files(chambers, hours=hours)
    return SimulatedRun.prepare(proto, rig, log, settings=RunSettings(period_s=PERIOD_S))


def tick_values(t_s: float) -> list[tuple[Any, ...]]:
    """Invented rows of chambers X1..X3 at clock time ``t_s`` (s), as value tuples."""
    return [
        SampleRow(
            t_s=t_s,
            utc_s=1.78e9 + t_s,
            elapsed_s=t_s,
            chamber=f"X{i}",
            phase="hold",
            temperature_c=20.0 + i + 0.001 * t_s,
            temperature_setpoint_c=20.0,
            par=None,
            par_setpoint=None,
            flow_cm_s=4.0,
            flow_setpoint_cm_s=4.0,
            o2_umol_l=250.0 - i,
            o2_sat_pct=98.0,
            heater_pct=10.0 * i,
            chiller_pct=0.0,
            lamp_pct=0.0,
            pump_pct=50.0,
            incubation=IncubationState.OPEN,
        ).values()
        for i in (1, 2, 3)
    ]


def samples_and_alarms(run: SimulatedRun) -> tuple[pd.DataFrame, pd.DataFrame]:
    with RunLogReader(run.writer.path) as reader:
        return reader.samples(), reader.alarms()


@pytest.mark.parametrize("at_s", [300.0, 600.0, 610.0])
def test_an_e_stop_pressed_at_the_instant_of_a_tick_is_read_by_that_tick(
    files: Files, at_s: float
) -> None:
    run = prepare(files)
    drive(run, at=[(at_s, lambda r: r.io.press_e_stop("B"))])
    samples, alarms = samples_and_alarms(run)
    trips = alarms[(alarms.code == "e-stop") & (alarms.action == "raise")]
    assert list(trips.t_s) == [at_s]  # that very tick, not the next one
    row = samples[(samples.t_s == at_s) & (samples.chamber == "B")].iloc[0]
    assert row.alarm == "e-stop"


def test_a_device_silenced_at_the_instant_of_a_tick_is_missing_from_that_tick(
    files: Files,
) -> None:
    run = prepare(files)
    silence = Fault(kind=FaultKind.COMM_TIMEOUT, chamber="B", duration_s=25.0)
    drive(run, at=[(600.0, lambda r: r.rack.inject(silence))])
    samples, _ = samples_and_alarms(run)
    b = samples[samples.chamber == "B"].set_index("t_s")
    assert not np.isnan(b.temperature_c[590.0])
    assert np.isnan(b.temperature_c[600.0])  # the tick at the fault's instant waited for it
    assert not np.isnan(b.temperature_c[630.0])
    a1 = samples[samples.chamber == "A1"].set_index("t_s")
    assert not np.isnan(a1.temperature_c[600.0])


def test_a_quiet_tick_turns_the_event_loop_once(files: Files) -> None:
    run = prepare(files, hours=1.0)
    turns = [0]

    async def counted(loop: ControlLoop) -> RunSummary:
        selector = asyncio.get_running_loop()._selector  # type: ignore[attr-defined]
        select = selector.select

        def counting(timeout: float | None = None) -> Any:
            turns[0] += 1
            return select(timeout)

        selector.select = counting
        return await loop.run()

    summary = run.run(runner=counted)
    ticks = summary.ticks.ticks
    assert ticks == 360
    # one turn a tick: the jump to it, whose timers (the rack's grid callback, then the
    # control task's wake-up, which runs the tick at once) fire in that turn; the run log's
    # task wakes only to commit (every 600 s)
    assert turns[0] <= ticks + 2 * (ticks // 60) + 20


def test_the_decider_hears_of_every_write_that_failed_and_of_the_first_taken_again(
    files: Files,
) -> None:
    run = prepare(files)
    loop = run.loop()
    heard: list[tuple[float, str, bool]] = []
    note_write = loop.decider.note_write

    def noted(chamber: str, ok: bool) -> None:
        heard.append((run.clock.now_s(), chamber, ok))
        note_write(chamber, ok)

    loop.decider.note_write = noted  # type: ignore[method-assign]
    write_now = run.io.write_now

    def refusing(outputs: Any) -> Any:
        done = write_now(outputs)
        if run.clock.now_s() in (600.0, 610.0) and done is not None:
            return {**done, "B": False}  # B's module refuses two ticks' commands
        return done

    run.io.write_now = refusing  # type: ignore[method-assign]
    run.run(loop=loop)
    # the first tick tells it; ticks whose writes are all taken after an all-taken tick have
    # nothing new to tell; a refusal is told, and so is the first tick taken again
    assert {t for t, _, _ in heard} == {0.0, 600.0, 610.0, 620.0}
    assert [(c, ok) for t, c, ok in heard if t == 610.0] == [("A1", True), ("B", False)]
    assert [(c, ok) for t, c, ok in heard if t == 620.0] == [("A1", True), ("B", True)]
    assert loop.decider._chambers["B"].write_ok  # type: ignore[attr-defined]


def test_status_shows_the_latest_ticks_rows(files: Files) -> None:
    run = prepare(files)
    seen: dict[str, Any] = {}
    loop = run.loop()

    def look(_run: SimulatedRun) -> None:
        seen["status"] = loop.status()
        seen["rows"] = loop._latest

    async def act() -> None:
        await run.clock.sleep_until(605.0)
        look(run)

    async def main(_clock: Clock) -> RunSummary:
        async with asyncio.TaskGroup() as group:
            group.create_task(act())
            return await loop.run()

    run_with_clock(run.clock, main)
    run.writer.close()
    samples, _ = samples_and_alarms(run)
    rows = seen["rows"]
    assert set(rows) == {"A1", "B"}
    for chamber, row in rows.items():
        assert isinstance(row, SampleRow) and row.t_s == 600.0
        assert isinstance(row.incubation, IncubationState)
        logged = samples[(samples.t_s == 600.0) & (samples.chamber == chamber)].iloc[0]
        assert row.temperature_c == logged.temperature_c
        assert row.heater_pct == logged.heater_pct
        status = seen["status"]["chambers"][chamber]
        assert status["temperature_c"] == row.temperature_c
        assert status["incubation"] == row.incubation.value


def test_samples_go_into_the_open_transaction_and_records_wake_the_logger(
    tmp_path: Path,
) -> None:
    meta = RunMeta(
        run_id="saltmarrow-sink",
        protocol_text="",
        rig_text="",
        start_utc_s=1.78e9,
        clock_kind=ClockKind.VIRTUAL,
        chambers=tuple(
            ChamberRecord(chamber=f"X{i}", water_volume_l=8.0, sediment_area_m2=0.03)
            for i in (1, 2, 3)
        ),
    )
    writer = RunLogWriter(tmp_path / "run.sqlite", meta=meta, commit_interval_s=60.0)
    sink = LogSink(writer)
    try:
        sink.put_samples(tick_values(0.0))  # a session's first rows
        assert sink._wake.is_set() and sink.pending == 1  # commit due: the task writes them
        sink.drain()
        sink._wake.clear()
        assert (writer.pending_rows, writer.last_commit_t_s) == (0, 0.0)
        for t_s in (10.0, 20.0):
            sink.put_samples(tick_values(t_s))
        assert not sink._wake.is_set() and sink.pending == 0
        assert writer.pending_rows == 6 and sink.rows_written == 9  # in the transaction
        # a record queued first keeps its place: later samples queue behind it
        sink.put(EventRecord(t_s=25.0, utc_s=1.78e9, kind=EventKind.HOLD))
        sink.put_samples(tick_values(30.0))
        assert sink._wake.is_set() and sink.pending == 2
        sink.drain()
        assert writer.pending_rows == 3  # the hold committed the rows before it
        assert writer.last_commit_t_s == 25.0
        sink.put_samples(tick_values(90.0))  # 60 s past: commit due
        assert sink.pending == 1
        sink.drain()
        assert writer.pending_rows == 0 and sink.rows_written == 15
    finally:
        writer.close()
    with RunLogReader(tmp_path / "run.sqlite") as reader:
        assert list(reader.samples().t_s.unique()) == [0.0, 10.0, 20.0, 30.0, 90.0]


def test_targets_shared_between_chambers_keep_every_value_and_the_sign_of_zero(
    files: Files, monkeypatch: pytest.MonkeyPatch
) -> None:
    run = prepare(files, ("A1", "A2", "B"))
    compiled = run.inputs.compiled
    run.writer.close()
    table = SetpointTable(compiled, ("A1", "A2", "B"), PERIOD_S, chunk_ticks=4)
    _, first = table.at(0)
    assert first["A1"] is first["A2"] is first["B"]  # one program: one shared target

    def fake(_compiled: object, times: np.ndarray) -> dict[str, dict[str, np.ndarray]]:
        n = len(times)
        zero, minus = np.zeros(n), np.full(n, -0.0)
        return {
            "A1": {"temperature_c": times, "par": zero, "flow_cm_s": np.full(n, np.nan)},
            "A2": {"temperature_c": times, "par": minus, "flow_cm_s": np.full(n, np.nan)},
            "B": {"temperature_c": times + 1.0, "par": zero, "flow_cm_s": zero},
        }

    monkeypatch.setattr(_setpoints, "sample", fake)
    table = SetpointTable(compiled, ("A1", "A2", "B"), PERIOD_S, chunk_ticks=4)
    for k in range(6):  # across a chunk's end: the next chunk's values are seen
        _, targets = table.at(k)
        a1, a2, b = targets["A1"], targets["A2"], targets["B"]
        assert (a1.temperature_c, a1.par, a1.flow_cm_s) == (k * PERIOD_S, 0.0, None)
        assert np.copysign(1.0, a1.par) == 1.0 and np.copysign(1.0, a2.par) == -1.0
        assert (b.temperature_c, b.flow_cm_s) == (k * PERIOD_S + 1.0, 0.0)
        assert a1 is not a2
    _, held = table.at_elapsed(12.5)  # off the grid (a hold, a skip): a new chunk from there
    assert held["B"].temperature_c == 13.5
