"""Commit timing, reading while the run writes, and surviving SIGKILL."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from runlog_helpers import START_UTC_S, make_meta, tick_rows

from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    RunLogReader,
    RunLogWriter,
)

HERE = Path(__file__).resolve().parent


def _count(reader: RunLogReader) -> int:
    return len(reader.samples(columns=["t_s"]))


def test_rows_become_visible_only_when_the_commit_interval_has_passed(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0) as writer:
        reader = RunLogReader(log)
        seen = []
        for k in range(8):  # ticks every 0.25 s of clock time, up to 1.75 s
            writer.append_samples(tick_rows(0.25 * k))
            seen.append(_count(reader))
        assert writer.pending_rows == 3 * 3  # ticks 1.25, 1.5, 1.75 s wait for the next commit
        assert writer.last_commit_t_s == 1.0
        writer.append_samples(tick_rows(2.0))
        seen.append(_count(reader))
        assert (writer.pending_rows, writer.last_commit_t_s) == (0, 2.0)
        reader.close()
    # a session's first rows are committed at once (t = 0); then when t reaches 1.0 s and 2.0 s
    assert seen == [3, 3, 3, 3, 15, 15, 15, 15, 27]


def test_zero_interval_commits_every_call(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta(2), commit_interval_s=0.0) as writer:
        with RunLogReader(log) as reader:
            counts = []
            for k in range(3):
                writer.append_samples(tick_rows(0.1 * k, 2))
                counts.append(_count(reader))
    assert counts == [2, 4, 6]


def test_alarm_commits_pending_samples_at_once(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0) as writer:
        writer.append_samples(tick_rows(0.0))
        writer.append_samples(tick_rows(0.25))
        with RunLogReader(log) as reader:
            before = _count(reader)
            writer.record_alarm(
                AlarmRecord(
                    t_s=0.3,
                    utc_s=START_UTC_S + 0.3,
                    action=AlarmAction.RAISE,
                    level=AlarmLevel.ALARM,
                    code="sensor_stale",
                    reason="A1 temperature unchanged for 60 s",
                    chamber="A1",
                )
            )
            after = _count(reader)
            alarms = len(reader.alarms())
    # the first tick was committed at once; the second waited for the alarm
    assert (before, after, alarms) == (3, 6, 1)


def test_reader_and_writer_work_side_by_side(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    writer = RunLogWriter(log, meta=make_meta(3), commit_interval_s=0.0)
    reader = RunLogReader(log)  # a second connection, opened while the writer is active
    try:
        writer.append_samples(tick_rows(0.0))
        first = reader.tail(0)
        # the reader holds an open read snapshot while the writer keeps committing
        assert reader._conn is not None
        reader._conn.execute("BEGIN")
        snapshot_count = reader._conn.execute("SELECT count(*) FROM samples").fetchone()[0]
        writer.append_samples(tick_rows(1.0))
        writer.append_samples(tick_rows(2.0))
        still = reader._conn.execute("SELECT count(*) FROM samples").fetchone()[0]
        reader._conn.execute("COMMIT")
        later = reader.tail(int(first.index[-1]))
        assert (len(first), snapshot_count, still) == (3, 3, 3)
        assert later["t_s"].tolist() == [1.0] * 3 + [2.0] * 3
        assert later.index.tolist() == [4, 5, 6, 7, 8, 9]
        assert reader.tail(9).empty
        assert reader.last_rowid() == 9
        assert len(reader.tail(0, limit=4)) == 4
    finally:
        reader.close()
        writer.close()


def _integrity(log: Path) -> str:
    conn = sqlite3.connect(log)
    try:
        return str(conn.execute("PRAGMA integrity_check").fetchone()[0])
    finally:
        conn.close()


def _spawn(mode: str, log: Path) -> subprocess.Popen[str]:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(HERE), *sys.path])}
    return subprocess.Popen(
        [sys.executable, str(HERE / "runlog_child.py"), mode, str(log)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )


def test_sigkill_loses_at_most_the_commit_interval(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    tick_s, interval_s, n_chambers = 0.1, 1.0, 8
    child = _spawn("ticks", log)
    assert child.stdout is not None
    reported: list[float] = []
    try:
        for line in child.stdout:
            reported.append(float(line))
            if reported[-1] >= 4.25:
                break
        os.kill(child.pid, signal.SIGKILL)
        rest = child.stdout.read()
    finally:
        child.kill()
        child.wait(timeout=30)
    assert child.returncode == -signal.SIGKILL, child.stderr.read() if child.stderr else ""
    # lines the child finished writing before it died; a torn last line is dropped
    reported += [float(x) for x in rest.split("\n")[:-1] if x]
    last_appended = max(reported)

    assert _integrity(log) == "ok"
    with RunLogReader(log) as reader:
        frame = reader.samples(columns=["t_s", "chamber"])
        assert not reader.info().finished  # interrupted, hence resumable
    last_committed = float(frame["t_s"].max())
    assert last_appended - (interval_s + tick_s) <= last_committed <= last_appended + tick_s
    # whole ticks only: no half-written batch became visible
    assert (frame.groupby("t_s").size() == n_chambers).all()
    # the kernel released the dead writer's lock: the run can be resumed
    with RunLogWriter.resume(log) as writer:
        assert writer.resume_point is not None
        assert writer.resume_point.last_t_s == pytest.approx(last_committed)
        assert writer.resume_point.last_seq == len(frame)
