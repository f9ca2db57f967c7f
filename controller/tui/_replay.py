"""Replay a run log at a chosen speed, with play/pause and seek, finished or still running.

Rules of this module
--------------------
- The replay position is UTC wall time of the run (``position_utc_s``): elapsed protocol time
  freezes during holds and clock time restarts on a resume, but the run's UTC time always
  moves forward. The time shown (elapsed, phase, values) is that of the newest sample at or
  before the position.
- Playback advances by ``speed`` × the real time between two polls, measured with an injected
  monotonic clock, so tests step it without sleeping.
- Samples are loaded in chunks of at most ``max_rows_per_poll`` rows per poll (the first chunk
  on ``open``), so the first frame paints at once even for a week-long log and no frame
  carries more than a small read; loading (2000 rows a frame, 20 000 a second) outruns
  playback at 3600× (32 chambers at 1-min ticks are 1920 rows a second). A log that is
  still being written keeps growing under the replay. Columns are held per chamber as numpy
  arrays; a frame is one binary search per chamber.
- Only what the views show is kept; a 7-day log of 32 chambers at one-minute ticks is about
  300 000 rows, a few tens of MB.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from controller.storage import IncubationState, RunLogReader, RunMeta

from ._fold import (
    AlarmRow,
    EventRow,
    alarm_rows,
    apply_alarms,
    event_rows,
    fold_alarms,
    held_at,
    utc_seconds,
)
from ._snapshot import ChamberState, RunMode, RunState, RunStatus, Snapshot, Trace
from ._timeline import Timeline, full_timeline, title_only

__all__ = ["ReplaySource"]

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
_COLUMNS = ("time", "chamber", "phase", "incubation", "alarm", *_FLOATS)

MIN_SPEED = 1.0
"""Slowest replay, log seconds per real second."""
MAX_SPEED = 604800.0
"""Fastest replay (a week per second), log seconds per real second."""
RECHECK_S = 1.0
"""Real seconds between looks for new rows once a growing log is caught up, s."""


def _f(value: float) -> float | None:
    return None if value != value else float(value)


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
        alarm = self.alarm[i]
        return ChamberState(
            chamber=chamber,
            utc_s=float(self.utc_s[i]),
            phase=str(self.phase[i]),
            temperature_c=_f(f["temperature_c"][i]),
            temperature_setpoint_c=_f(f["temperature_setpoint_c"][i]),
            par=_f(f["par"][i]),
            par_setpoint=_f(f["par_setpoint"][i]),
            flow_cm_s=_f(f["flow_cm_s"][i]),
            flow_setpoint_cm_s=_f(f["flow_setpoint_cm_s"][i]),
            o2_umol_l=_f(f["o2_umol_l"][i]),
            o2_sat_pct=_f(f["o2_sat_pct"][i]),
            incubation=IncubationState.CLOSED if self.closed[i] else IncubationState.OPEN,
            alarm_code=None if alarm is None or alarm is pd.NA or alarm == "" else str(alarm),
        )


class ReplaySource:
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
        self._path = Path(path)
        self._reader = RunLogReader(self._path)
        try:
            self._meta: RunMeta = self._reader.meta()
        except BaseException:
            self._reader.close()
            raise
        self._chambers = tuple(c.chamber for c in self._meta.chambers)
        self._cols = {c: _Columns.empty() for c in self._chambers}
        self._max_rows = int(max_rows_per_poll)
        self._real_clock = real_clock
        self._protocol_dir = protocol_dir
        self._timeline = title_only(self._meta.protocol_text)
        self._speed = self._clamp_speed(speed)
        self._playing = True
        self._since = 0
        self._position: float | None = None
        self._last_real: float | None = None
        self._alarm_rows: list[AlarmRow] = []
        self._event_rows: list[EventRow] = []
        self._alarm_utc = np.empty(0)
        self._event_utc = np.empty(0)
        self._end_reason = ""
        self._end_utc_s: float | None = None
        self._version = 0
        self._dirty = True
        self._caught_up: float | None = None

    # -- properties -----------------------------------------------------------------------

    @property
    def mode(self) -> RunMode:
        """Always replay."""
        return RunMode.REPLAY

    @property
    def path(self) -> Path:
        """The run log."""
        return self._path

    @property
    def meta(self) -> RunMeta:
        """The run's metadata."""
        return self._meta

    @property
    def chambers(self) -> tuple[str, ...]:
        """The run's chambers, in rig order."""
        return self._chambers

    @property
    def timeline(self) -> Timeline:
        """The protocol's timeline as known so far."""
        return self._timeline

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
        """Load at most one chunk of new samples (and the rare tables with them).

        Once caught up, a finished log is not read again, and a growing one at most once
        per :data:`RECHECK_S` of real time (even an empty read costs a frame-building call).
        """
        if self._caught_up is not None:
            if self._end_reason or self._real_clock() - self._caught_up < RECHECK_S:
                return False
        reader = self._reader
        first = self._since == 0
        frame = reader.tail(self._since, limit=self._max_rows)
        self._caught_up = self._real_clock() if len(frame) < self._max_rows else None
        if frame.empty:
            if not self._end_reason:
                end = reader.info().end
                if end is not None:
                    self._end_reason = end.end_reason.value
                    self._end_utc_s = end.end_utc_s
                    self._dirty = True
                    return True
            return False
        self._since = int(frame.index[-1])
        # each column to numpy once; per chamber only numpy masks (pandas per chamber was
        # most of the load time)
        chunk = {k: frame[k].to_numpy(dtype="float64") for k in _FLOATS}
        chunk["utc_s"] = utc_seconds(frame["time"])
        chunk["phase"] = frame["phase"].to_numpy(dtype=object)
        chunk["alarm"] = frame["alarm"].to_numpy(dtype=object)
        incubation = frame["incubation"].to_numpy(dtype=object)
        chunk["closed"] = incubation == IncubationState.CLOSED.value
        chambers = frame["chamber"].to_numpy(dtype=object)
        for chamber in self._chambers:
            mask = chambers == chamber
            if mask.any():
                self._cols[chamber] = self._cols[chamber].extended(chunk, mask)
        if first or self._caught_up is not None:  # rare tables: at the start and the end
            self._alarm_rows = alarm_rows(reader.alarms())
            self._event_rows = event_rows(reader.events())
            self._alarm_utc = np.array([r.utc_s for r in self._alarm_rows], dtype="float64")
            self._event_utc = np.array([r.utc_s for r in self._event_rows], dtype="float64")
        self._dirty = True
        return True

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
            n_alarms = int(np.searchsorted(self._alarm_utc, pos, side="right"))
            alarms = fold_alarms(self._alarm_rows[:n_alarms])
            n_events = int(np.searchsorted(self._event_utc, pos, side="right"))
            held = held_at(self._event_rows[:n_events])
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

    def refine_timeline(self) -> Timeline:
        """Compile the stored protocol to place events and sampling reminders (may block).

        Returns
        -------
        Timeline
            The complete timeline, or the quick one with a note if it does not compile.
        """
        self._timeline = full_timeline(
            self._meta.protocol_text, self._meta.start_utc_s, base_dir=self._protocol_dir
        )
        self._dirty = True
        return self._timeline

    def close(self) -> None:
        """Close the reader."""
        self._reader.close()
