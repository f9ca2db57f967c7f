"""What a run needs to be resumed, and the lock that keeps a rig to one controller.

Rules of this module
--------------------
- Every run log starts with a launch record: an audit entry (command ``run``) whose text is
  JSON naming the protocol and rig files (absolute), the tick period and whether the rig was
  simulated. A resumed run takes the protocol and rig *text* from the log's metadata, never
  from the files as they are now; the launch record only says which folder the protocol's
  relative CSV paths and the rig's ports file are relative to, and the tick period.
- Resuming reads the log before writing anything: a finished log, a log another writer holds,
  a protocol or rig text that no longer validates are refused with a located
  :class:`~controller.errors.SquallError` and leave the log untouched.
- Protocol position on resume: the log's last sample gives protocol time and UTC; the loop
  adds the wall time since then (``elapsed = last elapsed + (now − last UTC)``), except for
  a run interrupted while held, which resumes held at the same protocol time.
- A chamber whose last logged sample was closed had a window cut short by the interruption;
  it is recorded with end reason ``interrupted``, from the first sample of its closed stretch
  to the last logged sample (the modules' watchdogs then opened the chambers).
- One controller per rig: :class:`RigLock` holds an exclusive ``flock`` on ``<rig file>.lock``
  (mode 0600, never opened through a symbolic link) next to the rig file for the whole run.
  The kernel drops it when the process dies, so a crashed run can be resumed at once.
  Simulated rigs live inside their run and share no devices, so simulated runs take no rig
  lock (the log's own lock still applies).
"""

from __future__ import annotations

import contextlib
import fcntl
import getpass
import json
import math
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from controller.control import IncubationSettings
from controller.errors import SquallError
from controller.storage import (
    AuditRecord,
    ClockKind,
    LightState,
    ResumePoint,
    RunLogReader,
    RunLogWriter,
    RunMeta,
    WindowEndReason,
    WindowRecord,
)
from controller.storage._opening import open_lock_file

__all__ = [
    "LAUNCH_COMMAND",
    "LaunchRecord",
    "RigLock",
    "append_windows",
    "check_resumable",
    "interrupted_windows",
    "last_written_utc_s",
    "launch_audit",
    "read_launch",
]

LAUNCH_COMMAND = "run"
"""Audit command of the launch record."""


@dataclass(frozen=True, kw_only=True)
class LaunchRecord:
    """How a run was launched.

    Attributes
    ----------
    protocol_path
        The protocol file, absolute.
    rig_path
        The rig file, absolute.
    period_s
        Control tick period, s.
    simulated
        Whether the rig was simulated in the controller's process.
    """

    protocol_path: Path
    rig_path: Path
    period_s: float
    simulated: bool

    def text(self) -> str:
        """The record as the JSON text of its audit entry.

        Returns
        -------
        str
            One JSON object (paths as text, period in s).
        """
        return json.dumps(
            {
                "protocol": str(self.protocol_path),
                "rig": str(self.rig_path),
                "period_s": self.period_s,
                "simulated": self.simulated,
            },
            ensure_ascii=False,
        )

    @classmethod
    def parse(cls, text: str) -> LaunchRecord:
        """Read a record back from its audit text.

        Parameters
        ----------
        text
            The JSON written by :meth:`text`.

        Returns
        -------
        LaunchRecord
            The record.

        Raises
        ------
        ValueError
            Not such a record.
        """
        data = json.loads(text)
        if not isinstance(data, dict):
            raise ValueError("not a JSON object")
        period = float(data["period_s"])
        if not (math.isfinite(period) and period > 0):
            raise ValueError(f"bad period {period!r}")
        return cls(
            protocol_path=Path(str(data["protocol"])),
            rig_path=Path(str(data["rig"])),
            period_s=period,
            simulated=bool(data["simulated"]),
        )


def launch_audit(record: LaunchRecord, start_utc_s: float) -> AuditRecord:
    """The audit entry that opens a run log.

    Parameters
    ----------
    record
        How the run is launched.
    start_utc_s
        The run's start, UTC POSIX s.

    Returns
    -------
    AuditRecord
        Command ``run`` by the current operating-system user, at clock time 0 s.
    """
    try:
        user = getpass.getuser()
    except (KeyError, OSError):
        user = str(os.getuid())
    return AuditRecord(
        t_s=0.0,
        utc_s=start_utc_s,
        user=user,
        command=LAUNCH_COMMAND,
        text=record.text(),
        result="ok",
    )


def read_launch(reader: RunLogReader, meta: RunMeta) -> LaunchRecord:
    """The launch record of a log (or what can be told without one).

    Parameters
    ----------
    reader
        Reader of the log.
    meta
        The log's metadata.

    Returns
    -------
    LaunchRecord
        The first launch record; a log without one (written before launch records
        existed) gets the log's folder for both files, the default tick period of 10 s and
        ``simulated`` from its clock kind.
    """
    audit = reader.audit()
    for text in audit.loc[audit.command == LAUNCH_COMMAND, "text"]:
        with contextlib.suppress(ValueError, KeyError, TypeError):
            return LaunchRecord.parse(str(text))
    folder = reader.path.resolve().parent
    return LaunchRecord(
        protocol_path=folder / "protocol.toml",
        rig_path=folder / "rig.toml",
        period_s=10.0,
        simulated=meta.clock_kind is ClockKind.VIRTUAL,
    )


def interrupted_windows(
    reader: RunLogReader,
    point: ResumePoint,
    incubation: Mapping[str, IncubationSettings],
) -> list[WindowRecord]:
    """Windows the interruption cut short: chambers closed at their last logged sample.

    Parameters
    ----------
    reader
        Reader of the log.
    point
        Where the run stopped.
    incubation
        The run's cycle settings (for the light threshold), by chamber.

    Returns
    -------
    list of WindowRecord
        One per such chamber, from its closed stretch's first sample to its last sample
        (clock times of the interrupted session, s; UTC POSIX s), reason ``interrupted``.
    """
    windows: list[WindowRecord] = []
    for chamber in point.closed:
        rows = reader.samples(chamber, columns=["t_s", "time", "par_setpoint", "incubation"])
        if rows.empty:
            continue
        opened = (rows["incubation"].astype(object) != "closed").to_numpy()
        last_open = int(opened.nonzero()[0][-1]) if opened.any() else -1
        stretch = rows.iloc[last_open + 1 :]
        if stretch.empty:
            continue
        first, last = stretch.iloc[0], stretch.iloc[-1]
        settings = incubation.get(chamber) or IncubationSettings()
        par = first["par_setpoint"]
        lit = bool(par == par and par is not None and par > settings.light_threshold_par)
        windows.append(
            WindowRecord(
                chamber=chamber,
                light=LightState.LIGHT if lit else LightState.DARK,
                start_t_s=float(first["t_s"]),
                start_utc_s=first["time"].timestamp(),
                end_t_s=float(last["t_s"]),
                end_utc_s=last["time"].timestamp(),
                end_reason=WindowEndReason.INTERRUPTED,
                detail="the controller stopped while the chamber was closed",
            )
        )
    return windows


def check_resumable(log_path: Path) -> tuple[RunMeta, LaunchRecord]:
    """Refuse a log that cannot be resumed; return its metadata and launch record.

    Parameters
    ----------
    log_path
        The run log.

    Returns
    -------
    tuple
        The log's metadata and its launch record.

    Raises
    ------
    SquallError
        Not a run log, or already finished (nothing is written).
    """
    with RunLogReader(log_path) as reader:
        info = reader.info()
        if info.end is not None:
            raise SquallError(
                f"run already finished ({info.end.end_reason.value}); there is nothing to "
                "resume: start a new run with another log file",
                file=log_path,
            )
        return info.meta, read_launch(reader, info.meta)


class RigLock:
    """Exclusive lock on ``<rig file>.lock``: one controller per rig.

    Parameters
    ----------
    rig_path
        The rig file (its folder must be writable).

    Raises
    ------
    SquallError
        Another controller holds the rig, or the lock file cannot be created, is a symbolic
        link or is not a regular file.
    """

    def __init__(self, rig_path: Path) -> None:
        rig_path = Path(rig_path)
        self.path = rig_path.with_name(rig_path.name + ".lock")
        # 0600 and never through a symbolic link: nobody else can hold the lock, and a link
        # planted beside a rig in a shared folder cannot make the run truncate another file
        fd = open_lock_file(self.path, owner=rig_path, what="the rig's lock file")
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            raise SquallError(
                f"another controller (process {holder}) is running this rig; stop it first "
                "(one controller per rig)",
                file=rig_path,
            ) from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
        self._fd: int | None = fd

    def release(self) -> None:
        """Release the lock (the lock file stays; it is harmless when unlocked)."""
        if self._fd is not None:
            fcntl.flock(self._fd, fcntl.LOCK_UN)
            os.close(self._fd)
            self._fd = None


def append_windows(writer: RunLogWriter, windows: list[WindowRecord]) -> None:
    """Write windows to a resumed log before its first tick.

    Parameters
    ----------
    writer
        The resumed writer.
    windows
        The windows (clock times in s, UTC POSIX s).
    """
    for window in windows:
        writer.record_window(window)


def last_written_utc_s(log_path: Path) -> float:
    """When a log (or its write-ahead file) was last written, UTC POSIX s.

    Parameters
    ----------
    log_path
        The run log.

    Returns
    -------
    float
        The latest modification time of the log and its ``-wal`` file, POSIX s.
    """
    times = []
    for name in (str(log_path), f"{log_path}-wal"):
        with contextlib.suppress(OSError):
            times.append(os.stat(name).st_mtime)
    return max(times) if times else 0.0
