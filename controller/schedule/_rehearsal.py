"""Rehearsals: ``squall serve --sim`` plays a schedule on a copy, never on the schedule itself.

Rules of this module
--------------------
- A rehearsal moves experiments through preflight, running and done, and writes run logs.
  Done on the facility's schedule, that would mark real bookings as run; so a simulated
  serve works on a copy unless asked to write the schedule (``--write-schedule``).
- The copy is ``rehearsals/<schedule stem>-<UTC wall time>/schedule.sqlite`` beside the
  schedule: its run logs land in the same folder (serve writes logs beside its schedule),
  away from real logs. It is taken with SQLite's online backup, so a schedule that another
  process is writing at that moment is copied as one consistent state; it is created
  readable by its owner only, as every schedule is (0600).
- The schedule itself is only read.
"""

from __future__ import annotations

import contextlib
import os
import sqlite3
from datetime import UTC, datetime
from pathlib import Path

from controller.errors import SquallError

__all__ = ["rehearsal_copy"]


def rehearsal_copy(schedule: Path, wall_utc: datetime | None = None) -> Path:
    """Copy a schedule for a rehearsal and return the copy's path.

    Parameters
    ----------
    schedule
        The schedule store to rehearse (only read) (no unit).
    wall_utc
        Wall-clock time naming the rehearsal's folder, aware; default now (no unit).

    Returns
    -------
    Path
        ``<schedule folder>/rehearsals/<stem>-<YYYYmmddTHHMMSSZ>[-n]/schedule.sqlite``.

    Raises
    ------
    SquallError
        The schedule is missing or not readable, or the copy cannot be written.
    """
    schedule = Path(schedule)
    if not schedule.is_file():
        raise SquallError(
            "no schedule here; add experiments with 'squall schedule add' first", file=schedule
        )
    when = (wall_utc or datetime.now(UTC)).astimezone(UTC)
    base = schedule.parent / "rehearsals" / f"{schedule.stem}-{when:%Y%m%dT%H%M%SZ}"
    folder, n = base, 2
    while folder.exists():
        folder = base.with_name(f"{base.name}-{n}")
        n += 1
    copy = folder / "schedule.sqlite"
    try:
        folder.mkdir(parents=True, mode=0o700)
        os.close(os.open(copy, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
        source = sqlite3.connect(f"{schedule.resolve().as_uri()}?mode=ro", uri=True)
        try:
            target = sqlite3.connect(copy)
            try:
                source.backup(target)
            finally:
                target.close()
        finally:
            source.close()
    except (OSError, sqlite3.Error) as exc:
        with contextlib.suppress(OSError):
            copy.unlink()
            folder.rmdir()
        raise SquallError(
            f"cannot copy the schedule for a rehearsal: {exc}", file=schedule
        ) from None
    return copy
