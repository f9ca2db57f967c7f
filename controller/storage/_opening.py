"""How a run-log writer gets its file: create it, refuse to clobber one, lock it, resume it.

Rules of this module
--------------------
- A new log goes only where there is nothing (or an empty file). An existing log, finished
  or not, and any other file are refused with a :class:`SquallError` that says what is there.
- One writer per log, enforced with an exclusive ``flock`` on ``<log>.lock``. The kernel drops
  the lock when the holder's process dies, so a crashed run can be resumed at once; the lock
  file itself stays (it is harmless while unlocked). A separate file is used because closing
  any descriptor of the database file itself would drop SQLite's own POSIX locks.
- If creating a new log fails half-way, the files created for it are removed again.
- File modes do not depend on the caller's umask being sensible: a new log is created 0640
  (owner writes, the owner's group may read, others nothing; a stricter umask narrows it
  further) before SQLite opens it, and SQLite gives its ``-wal`` and ``-shm`` files the
  log's own mode. An empty file we own that is reused as a new log loses any world-write
  bit. Lock files are 0600: nobody else may open them, so nobody else can hold the lock.
- Symbolic links are not followed where a file is created: a dangling link at the log's path
  or a link at the lock file's path is refused, so a link planted in a shared folder cannot
  make the run create, truncate or write a file elsewhere.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import os
import sqlite3
import stat
from pathlib import Path

from controller.errors import RuntimeFailure, SquallError

from ._records import EventKind, IncubationState, ResumePoint, RunMeta
from ._schema import create_schema, open_log, read_end

__all__ = [
    "LOCK_MODE",
    "LOG_MODE",
    "WriterLock",
    "configure",
    "create_log",
    "open_lock_file",
    "refuse_existing",
    "resume_point",
]

#: Largest size the -wal file is truncated back to after a checkpoint, bytes.
_JOURNAL_SIZE_LIMIT_B = 64 * 1024 * 1024
#: Mode of a new run log (and so of its -wal and -shm files), before the umask.
LOG_MODE = 0o640
#: Mode of a new lock file, before the umask.
LOCK_MODE = 0o600


def configure(conn: sqlite3.Connection, *, durable: bool) -> None:
    """Per-connection settings of a writing connection."""
    # WAL with synchronous=NORMAL: a commit appends its pages and a commit record to the -wal
    # file without fsync; only checkpoints fsync. A commit that returned sits in the OS page
    # cache, so it survives the *process* dying (crash, SIGKILL, OOM kill): the kernel writes
    # it out anyway. A power cut or kernel panic may lose the commits made since the last
    # checkpoint (at most ~4 MB of pages with the default autocheckpoint), but never corrupts
    # the file: frames after the last complete commit record are ignored on recovery. FULL
    # (``durable=True``) fsyncs every commit, i.e. about once a second, which bounds loss on
    # power cuts too, at the price of an fsync (milliseconds, more on SD cards) per commit.
    # Source: SQLite documentation, "PRAGMA synchronous" and "Write-Ahead Logging"; the
    # power-cut guarantees assume a disk that honours fsync.
    conn.execute(f"PRAGMA synchronous = {'FULL' if durable else 'NORMAL'}")
    conn.execute(f"PRAGMA journal_size_limit = {_JOURNAL_SIZE_LIMIT_B}")


def open_lock_file(path: Path, *, owner: Path, what: str) -> int:
    """Open (creating it 0600 if needed) a lock file for reading and writing, safely.

    Parameters
    ----------
    path
        The lock file.
    owner
        The file the lock protects, named in errors.
    what
        How errors name the lock, e.g. ``"the run log's lock file"``.

    Returns
    -------
    int
        An open file descriptor (not inherited by child processes).

    Raises
    ------
    SquallError
        The lock file cannot be opened or created, is a symbolic link, or is not a regular
        file.
    """
    flags = os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | os.O_CLOEXEC
    try:
        fd = os.open(path, flags, LOCK_MODE)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise SquallError(
                f"{what} {path.name} is a symbolic link; refusing to follow it (remove it)",
                file=owner,
            ) from None
        raise SquallError(f"cannot create {what} {path.name}: {exc.strerror}", file=owner) from exc
    if not stat.S_ISREG(os.fstat(fd).st_mode):
        os.close(fd)
        raise SquallError(f"{what} {path.name} is not a regular file (remove it)", file=owner)
    return fd


class WriterLock:
    """Exclusive advisory lock on ``<log>.lock`` held while a writer is open."""

    def __init__(self, log_path: Path) -> None:
        self.path = log_path.with_name(log_path.name + ".lock")
        fd = open_lock_file(self.path, owner=log_path, what="the run log's lock file")
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            raise SquallError(
                f"run log is being written by another writer (process {holder}); "
                "stop that run first or choose another log file",
                file=log_path,
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


def refuse_existing(path: Path, *, probe_lock: bool) -> None:
    """Raise SquallError unless ``path`` is free for a new log (absent or empty).

    Parameters
    ----------
    path
        Where the new log should go.
    probe_lock
        For an unfinished log, tell "being written" from "interrupted" by trying its lock
        (False when the caller already holds that lock).
    """
    if not path.exists() or (path.is_file() and path.stat().st_size == 0):
        return
    conn, _ = open_log(path, readonly=True)  # SquallError for anything that is not a log
    try:
        end = read_end(conn, path)
    finally:
        conn.close()
    if end is None and probe_lock:
        WriterLock(path).release()  # SquallError while another writer has it
    if end is not None:
        raise SquallError(
            f"already holds a finished run ({end.end_reason.value}); refusing to overwrite "
            "it: choose another log file",
            file=path,
        )
    raise SquallError(
        "already holds an interrupted run; resume it (squall run --resume LOG) or choose "
        "another log file",
        file=path,
    )


def _remove_db_files(path: Path) -> None:
    """Delete a log and its -wal/-shm companions, ignoring ones that are absent."""
    for suffix in ("", "-wal", "-shm"):
        with contextlib.suppress(FileNotFoundError):
            os.remove(f"{path}{suffix}")


def _make_log_file(path: Path) -> bool:
    """Create the empty log file 0640 without following links; return whether it existed.

    An existing (empty) file is kept, minus a world-write bit when it is ours.
    """
    try:
        fd = os.open(
            path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | os.O_CLOEXEC, LOG_MODE
        )
    except FileExistsError:
        info = os.lstat(path)
        if stat.S_ISLNK(info.st_mode):
            raise SquallError(
                "is a symbolic link; a run log is never created through one (remove it or "
                "choose another log file)",
                file=path,
            ) from None
        if info.st_uid == os.geteuid() and info.st_mode & stat.S_IWOTH:
            os.chmod(path, stat.S_IMODE(info.st_mode) & ~stat.S_IWOTH)
        return True
    except OSError as exc:
        raise SquallError(f"cannot create run log: {exc.strerror or exc}", file=path) from exc
    os.close(fd)
    return False


def create_log(path: Path, meta: RunMeta, *, durable: bool) -> sqlite3.Connection:
    """Create a new log at ``path`` (absent or empty) and return its writing connection."""
    existed = _make_log_file(path)
    try:
        conn = sqlite3.connect(path, isolation_level=None, timeout=10.0, check_same_thread=False)
    except sqlite3.Error as exc:
        if not existed:
            _remove_db_files(path)
        raise SquallError(f"cannot create run log: {exc}", file=path) from exc
    try:
        mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if mode != "wal":
            raise RuntimeFailure(
                f"run log {path}: the file system does not support SQLite's WAL mode "
                f"(got journal mode {mode!r}); put the log on a local disk"
            )
        configure(conn, durable=durable)
        create_schema(conn, meta)
    except sqlite3.Error as exc:
        conn.close()
        if not existed:
            _remove_db_files(path)
        raise RuntimeFailure(f"run log {path}: could not create it: {exc}") from exc
    except BaseException:
        conn.close()
        if not existed:
            _remove_db_files(path)
        raise
    return conn


def resume_point(conn: sqlite3.Connection, session: int, n_chambers: int) -> ResumePoint:
    """Read where the run stopped from the last committed rows (no full-table scans)."""
    last = conn.execute(
        "SELECT seq, t_s, utc_s, elapsed_s FROM samples ORDER BY seq DESC LIMIT 1"
    ).fetchone()
    phases: dict[str, str] = {}
    closed: list[str] = []
    # The last few ticks hold every chamber's last row; reading them avoids a GROUP BY scan.
    recent = conn.execute(
        "SELECT chamber, phase, incubation FROM samples ORDER BY seq DESC LIMIT ?",
        (max(64, 4 * n_chambers),),
    ).fetchall()
    for chamber, phase, incubation in recent:
        if chamber not in phases:
            phases[chamber] = phase
            if incubation == IncubationState.CLOSED.value:
                closed.append(chamber)
    hold = conn.execute(
        "SELECT kind FROM events WHERE kind IN (?, ?) ORDER BY seq DESC LIMIT 1",
        (EventKind.HOLD.value, EventKind.HOLD_END.value),
    ).fetchone()
    return ResumePoint(
        session=session,
        last_seq=int(last[0]) if last else 0,
        last_t_s=last[1] if last else None,
        last_utc_s=last[2] if last else None,
        last_elapsed_s=last[3] if last else None,
        phases=phases,
        closed=tuple(sorted(closed)),
        held=hold is not None and hold[0] == EventKind.HOLD.value,
    )
