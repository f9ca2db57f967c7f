"""Resuming an interrupted run (in-process simulated rig), and the locks that keep one
controller per log and per rig."""

from __future__ import annotations

import os
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from controller.cli import main
from controller.errors import SquallError
from controller.runtime import RigLock, RunSettings, SimulatedRun
from controller.storage import RunEndReason, RunLogReader, RunLogWriter

from ._rigs import TruthSpy, crash, drive, protocol_text, rig_text, write_files

pytestmark = pytest.mark.timeout(120)

PERIOD_S = 10.0
DOWN_S = 1800.0
"""How long the controller is taken to have been down, s."""


def files(tmp_path: Path, **protocol: object) -> tuple[Path, Path, Path]:
    return write_files(
        tmp_path,
        rig=rig_text(),
        protocol=protocol_text(phases=(("day", "6h"),), **protocol),  # type: ignore[arg-type]
    )


def set_down_time(log: Path, seconds: float) -> None:
    """Date the log's files back, as if it had last been written ``seconds`` ago."""
    for name in (str(log), f"{log}-wal"):
        if os.path.exists(name):
            stamp = os.stat(name).st_mtime - seconds
            os.utime(name, (stamp, stamp))


def test_a_crashed_simulated_run_resumes_at_the_wall_clock_s_position(tmp_path: Path) -> None:
    protocol, rig, log = files(tmp_path, begins="2027-07-01T06:00:00+00:00")
    first = SimulatedRun.prepare(protocol, rig, log, settings=RunSettings(period_s=PERIOD_S))
    crash(first, 5400.0)
    with RunLogReader(log) as reader:
        before = reader.samples()
        assert reader.info().end is None
        closed_at_crash = before.incubation.iloc[-1] == "closed"
    assert closed_at_crash  # the crash cuts a window short (checked below)
    set_down_time(log, DOWN_S)
    run = SimulatedRun.resume(log, settings_for=lambda p: RunSettings(period_s=p))
    assert run.plan.settings.period_s == PERIOD_S  # the launch record's period
    spy = TruthSpy(run)
    summary, _ = drive(run, io=spy)
    assert summary.end_reason is RunEndReason.COMPLETED, summary.detail
    with sqlite3.connect(log) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone() == ("ok",)
    with RunLogReader(log) as reader:
        info = reader.info()
        rows = reader.samples()
        events = reader.events()
        windows = reader.windows()
        sessions = reader.sessions()
    assert info.end is not None and info.end.end_reason is RunEndReason.COMPLETED
    assert len(sessions) == 2 and bool(sessions.resumed.iloc[1])
    # nothing lost, nothing twice: the first session's rows are all still there, in order
    assert list(rows.index[: len(before)]) == list(before.index)
    assert list(rows.time.iloc[: len(before)]) == list(before.time)
    assert rows.time.is_monotonic_increasing and not rows.time.duplicated().any()
    # protocol position after the resume follows the wall clock across the gap
    last, resumed = before.iloc[-1], rows.iloc[len(before)]
    wall_s = (resumed.time - last.time).total_seconds()
    assert wall_s == pytest.approx(DOWN_S, abs=5.0)
    assert resumed.elapsed_s - last.elapsed_s == pytest.approx(wall_s, abs=1e-6)
    assert 6 * 3600.0 - PERIOD_S <= rows.elapsed_s.iloc[-1] < 6 * 3600.0
    gap = events[events.kind.astype(str) == "gap"]
    assert len(gap) == 1
    assert gap.duration_s.iloc[0] == pytest.approx(wall_s, abs=PERIOD_S)
    assert "protocol time moved on with the wall clock" in gap.detail.iloc[0]
    # the window the crash cut short is recorded as interrupted, ending at the last sample
    cut = windows[windows.end_reason.astype(str) == "interrupted"]
    assert len(cut) == 1 and cut.end_time.iloc[0] == last.time
    # outputs safe until the first healthy tick: the resumed run's first write is safe
    safe = run.plan.chambers["L1"].interlocks.safe_outputs()
    assert spy.writes[0] == (0.0, "L1", safe)


def test_a_run_interrupted_while_held_resumes_held(tmp_path: Path) -> None:
    protocol, rig, log = files(tmp_path)
    first = SimulatedRun.prepare(protocol, rig, log, settings=RunSettings(period_s=PERIOD_S))
    crash(first, 1505.0, before=[(905.0, lambda loop: loop.hold("hal"))])
    set_down_time(log, DOWN_S)
    run = SimulatedRun.resume(log)
    states: list[dict[str, object]] = []
    summary, _ = drive(
        run,
        at=[
            (600.0, lambda loop: states.append(loop.status())),
            (605.0, lambda loop: loop.resume("hal")),
        ],
    )
    assert summary.end_reason is RunEndReason.COMPLETED
    assert states[0]["state"] == "held" and states[0]["elapsed_s"] == pytest.approx(905.0)
    with RunLogReader(log) as reader:
        rows = reader.samples()
        events = reader.events()
    second = rows[rows.time > pd.Timestamp("2027-07-01T00:25:05Z") + pd.Timedelta(DOWN_S, "s")]
    held = second[second.t_s <= 605.0]
    assert len(held) > 0 and np.allclose(held.elapsed_s, 905.0)
    kinds = events.kind.astype(str).tolist()
    assert kinds.count("hold") == 1 and kinds.count("hold_end") == 1
    gap = events[events.kind.astype(str) == "gap"].iloc[0]
    assert "the run was held: protocol time kept" in gap.detail
    # the whole protocol ran: protocol time reached its end after the hold
    assert 6 * 3600.0 - PERIOD_S <= rows.elapsed_s.iloc[-1] < 6 * 3600.0


def test_resume_refusals_are_one_line_and_write_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    protocol, rig, log = files(tmp_path)
    first = SimulatedRun.prepare(protocol, rig, log, settings=RunSettings(period_s=PERIOD_S))
    crash(first, 600.0)

    def refused(args: list[str]) -> str:
        assert main(args) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1, err
        return err

    assert "drop PROTOCOL, --rig" in refused(
        ["run", str(protocol), "--rig", str(rig), "--resume", str(log), "--sim"]
    )
    assert "resume it with --sim" in refused(["run", "--resume", str(log)])
    assert "--speed applies to simulated runs only" in refused(
        ["run", "--resume", str(log), "--speed", "10"]
    )
    holder = RunLogWriter.resume(log)  # another controller has the log
    try:
        assert "being written by another writer" in refused(["run", "--resume", str(log), "--sim"])
    finally:
        holder.close()
    with RunLogReader(log) as reader:
        sessions = len(reader.sessions())
    assert main(["run", "--resume", str(log), "--sim"]) == 0  # now it resumes, to the end
    capsys.readouterr()
    assert "run already finished (completed)" in refused(["run", "--resume", str(log), "--sim"])
    with RunLogReader(log) as reader:
        assert len(reader.sessions()) == sessions + 1  # refusals added no session


IO_TABLE = '\n[io]\n[[io.modbus]]\nname = "rack"\ntcp = { host = "127.0.0.1", port = 1 }\n'


def test_a_second_controller_on_the_same_rig_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    protocol, rig, log = write_files(
        tmp_path,
        rig=rig_text(extra=IO_TABLE),
        protocol=protocol_text(begins="on-launch", incubation=""),
    )
    holder = RigLock(rig)
    try:
        assert main(["run", str(protocol), "--rig", str(rig), "--log", str(log)]) == 2
    finally:
        holder.release()
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert f"{rig}: another controller (process {os.getpid()}) is running this rig" in err
    assert not log.exists()
    with pytest.raises(SquallError, match="another controller"):
        first = RigLock(rig)
        try:
            RigLock(rig)
        finally:
            first.release()


def test_a_hardware_run_refuses_a_protocol_that_begins_at_another_time(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    protocol, rig, log = write_files(tmp_path, rig=rig_text(extra=IO_TABLE))
    assert main(["run", str(protocol), "--rig", str(rig), "--log", str(log)]) == 2
    err = capsys.readouterr().err.strip()
    assert "starts when launched" in err and 'begins = "on-launch"' in err
    assert not log.exists() and not Path(f"{rig}.lock").exists()
