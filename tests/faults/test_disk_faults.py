"""The run log's disk fills up, during a run and until its end.

How the disk is filled: the file is forbidden to grow past its present size with SQLite's
``PRAGMA max_page_count`` on the writer's own connection (a per-connection limit, so the
test reaches into the writer for it, as the storage tests do). SQLite then fails the write
with ``SQLITE_FULL``, "database or disk is full", the very error a full file system gives
it; no small file system can be mounted here, and filling the real disk would hurt
everyone else on the machine. The kernel's own refusal (``RLIMIT_FSIZE``) is exercised by
``tests/storage``. Space comes back by lifting the limit.

The controller must keep controlling the chambers (no traceback, no missed tick), count the
rows it could not log, keep everything committed before the disk filled, and log again once
there is room. A full disk is nothing to make safe: the outputs are never touched.
"""

from __future__ import annotations

import logging
import sqlite3
from dataclasses import fields, replace
from pathlib import Path

import pytest

from controller.runtime import RunSettings, SimulatedRun
from controller.storage import IncubationState, RunLogWriter, RunMeta, SampleRow
from controller.storage._records import ClockKind

from ._harness import PERIOD_S, RecordBook, check_log, run_virtual

pytestmark = pytest.mark.timeout(120)

ONSET_S = 600.0
"""When the disk fills, s of run time."""
FULL_S = 600.0
"""How long it stays full in the first scenario, s."""
COMMIT_S = 1.0
"""Commit interval of these runs, s of run time (the real-time bound, not the 600 s a
simulation at full speed uses)."""

_UNLIMITED_PAGES = 1073741823
"""SQLite's largest max_page_count."""


def fill(run: SimulatedRun) -> None:
    """Let the log's file grow no further."""
    conn = run.writer._conn
    assert conn is not None
    pages = conn.execute("PRAGMA page_count").fetchone()[0]
    conn.execute(f"PRAGMA max_page_count = {pages}")


def make_room(run: SimulatedRun) -> None:
    """Space is back."""
    conn = run.writer._conn
    assert conn is not None
    conn.execute(f"PRAGMA max_page_count = {_UNLIMITED_PAGES}")


def test_a_full_disk_costs_log_rows_but_no_tick_and_logging_resumes_with_room(
    tmp_path: Path, records: RecordBook, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.ERROR, logger="controller.runtime")
    during: list[float] = []
    out = run_virtual(
        tmp_path,
        onset_s=ONSET_S,
        hours=0.5,
        settings=RunSettings(period_s=PERIOD_S, commit_interval_s=COMMIT_S),
        actions=[
            (ONSET_S - 1.0, fill),
            (ONSET_S + FULL_S / 2, lambda run: during.append(run.io.last_written["B"].lamp_pct)),
            (ONSET_S + FULL_S - 1.0, make_room),
        ],
    )
    s, summary = out.samples, out.summary
    ticks = summary.ticks
    hole = sorted(set(range(ticks.ticks)) - {round(t / PERIOD_S) for t in s.t_s})
    lost_s = len(hole) * PERIOD_S
    before, after = s[s.t_s < ONSET_S], s[s.t_s >= ONSET_S + FULL_S]
    # the missing ticks are one block: from the disk filling until there was room again
    one_hole = bool(hole) and hole == list(range(hole[0], hole[-1] + 1))
    in_place = bool(hole) and ONSET_S - COMMIT_S - PERIOD_S <= hole[0] * PERIOD_S
    in_place &= bool(hole) and hole[-1] * PERIOD_S < ONSET_S + FULL_S
    measured = out.record(
        fault="disk-full",
        injected=f"the log's file may not grow (SQLITE_FULL) from 600 s for {FULL_S:g} s, "
        "commit interval 1 s",
        expected="control goes on: no missed tick, outputs untouched; the rows that "
        "could not be written are counted and reported, everything committed before "
        "is kept, logging resumes when there is room",
        onset_s=ONSET_S,
        safe_bound_s=None,
    )
    record = records.add(
        replace(
            measured,
            contiguous=one_hole and in_place and len(after) > 0,
            lost_s=lost_s,
            # the outage, plus what was not yet committed when it began
            lost_bound_s=FULL_S + COMMIT_S + PERIOD_S,
            note=f"{summary.rows_lost} rows dropped, all counted; {ticks.missed} ticks missed",
        )
    )
    record.check(alarm=None)
    assert ticks.missed == 0 and summary.end_reason.value == "completed"
    assert summary.rows_lost == len(hole)  # every dropped row counted
    assert out.log.finished and out.log.integrity == "ok"
    assert (before.t_s.diff().dropna() == PERIOD_S).all()
    assert (after.t_s.diff().dropna() == PERIOD_S).all()
    # control went on while nothing could be logged: the lamp was still being driven
    assert during and during[0] > 0.0
    assert any("database or disk is full" in r.getMessage() for r in caplog.records)


def test_a_disk_full_until_the_end_leaves_a_whole_log_not_a_traceback(tmp_path: Path) -> None:
    out = run_virtual(
        tmp_path,
        onset_s=ONSET_S,
        hours=0.25,
        settings=RunSettings(period_s=PERIOD_S, commit_interval_s=COMMIT_S),
        actions=[(ONSET_S - 1.0, fill)],
    )
    summary = out.summary
    assert summary.ticks.missed == 0 and summary.end_reason.value == "completed"
    assert out.log.integrity == "ok" and out.log.contiguous  # rows up to the first failure
    assert out.log.ticks < summary.ticks.ticks  # some ticks were refused ...
    assert summary.rows_lost == summary.ticks.ticks - out.log.ticks  # ... and all counted
    if not out.log.finished:
        # the end mark found no room either: the log stays resumable once there is room
        RunLogWriter.resume(tmp_path / "run.sqlite").close()
        assert check_log(tmp_path / "run.sqlite", PERIOD_S).integrity == "ok"


@pytest.mark.parametrize(
    ("clock_kind", "synchronous"), [(ClockKind.REAL, 2), (ClockKind.VIRTUAL, 1)]
)
def test_logs_of_real_time_runs_fsync_every_commit(
    tmp_path: Path, clock_kind: ClockKind, synchronous: int
) -> None:
    # the power-cut row's bound rests on this: a real-time run's commits are on the disk
    # (synchronous FULL = 2), a simulation's need not be (NORMAL = 1); SQLite
    # documentation, "PRAGMA synchronous"
    meta = RunMeta(
        run_id="saltmarrow-disk",
        protocol_text="",
        rig_text="",
        start_utc_s=1.8e9,
        clock_kind=clock_kind,
    )
    log = tmp_path / "run.sqlite"
    for writer in (RunLogWriter(log, meta=meta), None):
        writer = writer or RunLogWriter.resume(log)
        conn = writer._conn
        assert isinstance(conn, sqlite3.Connection)
        assert conn.execute("PRAGMA synchronous").fetchone()[0] == synchronous
        writer.close()


def test_a_session_s_first_rows_are_committed_within_the_commit_interval(tmp_path: Path) -> None:
    # a real-time run with a 10 s tick and the 0.5 s commit interval: had the first tick
    # after a start (or a resume) waited for the second, 10 s later, a crash in between
    # would lose 10 s, not 0.5 s
    meta = RunMeta(
        run_id="saltmarrow-first",
        protocol_text="",
        rig_text="",
        start_utc_s=1.8e9,
        clock_kind=ClockKind.REAL,
    )
    writer = RunLogWriter(tmp_path / "run.sqlite", meta=meta, commit_interval_s=0.5)
    try:
        blank = {f.name: None for f in fields(SampleRow)}
        row = {**blank, "t_s": 0.0, "utc_s": 1.8e9, "elapsed_s": 0.0, "chamber": "B"}
        row |= {"phase": "hold", "incubation": IncubationState.OPEN}
        writer.append_samples([SampleRow(**row)])
        assert writer.pending_rows == 0
    finally:
        writer.close()
