"""Files a run creates are never world-writable, whatever the umask, and never through links.

A run log is created 0640 before SQLite opens it, and SQLite gives its ``-wal`` and ``-shm``
files the log's mode; lock files (the log's and the rig's) are 0600. A stricter umask narrows
these further; a careless one (000) cannot widen them. A symbolic link planted where a log or
a lock file goes (a shared folder, another user) is refused and its target left untouched.
(The control socket's folder and socket modes are tested in ``tests/ctl/test_ctl_server.py``.)
"""

from __future__ import annotations

import os
import stat
from collections.abc import Iterator
from pathlib import Path

import pytest

from controller.errors import SquallError
from controller.runtime import RigLock
from controller.storage import (
    ChamberRecord,
    ClockKind,
    IncubationState,
    RunLogWriter,
    RunMeta,
    SampleRow,
)

WORLD_WRITE = stat.S_IWOTH


def _meta() -> RunMeta:
    return RunMeta(
        run_id="saltmarrow-modes",
        protocol_text='# Saltmarrow Lagoon\n[[phases]]\nname = "p"\n',
        rig_text='name = "modes rack"\n',
        start_utc_s=1_780_000_000.0,
        clock_kind=ClockKind.VIRTUAL,
        chambers=(ChamberRecord(chamber="A1", water_volume_l=10.0, sediment_area_m2=0.03),),
    )


def _row(t_s: float) -> SampleRow:
    return SampleRow(
        t_s=t_s,
        utc_s=1_780_000_000.0 + t_s,
        elapsed_s=t_s,
        chamber="A1",
        phase="p",
        temperature_c=18.0,
        temperature_setpoint_c=18.0,
        par=None,
        par_setpoint=None,
        flow_cm_s=None,
        flow_setpoint_cm_s=None,
        o2_umol_l=None,
        o2_sat_pct=None,
        heater_pct=0.0,
        chiller_pct=0.0,
        lamp_pct=0.0,
        pump_pct=0.0,
        incubation=IncubationState.OPEN,
        alarm=None,
    )


@pytest.fixture
def umask() -> Iterator[None]:
    """Run the test under umask 000, the most permissive a caller can have."""
    old = os.umask(0)
    try:
        yield
    finally:
        os.umask(old)


def _mode(path: Path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


def test_a_run_log_and_its_companions_are_never_world_writable(tmp_path: Path, umask: None) -> None:
    log = tmp_path / "run.sqlite"
    with RunLogWriter(log, meta=_meta(), commit_interval_s=1.0) as writer:
        writer.append_samples([_row(0.0)])
        writer.flush()
        modes = {name: _mode(Path(f"{log}{name}")) for name in ("", "-wal", "-shm", ".lock")}
    assert modes == {"": 0o640, "-wal": 0o640, "-shm": 0o640, ".lock": 0o600}, modes
    assert not _mode(log) & WORLD_WRITE


def test_a_stricter_umask_still_applies(tmp_path: Path) -> None:
    old = os.umask(0o077)
    try:
        log = tmp_path / "private.sqlite"
        RunLogWriter(log, meta=_meta()).close()
        assert _mode(log) == 0o600
    finally:
        os.umask(old)


def test_an_empty_file_reused_as_a_log_loses_its_world_write_bit(
    tmp_path: Path, umask: None
) -> None:
    log = tmp_path / "prepared.sqlite"
    log.touch()
    os.chmod(log, 0o666)
    RunLogWriter(log, meta=_meta()).close()
    assert _mode(log) == 0o664


def test_a_dangling_link_at_the_log_path_is_refused_and_nothing_is_created(
    tmp_path: Path,
) -> None:
    target = tmp_path / "elsewhere" / "victim.sqlite"
    target.parent.mkdir()
    log = tmp_path / "run.sqlite"
    log.symlink_to(target)
    with pytest.raises(SquallError, match="symbolic link") as caught:
        RunLogWriter(log, meta=_meta())
    assert caught.value.file == str(log)
    assert not target.exists()
    assert log.is_symlink()  # left as it was


def test_a_link_to_an_empty_file_is_refused_too(tmp_path: Path) -> None:
    target = tmp_path / "victim.sqlite"
    target.touch()
    log = tmp_path / "run.sqlite"
    log.symlink_to(target)
    with pytest.raises(SquallError, match="symbolic link"):
        RunLogWriter(log, meta=_meta())
    assert target.stat().st_size == 0


def test_a_link_at_the_log_lock_is_refused_and_its_target_untouched(tmp_path: Path) -> None:
    precious = tmp_path / "precious.txt"
    precious.write_text("keep me\n")
    log = tmp_path / "run.sqlite"
    Path(f"{log}.lock").symlink_to(precious)
    with pytest.raises(SquallError, match="symbolic link"):
        RunLogWriter(log, meta=_meta())
    assert precious.read_text() == "keep me\n"  # not truncated, no PID written into it
    assert not log.exists()


def test_the_rig_lock_is_owner_only_and_never_through_a_link(tmp_path: Path, umask: None) -> None:
    rig = tmp_path / "rack.toml"
    rig.write_text('name = "rack"\n')
    lock = RigLock(rig)
    try:
        assert _mode(lock.path) == 0o600
        assert lock.path.read_text().strip() == str(os.getpid())
    finally:
        lock.release()
    other = tmp_path / "other.toml"
    precious = tmp_path / "precious.txt"
    precious.write_text("keep me\n")
    Path(f"{other}.lock").symlink_to(precious)
    with pytest.raises(SquallError, match="symbolic link") as caught:
        RigLock(other)
    assert caught.value.file == str(other)
    assert precious.read_text() == "keep me\n"


def test_a_lock_path_that_is_not_a_file_is_refused(tmp_path: Path) -> None:
    rig = tmp_path / "rack.toml"
    Path(f"{rig}.lock").mkdir()
    with pytest.raises(SquallError, match=r"cannot create|not a regular file"):
        RigLock(rig)
