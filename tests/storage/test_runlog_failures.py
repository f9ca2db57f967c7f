"""Write failures keep committed data intact; bad files and misuse are clear user errors."""

from __future__ import annotations

import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from runlog_helpers import START_UTC_S, make_meta, tick_rows

from controller.errors import RuntimeFailure, SquallError
from controller.storage import (
    APPLICATION_ID,
    SCHEMA_VERSION,
    RunEnd,
    RunEndReason,
    RunLogReader,
    RunLogWriter,
)

HERE = Path(__file__).resolve().parent


def _integrity(log: Path) -> str:
    conn = sqlite3.connect(log)
    try:
        return str(conn.execute("PRAGMA integrity_check").fetchone()[0])
    finally:
        conn.close()


def test_full_database_fails_the_batch_and_keeps_earlier_commits(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    writer = RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0)
    writer.append_samples(tick_rows(0.0))
    writer.append_samples(tick_rows(1.0))  # commits ticks 0 and 1
    writer.append_samples(tick_rows(1.5))  # pending
    # Simulate a full disk: forbid the file to grow past its current number of pages
    # (reaching into the writer's connection is the only way to set this per-connection limit).
    conn = writer._conn
    assert conn is not None
    pages = conn.execute("PRAGMA page_count").fetchone()[0]
    conn.execute(f"PRAGMA max_page_count = {pages}")
    big = [row for k in range(400) for row in tick_rows(1.6 + 0.001 * k)]
    with pytest.raises(RuntimeFailure) as caught:
        writer.append_samples(big)
    message = str(caught.value)
    assert str(log) in message and "database or disk is full" in message
    assert f"{3 + len(big)} row(s) not yet committed were dropped" in message
    assert "up to clock time 1 s" in message and "intact" in message
    assert writer.pending_rows == 0

    assert _integrity(log) == "ok"
    with RunLogReader(log) as reader:
        assert reader.samples(columns=["t_s"])["t_s"].tolist() == [0.0] * 3 + [1.0] * 3

    # the writer stays usable once space is back
    conn.execute("PRAGMA max_page_count = 1073741823")
    writer.append_samples(tick_rows(2.0))
    writer.close()
    with RunLogReader(log) as reader:
        assert reader.samples(columns=["t_s"])["t_s"].tolist()[-3:] == [2.0] * 3


def test_io_error_from_the_kernel_surfaces_as_runtime_failure(tmp_path: Path) -> None:
    # The child caps the file size it may write (RLIMIT_FSIZE), so the kernel fails SQLite's
    # writes with EFBIG, as a full disk fails them with ENOSPC; then it dies without closing.
    log = tmp_path / "run.sqlite"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(HERE), *sys.path])}
    done = subprocess.run(
        [sys.executable, str(HERE / "runlog_child.py"), "full", str(log)],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    failed = [line for line in lines if line.startswith("failed ")]
    assert len(failed) == 1, lines[-5:]
    assert str(log) in failed[0] and "intact" in failed[0]
    last_ok = max(float(line.split()[1]) for line in lines if line.startswith("ok "))

    assert _integrity(log) == "ok"
    with RunLogReader(log) as reader:
        frame = reader.samples(columns=["t_s"])
    last_committed = float(frame["t_s"].max())
    # every tick reported written is there; the failing tick is at most whole or absent
    assert last_ok <= last_committed <= last_ok + 0.1 + 1e-9
    assert (frame.groupby("t_s").size() == 8).all()


def test_malformed_row_is_a_bug_and_rolls_back_the_pending_batch(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    bad = tick_rows(0.5)
    object.__setattr__(bad[1], "chamber", None)  # NOT NULL column
    with RunLogWriter(log, meta=make_meta(3), commit_interval_s=1.0) as writer:
        writer.append_samples(tick_rows(0.0))  # a session's first rows: committed at once
        writer.append_samples(tick_rows(0.25))  # pending
        with pytest.raises(sqlite3.IntegrityError):
            writer.append_samples(bad)
        writer.append_samples(tick_rows(1.0))
    with RunLogReader(log) as reader:
        assert reader.samples(columns=["t_s"])["t_s"].tolist() == [0.0] * 3 + [1.0] * 3


def _write_finished(log: Path) -> None:
    writer = RunLogWriter(log, meta=make_meta())
    writer.append_samples(tick_rows(0.0))
    writer.finish(RunEnd(end_t_s=0.0, end_utc_s=START_UTC_S, end_reason=RunEndReason.COMPLETED))


def test_existing_logs_and_other_files_are_never_overwritten(tmp_path: Path) -> None:
    finished, interrupted, other = (tmp_path / n for n in ("f.sqlite", "i.sqlite", "notes.txt"))
    _write_finished(finished)
    RunLogWriter(interrupted, meta=make_meta()).close()
    other.write_text("field notes, Saltmarrow Lagoon\n")
    before = {p: p.read_bytes() for p in (finished, interrupted, other)}
    with pytest.raises(SquallError, match="finished run"):
        RunLogWriter(finished, meta=make_meta())
    with pytest.raises(SquallError, match="interrupted run; resume it"):
        RunLogWriter(interrupted, meta=make_meta())
    with pytest.raises(SquallError, match="not a squall run log"):
        RunLogWriter(other, meta=make_meta())
    assert {p: p.read_bytes() for p in before} == before
    assert not (tmp_path / "notes.txt.lock").exists()


def test_an_empty_file_may_become_a_log(tmp_path: Path) -> None:
    log = tmp_path / "empty.sqlite"
    log.touch()
    RunLogWriter(log, meta=make_meta()).close()
    with RunLogReader(log) as reader:
        assert reader.meta() == make_meta()


def test_second_writer_on_the_same_log_is_refused(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=make_meta()):
        busy = rf"being written by another writer \(process {os.getpid()}\)"
        with pytest.raises(SquallError, match=busy):
            RunLogWriter.resume(log)
        with pytest.raises(SquallError, match=busy):  # not "interrupted": it is live
            RunLogWriter(log, meta=make_meta())
    RunLogWriter.resume(log).close()  # free again once the first writer closed


def test_resuming_a_finished_run_is_refused(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    _write_finished(log)
    with pytest.raises(SquallError, match="already finished"):
        RunLogWriter.resume(log)


def test_missing_folder_is_a_user_error(tmp_path: Path) -> None:
    log = tmp_path / "no-such-folder" / "run.sqlite"
    with pytest.raises(SquallError) as caught:
        RunLogWriter(log, meta=make_meta())
    assert "lock file" in str(caught.value) and str(log) in caught.value.one_line()


def _plain_sqlite(path: Path, *, app_id: int = 0, version: int = 0) -> None:
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE t (x)")
    conn.execute(f"PRAGMA application_id = {app_id}")
    conn.execute(f"PRAGMA user_version = {version}")
    conn.commit()
    conn.close()


@pytest.mark.parametrize(
    ("make", "expected"),
    [
        (lambda p: None, "no such run log"),
        (lambda p: p.mkdir(), "is a directory"),
        (lambda p: p.write_bytes(b"time,temperature_c\n0,20\n" * 50), "not an SQLite database"),
        (lambda p: _plain_sqlite(p), "written by another program"),
        (lambda p: _plain_sqlite(p, app_id=APPLICATION_ID), "incomplete run log"),
        (
            lambda p: _plain_sqlite(p, app_id=APPLICATION_ID, version=SCHEMA_VERSION + 1),
            "newer squall",
        ),
    ],
    ids=["missing", "directory", "csv", "other-sqlite", "incomplete", "newer-schema"],
)
def test_bad_files_give_a_squall_error_naming_the_file(tmp_path: Path, make, expected) -> None:
    path = tmp_path / "suspect.sqlite"
    make(path)
    for opener in (RunLogReader, RunLogWriter.resume):
        with pytest.raises(SquallError) as caught:
            opener(path)
        assert expected in str(caught.value)
        assert caught.value.file == str(path)
        assert caught.value.one_line().startswith(f"{path}: ")


def test_edited_protocol_text_is_detected(tmp_path: Path) -> None:
    log = tmp_path / "run.sqlite"
    RunLogWriter(log, meta=make_meta()).close()
    conn = sqlite3.connect(log)
    conn.execute("UPDATE run SET protocol_text = protocol_text || '# edited\n'")
    conn.commit()
    conn.close()
    with RunLogReader(log) as reader, pytest.raises(SquallError, match="SHA-256"):
        reader.meta()
