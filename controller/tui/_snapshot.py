"""What the views show: typed, immutable snapshots built by the data sources.

Rules of this module
--------------------
- Everything here is a frozen, keyword-only dataclass or an enum holding plain numbers and
  text. Data sources (:mod:`._sources`, :mod:`._replay`) build them; widgets only read them.
  Nothing here imports textual, touches a file or reads a clock.
- Times are UTC wall time as POSIX seconds (``*_utc_s``) or protocol time in seconds since the
  protocol's start (``elapsed_s``, frozen while the run is held). Units live in the names.
- A missing value (a stale sensor, a channel the protocol does not drive) is ``None``, never
  NaN, so views can print a dash for it.
- numpy is imported only where a :class:`Trace` is built or cut, so the first paint of the
  board does not wait for it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from typing import TYPE_CHECKING

from controller.storage import AlarmLevel, IncubationState

if TYPE_CHECKING:
    import numpy as np

__all__ = [
    "STATE_FIELDS",
    "AlarmEntry",
    "ChamberState",
    "RunMode",
    "RunState",
    "RunStatus",
    "Snapshot",
    "TaskEntry",
    "Trace",
    "chamber_state",
    "finite_or_none",
]

STATE_FIELDS = (
    "utc_s",
    "phase",
    "temperature_c",
    "temperature_setpoint_c",
    "par",
    "par_setpoint",
    "flow_cm_s",
    "flow_setpoint_cm_s",
    "o2_umol_l",
    "o2_sat_pct",
    "incubation",
    "alarm",
)
"""Sample-row fields a :class:`ChamberState` is made of, in the order of
:func:`chamber_state`'s values."""


def finite_or_none(value: object) -> float | None:
    """A finite float, or None for None, NaN, infinities and pandas' missing values.

    Parameters
    ----------
    value
        A number from a frame or a record, any unit (kept).

    Returns
    -------
    float or None
        The value as a float in the same unit, or None when it is missing.
    """
    if value is None:
        return None
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


class RunMode(StrEnum):
    """Where the views' data comes from."""

    LIVE = "live"
    """A run log being written now (or a broker), followed as it grows."""
    REPLAY = "replay"
    """A log played back at a chosen speed."""


class RunStatus(StrEnum):
    """What the run is doing, as far as the log tells."""

    WAITING = "waiting"
    """No sample logged yet."""
    RUNNING = "running"
    HELD = "held"
    """Protocol clock frozen by an operator; setpoints kept."""
    FINISHED = "finished"
    """The writer marked the run finished (completed, aborted or stopped)."""
    SILENT = "silent"
    """No end mark, but no new sample for a long time: interrupted, or the controller hangs."""


@dataclass(frozen=True, slots=True, kw_only=True)
class ChamberState:
    """One chamber's newest values (or those at the replay position).

    Attributes
    ----------
    chamber
        Chamber identifier.
    utc_s
        UTC wall time of the sample, POSIX s; None before the first sample.
    phase
        Protocol phase in force ("" before the first sample).
    temperature_c, temperature_setpoint_c
        Measured water temperature and its setpoint, °C.
    par, par_setpoint
        Measured PAR and its setpoint, µmol photons m⁻² s⁻¹.
    flow_cm_s, flow_setpoint_cm_s
        Measured flow and its setpoint, cm s⁻¹.
    o2_umol_l
        Dissolved oxygen, µmol L⁻¹.
    o2_sat_pct
        Dissolved oxygen, % air saturation.
    incubation
        Open (flushed) or closed (sealed for a flux measurement); None before any sample.
    alarm_code
        Code of the chamber's active alarm, None when none.
    alarm_level
        Level of the worst active alarm of the chamber, None when none.
    alarm_acked
        Whether every active alarm of the chamber has been acknowledged.
    """

    chamber: str
    utc_s: float | None = None
    phase: str = ""
    temperature_c: float | None = None
    temperature_setpoint_c: float | None = None
    par: float | None = None
    par_setpoint: float | None = None
    flow_cm_s: float | None = None
    flow_setpoint_cm_s: float | None = None
    o2_umol_l: float | None = None
    o2_sat_pct: float | None = None
    incubation: IncubationState | None = None
    alarm_code: str | None = None
    alarm_level: AlarmLevel | None = None
    alarm_acked: bool = True

    @property
    def deviation_c(self) -> float | None:
        """Measured minus setpoint temperature, °C; None when either is missing."""
        if self.temperature_c is None or self.temperature_setpoint_c is None:
            return None
        return self.temperature_c - self.temperature_setpoint_c


@dataclass(frozen=True, slots=True, kw_only=True)
class TaskEntry:
    """One operator task of the run (derived from its protocol and rig, or published).

    Attributes
    ----------
    uid
        Stable identifier of the task.
    kind
        ``sampling``, ``calibration``, ``maintenance``, ``daily-check``, ``run-start`` or
        ``run-end``.
    title
        What to do, in one line.
    start_utc_s
        When it starts, UTC POSIX s.
    minutes
        Time set aside, minutes.
    chambers
        Chambers concerned (as the view names them).
    detail
        What, why and which procedure.
    """

    uid: str
    kind: str
    title: str
    start_utc_s: float
    minutes: float
    chambers: tuple[str, ...] = ()
    detail: str = ""

    @property
    def end_utc_s(self) -> float:
        """When the time set aside ends, UTC POSIX s."""
        return self.start_utc_s + 60.0 * self.minutes


@dataclass(frozen=True, slots=True, kw_only=True)
class AlarmEntry:
    """One alarm (a condition of one chamber, or of the rig) folded from its log records.

    Attributes
    ----------
    code
        Alarm code, stable across runs (e.g. ``over-temperature``).
    chamber
        Chamber concerned; None for the whole rig.
    level
        Severity at the latest raise.
    reason
        Why, in words, from the latest raise.
    raised_utc_s
        UTC wall time of the latest raise, POSIX s.
    cleared_utc_s
        UTC wall time it cleared after that raise, POSIX s; None while active.
    acked_utc_s
        UTC wall time of the acknowledgement after the latest raise, POSIX s; None if not.
    acked_by
        Who acknowledged it; None if nobody has.
    times_raised
        How often it was raised so far, dimensionless.
    """

    code: str
    chamber: str | None
    level: AlarmLevel
    reason: str
    raised_utc_s: float
    cleared_utc_s: float | None = None
    acked_utc_s: float | None = None
    acked_by: str | None = None
    times_raised: int = 1

    @property
    def active(self) -> bool:
        """Whether the condition is still present (raised and not cleared)."""
        return self.cleared_utc_s is None

    @property
    def acked(self) -> bool:
        """Whether someone acknowledged the latest raise."""
        return self.acked_utc_s is not None

    @property
    def needs_attention(self) -> bool:
        """Active and not yet acknowledged."""
        return self.active and not self.acked


@dataclass(frozen=True, slots=True, kw_only=True)
class RunState:
    """The run as a whole, at the newest sample (or the replay position).

    Attributes
    ----------
    run_id
        Run identifier from the log.
    title
        The protocol's title.
    mode
        Live or replay.
    status
        Waiting, running, held, finished or silent.
    phase
        Protocol phase in force ("" before the first sample).
    elapsed_s
        Protocol time, s since the protocol's start (frozen while held).
    duration_s
        Length of the protocol, s; None when the log's protocol could not be read.
    utc_s
        UTC wall time shown (newest sample, or replay position), POSIX s; None before any.
    start_utc_s
        UTC wall time the run started, POSIX s.
    end_reason
        How a finished run ended ("completed", "aborted", "stopped"); "" otherwise.
    age_s
        Live mode: real seconds since the newest sample was logged; None in replay.
    speed
        Replay speed, log seconds per real second; 1 in live mode.
    playing
        Replay: whether playback is running; live: always True.
    first_utc_s, last_utc_s
        Replay: UTC span of the log's samples, POSIX s; None in live mode or without samples.
    loading
        Replay: share of the log read so far while it loads in the background, 0..1; None
        once everything is in (and in live mode).
    """

    run_id: str
    title: str
    mode: RunMode
    status: RunStatus
    phase: str = ""
    elapsed_s: float = 0.0
    duration_s: float | None = None
    utc_s: float | None = None
    start_utc_s: float = 0.0
    end_reason: str = ""
    age_s: float | None = None
    speed: float = 1.0
    playing: bool = True
    first_utc_s: float | None = None
    last_utc_s: float | None = None
    loading: float | None = None

    @property
    def remaining_s(self) -> float | None:
        """Protocol time left, s (never negative); None when the duration is unknown."""
        if self.duration_s is None:
            return None
        return max(0.0, self.duration_s - self.elapsed_s)

    @property
    def progress(self) -> float | None:
        """Fraction of the protocol done, 0..1; None when the duration is unknown."""
        if not self.duration_s:
            return None
        return min(1.0, max(0.0, self.elapsed_s / self.duration_s))


@dataclass(frozen=True, slots=True, kw_only=True)
class Snapshot:
    """Everything the views show at one moment.

    Attributes
    ----------
    run
        The run as a whole.
    chambers
        Every chamber of the run, in rig order.
    alarms
        Every alarm seen so far (active first, newest first within each group).
    version
        Increases with every new snapshot of a source, dimensionless; views use it to skip
        repainting when nothing changed.
    """

    run: RunState
    chambers: tuple[ChamberState, ...]
    alarms: tuple[AlarmEntry, ...] = ()
    version: int = 0

    def chamber(self, chamber: str) -> ChamberState | None:
        """The state of one chamber, None if the run has no such chamber.

        Parameters
        ----------
        chamber
            Chamber identifier.
        """
        for state in self.chambers:
            if state.chamber == chamber:
                return state
        return None

    @property
    def attention(self) -> tuple[AlarmEntry, ...]:
        """Alarms that are active and not acknowledged."""
        return tuple(a for a in self.alarms if a.needs_attention)


def chamber_state(chamber: str, values: Sequence[object]) -> ChamberState:
    """A chamber's state from one sample's raw values (no alarm levels yet).

    Parameters
    ----------
    chamber
        Chamber identifier (shown as given).
    values
        The sample's :data:`STATE_FIELDS` in order, as stored: UTC time (POSIX s), phase,
        measurements and setpoints in their units (None or NaN when missing), incubation
        text (``open``/``closed``, or missing) and the alarm code (missing or empty: none).

    Returns
    -------
    ChamberState
        The state, missing numbers as None.
    """
    (utc, phase, t, tsp, par, parsp, flow, flowsp, o2, sat, incubation, alarm) = values
    return ChamberState(
        chamber=chamber,
        utc_s=finite_or_none(utc),
        phase=str(phase or ""),
        temperature_c=finite_or_none(t),
        temperature_setpoint_c=finite_or_none(tsp),
        par=finite_or_none(par),
        par_setpoint=finite_or_none(parsp),
        flow_cm_s=finite_or_none(flow),
        flow_setpoint_cm_s=finite_or_none(flowsp),
        o2_umol_l=finite_or_none(o2),
        o2_sat_pct=finite_or_none(sat),
        incubation=_incubation(incubation),
        alarm_code=alarm if isinstance(alarm, str) and alarm else None,
    )


def _incubation(value: object) -> IncubationState | None:
    if isinstance(value, IncubationState):
        return value
    if isinstance(value, str) and value:
        return IncubationState(value)
    return None


def _empty() -> np.ndarray:
    import numpy as np

    return np.empty(0, dtype="float64")


def _no_flags() -> np.ndarray:
    import numpy as np

    return np.empty(0, dtype=bool)


@dataclass(frozen=True, kw_only=True, eq=False)
class Trace:
    """One chamber's recent history for the detail charts (columns of equal length).

    Attributes
    ----------
    chamber
        Chamber identifier.
    utc_s
        UTC wall time of each sample, POSIX s, increasing.
    temperature_c, temperature_setpoint_c
        Measured and setpoint temperature, °C (NaN where missing).
    o2_umol_l
        Dissolved oxygen, µmol L⁻¹ (NaN where missing).
    o2_sat_pct
        Dissolved oxygen, % air saturation (NaN where missing).
    closed
        Whether the chamber was closed (incubating) at each sample.
    """

    chamber: str
    utc_s: np.ndarray = field(default_factory=_empty)
    temperature_c: np.ndarray = field(default_factory=_empty)
    temperature_setpoint_c: np.ndarray = field(default_factory=_empty)
    o2_umol_l: np.ndarray = field(default_factory=_empty)
    o2_sat_pct: np.ndarray = field(default_factory=_empty)
    closed: np.ndarray = field(default_factory=_no_flags)

    def __len__(self) -> int:
        return int(self.utc_s.size)

    def window(self, end_utc_s: float, span_s: float) -> Trace:
        """The part of the trace in ``(end_utc_s - span_s, end_utc_s]``.

        Parameters
        ----------
        end_utc_s
            Right edge, UTC POSIX s.
        span_s
            Width, s.

        Returns
        -------
        Trace
            A view on the same arrays (no copy).
        """
        import numpy as np

        lo = int(np.searchsorted(self.utc_s, end_utc_s - span_s, side="right"))
        hi = int(np.searchsorted(self.utc_s, end_utc_s, side="right"))
        return Trace(
            chamber=self.chamber,
            utc_s=self.utc_s[lo:hi],
            temperature_c=self.temperature_c[lo:hi],
            temperature_setpoint_c=self.temperature_setpoint_c[lo:hi],
            o2_umol_l=self.o2_umol_l[lo:hi],
            o2_sat_pct=self.o2_sat_pct[lo:hi],
            closed=self.closed[lo:hi],
        )

    def closed_spans(self) -> tuple[tuple[float, float], ...]:
        """Closed incubation windows in this trace as (start, end) UTC POSIX s.

        A window still closed at the trace's end ends at its last sample.
        """
        if not self.closed.any():
            return ()
        import numpy as np

        flags = self.closed.astype(np.int8)
        edges = np.diff(np.concatenate(([0], flags, [0])))
        starts = np.flatnonzero(edges == 1)
        ends = np.flatnonzero(edges == -1) - 1
        return tuple(
            (float(self.utc_s[a]), float(self.utc_s[b])) for a, b in zip(starts, ends, strict=True)
        )
