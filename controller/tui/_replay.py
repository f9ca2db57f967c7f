"""Replay a run log at a chosen speed, with play/pause and seek, finished or still running.

Rules of this module
--------------------
- The replay position is UTC wall time of the run (``position_utc_s``): elapsed protocol time
  freezes during holds and clock time restarts on a resume, but the run's UTC time always
  moves forward. The time shown (elapsed, phase, values) is that of the newest sample at or
  before the position.
- Playback advances by ``speed`` × the real time between two polls, measured with an injected
  monotonic clock, so tests step it without sleeping.
- Loading: ``open`` reads the first chunk (``max_rows_per_poll`` rows), so the first frame
  paints at once even for a week-long log. The rest is read either by
  :meth:`ReplaySource.background_loader` in a worker thread (what the app does: frames never carry a
  read, and the run bar shows how much is in) or, without a worker, one chunk per ``poll``.
  A log that is still being written keeps growing under the replay (``poll`` looks for new
  rows at most every :data:`RECHECK_S` once caught up).
- The loader thread has its own connection and only ever *replaces* a chamber's
  :class:`_Columns` (never mutates arrays), so a frame built meanwhile sees whole chunks.
  Columns are held per chamber as numpy arrays; a frame is one binary search per chamber.
- Only what the views show is kept; a 7-day log of 32 chambers at one-minute ticks is about
  300 000 rows, a few tens of MB.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from controller.storage import IncubationState

from ._fold import AlarmRow, EventRow, apply_alarms, fold_alarms, held_at
from ._logfile import LogFile, sample_columns
from ._snapshot import (
    ChamberState,
    RunMode,
    RunState,
    RunStatus,
    Snapshot,
    Trace,
    chamber_state,
)
from ._sources import LogBacked

__all__ = ["LOAD_CHUNK_ROWS", "ReplaySource"]

_FLOATS = (
    "elapsed_s",
    "temperature_c",
    "temperature_setpoint_c",
    "par",
    "par_setpoint",
    "flow_cm_s",
    "flow_setpoint_cm_s",
    "o2_umol_l",
    "o2_sat_pct",
)
_FIELDS = ("utc_s", "chamber", "phase", "incubation", "alarm", *_FLOATS)

MIN_SPEED = 1.0
"""Slowest replay, log seconds per real second."""
MAX_SPEED = 604800.0
"""Fastest replay (a week per second), log seconds per real second."""
RECHECK_S = 1.0
"""Real seconds between looks for new rows once a growing log is caught up, s."""
LOAD_CHUNK_ROWS = 20_000
"""Sample rows the background loader reads at a time, dimensionless."""


@dataclass
class _Columns:
    """One chamber's loaded samples, oldest first (arrays replaced, never mutated)."""

    utc_s: np.ndarray
    floats: dict[str, np.ndarray]
    phase: np.ndarray
    closed: np.ndarray
    alarm: np.ndarray

    @classmethod
    def empty(cls) -> _Columns:
        return cls(
            utc_s=np.empty(0),
            floats={k: np.empty(0) for k in _FLOATS},
            phase=np.empty(0, dtype=object),
            closed=np.empty(0, dtype=bool),
            alarm=np.empty(0, dtype=object),
        )

    def extended(self, chunk: dict[str, np.ndarray], mask: np.ndarray) -> _Columns:
        """These columns with the rows of ``chunk`` selected by ``mask`` appended."""
        return _Columns(
            utc_s=np.concatenate((self.utc_s, chunk["utc_s"][mask])),
            floats={k: np.concatenate((v, chunk[k][mask])) for k, v in self.floats.items()},
            phase=np.concatenate((self.phase, chunk["phase"][mask])),
            closed=np.concatenate((self.closed, chunk["closed"][mask])),
            alarm=np.concatenate((self.alarm, chunk["alarm"][mask])),
        )

    def state_at(self, chamber: str, position_utc_s: float) -> ChamberState:
        i = int(np.searchsorted(self.utc_s, position_utc_s, side="right")) - 1
        if i < 0:
            return ChamberState(chamber=chamber)
        f = self.floats
        incubation = IncubationState.CLOSED if self.closed[i] else IncubationState.OPEN
        return chamber_state(
            chamber,
            (
                self.utc_s[i],
                self.phase[i],
                f["temperature_c"][i],
                f["temperature_setpoint_c"][i],
                f["par"][i],
                f["par_setpoint"][i],
                f["flow_cm_s"][i],
                f["flow_setpoint_cm_s"][i],
                f["o2_umol_l"][i],
                f["o2_sat_pct"][i],
                incubation,
                self.alarm[i],
            ),
        )


class ReplaySource(LogBacked):
    """Play a run log back at ``speed`` times real time.

    Parameters
    ----------
    path
        The run log (finished, interrupted or still being written).
    speed
        Log seconds per real second, 1 to one week per second.
    max_rows_per_poll
        Most sample rows loaded per poll, dimensionless.
    real_clock
        Monotonic real time, s (injected so tests step playback without sleeping).
    protocol_dir
        Folder the protocol's CSV series are relative to, for placing events.

    Raises
    ------
    SquallError
        The file is missing or not a readable run log.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        speed: float = 60.0,
        max_rows_per_poll: int = 2_000,
        real_clock: Callable[[], float] = time.monotonic,
        protocol_dir: Path | None = None,
    ) -> None:
        super().__init__(path, protocol_dir=protocol_dir)
        self._cols = {c: _Columns.empty() for c in self._chambers}
        self._max_rows = int(max_rows_per_poll)
        self._real_clock = real_clock
        self._speed = self._clamp_speed(speed)
        self._playing = True
        self._since = 0
        self._position: float | None = None
        self._last_real: float | None = None
        self._rare: _Rare = _Rare.empty()
        self._end_reason = ""
        self._end_utc_s: float | None = None
        self._version = 0
        self._dirty = True
        self._caught_up: float | None = None
        self._loader: Callable[[], None] | None = None
        self._total_rows = 0
        self._stop = threading.Event()

    # -- properties -----------------------------------------------------------------------

    @property
    def mode(self) -> RunMode:
        """Always replay."""
        return RunMode.REPLAY

    @property
    def speed(self) -> float:
        """Log seconds per real second."""
        return self._speed

    @property
    def playing(self) -> bool:
        """Whether playback runs."""
        return self._playing

    @property
    def position_utc_s(self) -> float | None:
        """Replay position, UTC POSIX s; None before any sample is loaded."""
        return self._position

    @property
    def loaded_rows(self) -> int:
        """Sample rows loaded so far (row id of the newest), dimensionless."""
        return self._since

    @property
    def loading(self) -> bool:
        """Whether the background loader (:meth:`background_loader`) is still reading."""
        return self._loader is not None

    def load_fraction(self) -> float | None:
        """Share of the log's rows loaded while the background loader reads, 0..1; None
        when it is not reading."""
        if self._loader is None:
            return None
        return min(1.0, self._since / max(1, self._total_rows))

    def span_utc_s(self) -> tuple[float, float] | None:
        """UTC span of the loaded samples (first, last), POSIX s; None without samples."""
        firsts = [c.utc_s[0] for c in self._cols.values() if c.utc_s.size]
        lasts = [c.utc_s[-1] for c in self._cols.values() if c.utc_s.size]
        if not firsts:
            return None
        return float(min(firsts)), float(max(lasts))

    # -- controls -------------------------------------------------------------------------

    @staticmethod
    def _clamp_speed(speed: float) -> float:
        if not speed == speed:
            return MIN_SPEED
        return float(min(MAX_SPEED, max(MIN_SPEED, speed)))

    def set_speed(self, speed: float) -> None:
        """Set the replay speed (clamped to 1 s/s .. one week per second).

        Parameters
        ----------
        speed
            Log seconds per real second.
        """
        self._catch_up()
        self._speed = self._clamp_speed(speed)
        self._dirty = True

    def faster(self) -> None:
        """Double the speed."""
        self.set_speed(self._speed * 2.0)

    def slower(self) -> None:
        """Halve the speed."""
        self.set_speed(self._speed / 2.0)

    def play(self) -> None:
        """Start (or go on) playing; at the end of a finished log, start again from the top."""
        span = self.span_utc_s()
        if span is not None and self._position is not None and self._position >= span[1]:
            if self._end_reason:
                self._position = span[0]
        self._playing = True
        self._last_real = self._real_clock()
        self._dirty = True

    def pause(self) -> None:
        """Stop playing (the position stays)."""
        self._catch_up()
        self._playing = False
        self._dirty = True

    def toggle(self) -> None:
        """Pause when playing, play when paused."""
        if self._playing:
            self.pause()
        else:
            self.play()

    def seek_by(self, delta_s: float) -> None:
        """Move the position by ``delta_s`` seconds of run time, within the loaded samples.

        Parameters
        ----------
        delta_s
            Seconds of run (UTC) time, negative to go back, s.
        """
        self._catch_up()
        if self._position is not None:
            self.seek_to(self._position + delta_s)

    def seek_to(self, position_utc_s: float) -> None:
        """Move the position to a UTC time, clamped to the loaded samples.

        Parameters
        ----------
        position_utc_s
            UTC POSIX s.
        """
        span = self.span_utc_s()
        if span is None:
            return
        self._position = float(min(span[1], max(span[0], position_utc_s)))
        self._last_real = self._real_clock()
        self._dirty = True

    def seek_fraction(self, fraction: float) -> None:
        """Move the position to a fraction of the loaded span (0 first sample, 1 last).

        Parameters
        ----------
        fraction
            0..1, dimensionless.
        """
        span = self.span_utc_s()
        if span is not None:
            self.seek_to(span[0] + (span[1] - span[0]) * min(1.0, max(0.0, fraction)))

    # -- reading --------------------------------------------------------------------------

    def open(self) -> Snapshot:
        """Load the first chunk of samples and the rare tables; position at the start.

        Returns
        -------
        Snapshot
            The state at the first sample.
        """
        self._load()
        span = self.span_utc_s()
        self._position = span[0] if span else None
        self._last_real = self._real_clock()
        return self._snapshot()

    def poll(self) -> Snapshot | None:
        """Load another chunk if any, advance playback, return the frame.

        Returns
        -------
        Snapshot or None
            The state at the new position, or None when nothing moved.
        """
        loaded = self._load()
        if self._position is None:
            span = self.span_utc_s()
            self._position = span[0] if span else None
        moved = self._catch_up()
        if not (loaded or moved or self._dirty):
            return None
        return self._snapshot()

    def _catch_up(self) -> bool:
        """Advance the position by the real time since the last advance; True if it moved."""
        now = self._real_clock()
        last, self._last_real = self._last_real, now
        if not self._playing or self._position is None or last is None:
            return False
        span = self.span_utc_s()
        if span is None:
            return False
        target = min(span[1], self._position + (now - last) * self._speed)
        moved = target != self._position
        self._position = target
        if target >= span[1] and self._end_reason:
            self._playing = False  # the end of a finished log: stop there
            self._dirty = True
        return moved

    def _load(self) -> bool:
        """Load at most one chunk of new samples (and the rare tables with them) in a poll.

        Nothing while the background loader reads. Once caught up, a finished log is not
        read again, and a growing one at most once per :data:`RECHECK_S` of real time.
        """
        if self._loader is not None:
            return False
        if self._caught_up is not None:
            if self._end_reason or self._real_clock() - self._caught_up < RECHECK_S:
                return False
        return self._chunk(self._file, self._max_rows)

    def _read_chunk(self, log: LogFile, since: int, limit: int) -> list[tuple[Any, ...]]:
        """One chunk of sample rows after row ``since`` (the loader's only I/O)."""
        return log.tail(since, limit=limit, fields=_FIELDS)

    def _chunk(self, log: LogFile, limit: int) -> bool:
        """Read and take one chunk through ``log``; False when nothing new was there."""
        first = self._since == 0
        rows = self._read_chunk(log, self._since, limit)
        self._caught_up = self._real_clock() if len(rows) < limit else None
        if not rows:
            if not self._end_reason:
                end = log.end()
                if end is not None:
                    self._rare = _Rare.read(log)  # the last records before the end
                    self._end_reason = end.end_reason.value
                    self._end_utc_s = end.end_utc_s
                    self._dirty = True
                    return True
            return False
        cols = sample_columns(rows, _FIELDS)
        chunk = {k: cols[k] for k in ("utc_s", *_FLOATS, "phase", "alarm")}
        chunk["closed"] = cols["incubation"] == IncubationState.CLOSED.value
        chambers = cols["chamber"]
        for chamber in self._chambers:
            mask = chambers == chamber
            if mask.any():
                self._cols[chamber] = self._cols[chamber].extended(chunk, mask)
        self._since = int(cols["seq"][-1])
        if first or self._caught_up is not None:  # rare tables: at the start and the end
            self._rare = _Rare.read(log)
        self._dirty = True
        return True

    def background_loader(self) -> Callable[[], None]:
        """Hand the loading over to a worker thread: from now on ``poll`` reads nothing.

        Returns
        -------
        callable
            Blocks until the rest of the log is in (run it in a worker thread): it reads
            chunks of :data:`LOAD_CHUNK_ROWS` through a connection of its own, stops early
            when the source is closed, and leaves a log that keeps growing to ``poll``.
        """
        self._total_rows = self._file.last_rowid()  # the bar's share from the start
        self._loader = self._load_rest
        return self._load_rest

    def _load_rest(self) -> None:
        try:
            with LogFile(self._path) as log:
                while not self._stop.is_set():
                    self._total_rows = log.last_rowid()
                    if not self._chunk(log, LOAD_CHUNK_ROWS) or self._caught_up is not None:
                        break
                if not self._end_reason and not self._stop.is_set():
                    self._chunk(log, LOAD_CHUNK_ROWS)  # finished meanwhile: note its end
        finally:
            self._loader = None
            self._dirty = True

    def _snapshot(self) -> Snapshot:
        self._dirty = False
        self._version += 1
        pos = self._position
        span = self.span_utc_s()
        if pos is None:
            states = tuple(ChamberState(chamber=c) for c in self._chambers)
            alarms: tuple = ()
            run = self._run_state(None, span, held=False)
        else:
            rare = self._rare
            n_alarms = int(np.searchsorted(rare.alarm_utc, pos, side="right"))
            alarms = fold_alarms(rare.alarms[:n_alarms])
            n_events = int(np.searchsorted(rare.event_utc, pos, side="right"))
            held = held_at(rare.events[:n_events])
            states = tuple(
                apply_alarms(self._cols[c].state_at(c, pos), alarms) for c in self._chambers
            )
            run = self._run_state(states, span, held=held)
        return Snapshot(run=run, chambers=states, alarms=alarms, version=self._version)

    def _run_state(
        self,
        states: tuple[ChamberState, ...] | None,
        span: tuple[float, float] | None,
        *,
        held: bool,
    ) -> RunState:
        newest: ChamberState | None = None
        elapsed = 0.0
        for chamber, state in zip(self._chambers, states or (), strict=False):
            if state.utc_s is not None and (newest is None or state.utc_s > (newest.utc_s or 0)):
                newest = state
                cols = self._cols[chamber]
                i = int(np.searchsorted(cols.utc_s, state.utc_s, side="right")) - 1
                elapsed = float(cols.floats["elapsed_s"][i])
        at_end = span is not None and self._position is not None and self._position >= span[1]
        if newest is None:
            status = RunStatus.WAITING
        elif at_end and self._end_reason:
            status = RunStatus.FINISHED
        elif held:
            status = RunStatus.HELD
        else:
            status = RunStatus.RUNNING
        return RunState(
            run_id=self._meta.run_id,
            title=self._timeline.title or self._meta.run_id,
            mode=RunMode.REPLAY,
            status=status,
            phase=newest.phase if newest else "",
            elapsed_s=elapsed,
            duration_s=self._timeline.duration_s,
            utc_s=self._position,
            start_utc_s=self._meta.start_utc_s,
            end_reason=self._end_reason if status is RunStatus.FINISHED else "",
            speed=self._speed,
            playing=self._playing,
            first_utc_s=span[0] if span else None,
            last_utc_s=span[1] if span else None,
            loading=self.load_fraction(),
        )

    def history(self, chamber: str, span_s: float) -> Trace:
        """One chamber's loaded samples over the ``span_s`` seconds up to the position.

        Parameters
        ----------
        chamber
            Chamber identifier.
        span_s
            How far back, s.

        Returns
        -------
        Trace
            Views on the loaded arrays (no copy).
        """
        cols = self._cols.get(chamber)
        if cols is None or self._position is None:
            return Trace(chamber=chamber)
        f = cols.floats
        full = Trace(
            chamber=chamber,
            utc_s=cols.utc_s,
            temperature_c=f["temperature_c"],
            temperature_setpoint_c=f["temperature_setpoint_c"],
            o2_umol_l=f["o2_umol_l"],
            o2_sat_pct=f["o2_sat_pct"],
            closed=cols.closed,
        )
        return full.window(self._position, span_s)

    def _timeline_refined(self) -> None:
        self._dirty = True

    def close(self) -> None:
        """Stop the background loader (after its current chunk) and close the log."""
        self._stop.set()
        super().close()


@dataclass(frozen=True)
class _Rare:
    """The alarm and event rows of the log, with their UTC times (POSIX s) for searching."""

    alarms: list[AlarmRow]
    alarm_utc: np.ndarray
    events: list[EventRow]
    event_utc: np.ndarray

    @classmethod
    def empty(cls) -> _Rare:
        return cls([], np.empty(0), [], np.empty(0))

    @classmethod
    def read(cls, log: LogFile) -> _Rare:
        alarms, events = log.alarm_rows(), log.event_rows()
        return cls(
            alarms,
            np.array([r.utc_s for r in alarms], dtype="float64"),
            events,
            np.array([r.utc_s for r in events], dtype="float64"),
        )
