"""The closed-incubation cycle of one chamber as a pure state machine.

Rules of this module
--------------------
- A chamber is OPEN (the flushing pump exchanges its water with air-saturated treatment
  water) or CLOSED (the pump is off and the oxygen the community makes or uses accumulates:
  the window in which an O2 flux is measured). Everything that decides how the status
  changes lives in ``_TRANSITIONS`` below the enums: one table keyed by (status, signal).
  Code and the docs renderer (:func:`cycle_table_markdown`) both read it. A signal with no
  entry is illegal: it raises :class:`IllegalCycleSignal` and the state is left as it was.
- Each tick :func:`cycle_step` turns the inputs into exactly one signal, in a fixed order of
  precedence. While CLOSED: an interlock forcing the outputs, a stale optode, a phase change,
  a light change (or, pinned to the light schedule, the pre-change flush falling due), O2
  leaving the band, the maximum duration; the first that applies ends the window (signal
  FLUSH, with its :class:`WindowEnd` reason), else STAY. While OPEN: a forced output or a
  phase change restarts the flush (FLUSH); the chamber closes (CLOSE) only when the flush
  time has passed, the light has been steady for the settling time, the O2 reading is fresh
  and inside the band by the re-close margin, and the next light change and the phase's end
  leave room for a window of the minimum duration; pinned to the light schedule, only one
  window per light or dark period. Otherwise STAY.
- Fail open: without a fresh O2 reading a chamber is never closed, and a closed chamber is
  flushed once its optode has been silent for ``o2_stale_after_s``. O2 leaving the band always
  ends a window, even one shorter than the minimum duration: the organisms come first.
- Durations of windows and flushes count clock time (the water chemistry does not stop when
  the protocol is held); light changes and phase ends are given in protocol time by the
  caller, who knows the schedule.
- Nothing here reads a clock or does I/O: the caller passes readings, schedule look-ahead and
  the time.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from enum import Enum
from types import MappingProxyType

import numpy as np
import numpy.typing as npt

__all__ = [
    "ClosedWindow",
    "CycleInputs",
    "CycleSignal",
    "CycleState",
    "CycleStep",
    "IllegalCycleSignal",
    "IncubationSettings",
    "IncubationStatus",
    "WindowEnd",
    "cycle_step",
    "cycle_table_markdown",
    "end_window",
    "light_change_times",
    "next_status",
]


class IncubationStatus(Enum):
    """Whether the chamber is flushed (open) or sealed for a flux measurement (closed)."""

    OPEN = "open"
    CLOSED = "closed"


class CycleSignal(Enum):
    """What drives the cycle's status at one tick."""

    STAY = "stay"  # nothing changes
    CLOSE = "close"  # stop flushing: a window starts
    FLUSH = "flush"  # flush now: ends a window, or restarts the flush time of an open chamber


class WindowEnd(Enum):
    """Why a closed window ended (values are the run log's window end reasons)."""

    O2_HIGH = "o2_high"
    O2_LOW = "o2_low"
    MAX_DURATION = "max_duration"
    LIGHT_CHANGE = "light_change"
    PHASE_CHANGE = "phase_change"
    OPERATOR = "operator"
    ALARM = "alarm"
    RUN_END = "run_end"
    INTERRUPTED = "interrupted"


_O, _C = IncubationStatus.OPEN, IncubationStatus.CLOSED
_STAY, _CLOSE, _FLUSH = CycleSignal.STAY, CycleSignal.CLOSE, CycleSignal.FLUSH

#: The one transition table: (status, signal) -> next status. Missing = illegal.
_TRANSITIONS: Mapping[tuple[IncubationStatus, CycleSignal], IncubationStatus] = MappingProxyType(
    {
        (_O, _STAY): _O,  # keep flushing
        (_O, _CLOSE): _C,  # pump off: a window starts
        (_O, _FLUSH): _O,  # flush time starts again (alarm, phase change, operator)
        (_C, _STAY): _C,  # keep the window going
        (_C, _FLUSH): _O,  # the window ends and is recorded; pump on
    }
)


class IllegalCycleSignal(ValueError):
    """A signal the transition table does not allow in the current status."""


@dataclass(frozen=True, kw_only=True)
class IncubationSettings:
    """How one chamber's closed-incubation cycle runs.

    Parameters
    ----------
    o2_low_pct
        Lower edge of the O2 band, % air saturation (common practice: 80 %).
    o2_high_pct
        Upper edge of the O2 band, % air saturation (common practice: 120 %).
    min_closed_s
        Shortest window worth starting, s: a chamber is not closed when the light changes or
        the phase ends sooner (common practice: 30 min).
    max_closed_s
        Longest window, s (common practice: 30–120 min).
    flush_s
        Flushing time between windows, s.
    settle_s
        Time after a light change before a chamber may close, s (acclimation; common
        practice: 15–30 min in the dark).
    pinned_to_light
        One window per light period and per dark period: close ``settle_s`` after the light
        changes, flush ``flush_s`` before the next change.
    reclose_margin_pct
        A chamber closes only with O2 at least this far inside both band edges, % air
        saturation, so a window does not end as soon as it starts.
    light_threshold_par
        PAR setpoint above which a period counts as light, µmol photons m⁻² s⁻¹.
    o2_stale_after_s
        A closed chamber whose optode has given no fresh reading for this long is flushed, s.
    """

    o2_low_pct: float = 80.0
    o2_high_pct: float = 120.0
    min_closed_s: float = 1800.0
    max_closed_s: float = 7200.0
    flush_s: float = 1800.0
    settle_s: float = 900.0
    pinned_to_light: bool = False
    reclose_margin_pct: float = 5.0
    light_threshold_par: float = 1.0
    o2_stale_after_s: float = 180.0

    def __post_init__(self) -> None:
        for name in ("o2_low_pct", "o2_high_pct", "max_closed_s", "flush_s", "o2_stale_after_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"{name} must be a finite number above 0, got {value!r}")
        for name in ("min_closed_s", "settle_s", "reclose_margin_pct", "light_threshold_par"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be a finite number, 0 or more, got {value!r}")
        if self.o2_low_pct >= self.o2_high_pct:
            raise ValueError(
                f"the O2 band is empty: low {self.o2_low_pct:g} % is not below high "
                f"{self.o2_high_pct:g} %"
            )
        if 2.0 * self.reclose_margin_pct >= self.o2_high_pct - self.o2_low_pct:
            raise ValueError(
                f"a re-close margin of {self.reclose_margin_pct:g} % leaves nothing of the "
                f"{self.o2_low_pct:g}–{self.o2_high_pct:g} % band"
            )
        if self.min_closed_s > self.max_closed_s:
            raise ValueError(
                f"min_closed_s ({self.min_closed_s:g} s) is longer than max_closed_s "
                f"({self.max_closed_s:g} s)"
            )


@dataclass(frozen=True, slots=True, kw_only=True)
class CycleInputs:
    """What the cycle learns at one tick.

    Attributes
    ----------
    t_s
        Clock time, s.
    o2_sat_pct
        Fresh O2 reading, % air saturation, or None when the optode gave none this tick.
    light
        Whether the protocol's light is on now (PAR setpoint above the threshold).
    light_change_in_s
        Protocol time until the light next switches, s (``inf`` when it never does).
    phase
        Protocol phase in force.
    phase_ends_in_s
        Protocol time until the phase ends, s.
    forced
        Whether the interlocks force the chamber's outputs (starting, tripped).
    """

    t_s: float
    o2_sat_pct: float | None
    light: bool
    light_change_in_s: float
    phase: str
    phase_ends_in_s: float
    forced: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class CycleState:
    """One chamber's cycle between ticks.

    Attributes
    ----------
    status
        Open or closed.
    since_t_s
        Clock time of the latest transition or flush restart, s (None before the first tick).
    light
        Light state at the latest tick (None before the first tick).
    light_since_t_s
        Clock time the current light state was first seen, s.
    phase
        Phase at the latest tick.
    period_used
        Pinned mode: a window already ran in the current light period.
    o2_seen_t_s
        Clock time of the latest fresh O2 reading, s.
    window_light
        Light state of the window in progress (closed only).
    window_phase
        Phase of the window in progress (closed only).
    window_o2_pct
        O2 when the window started, % air saturation (closed only).
    """

    status: IncubationStatus = IncubationStatus.OPEN
    since_t_s: float | None = None
    light: bool | None = None
    light_since_t_s: float | None = None
    phase: str | None = None
    period_used: bool = False
    o2_seen_t_s: float | None = None
    window_light: bool | None = None
    window_phase: str | None = None
    window_o2_pct: float | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class ClosedWindow:
    """A window that has ended.

    Attributes
    ----------
    start_t_s, end_t_s
        Clock times the chamber closed and opened again, s.
    light
        Whether the window was in a light period.
    reason
        Why it ended.
    detail
        Words with the values that ended it.
    """

    start_t_s: float
    end_t_s: float
    light: bool
    reason: WindowEnd
    detail: str


@dataclass(frozen=True, slots=True, kw_only=True)
class CycleStep:
    """What one tick of the cycle decided.

    Attributes
    ----------
    state
        The new state.
    signal
        The signal that drove it.
    window
        The window that ended at this tick, if one did.
    """

    state: CycleState
    signal: CycleSignal
    window: ClosedWindow | None = None

    @property
    def closed(self) -> bool:
        """Whether the chamber is to be kept closed (pump off) after this tick."""
        return self.state.status is IncubationStatus.CLOSED


def next_status(status: IncubationStatus, signal: CycleSignal) -> IncubationStatus:
    """The status a signal leads to, by the transition table.

    Parameters
    ----------
    status
        Current status.
    signal
        The signal.

    Returns
    -------
    IncubationStatus
        The next status.

    Raises
    ------
    IllegalCycleSignal
        The table has no entry for the pair (e.g. CLOSE while closed).
    """
    try:
        return _TRANSITIONS[(status, signal)]
    except KeyError:
        raise IllegalCycleSignal(
            f"signal {signal.value!r} is not allowed while the chamber is {status.value}"
        ) from None


def _minutes(seconds: float) -> str:
    return f"{seconds / 60.0:.1f} min"


def _why_end(
    state: CycleState, inputs: CycleInputs, settings: IncubationSettings
) -> tuple[WindowEnd, str] | None:
    """The reason a closed window ends at this tick, in order of precedence, or None."""
    assert state.since_t_s is not None
    t = inputs.t_s
    if inputs.forced:
        return WindowEnd.ALARM, "the interlocks forced the outputs safe"
    seen = state.o2_seen_t_s if state.o2_seen_t_s is not None else state.since_t_s
    if inputs.o2_sat_pct is None and t - seen >= settings.o2_stale_after_s:
        return WindowEnd.ALARM, f"no oxygen reading for {t - seen:.0f} s"
    if inputs.phase != state.window_phase:
        return WindowEnd.PHASE_CHANGE, f"phase {inputs.phase!r} began"
    if inputs.light != state.window_light:
        return WindowEnd.LIGHT_CHANGE, "the light came on" if inputs.light else "the light went off"
    if settings.pinned_to_light and inputs.light_change_in_s <= settings.flush_s:
        return (
            WindowEnd.LIGHT_CHANGE,
            f"the {'light' if inputs.light else 'dark'} period ends in "
            f"{_minutes(inputs.light_change_in_s)}; flushing before it does",
        )
    o2 = inputs.o2_sat_pct
    if o2 is not None and o2 > settings.o2_high_pct:
        return WindowEnd.O2_HIGH, f"O2 {o2:.1f} % above {settings.o2_high_pct:g} %"
    if o2 is not None and o2 < settings.o2_low_pct:
        return WindowEnd.O2_LOW, f"O2 {o2:.1f} % below {settings.o2_low_pct:g} %"
    if t - state.since_t_s >= settings.max_closed_s:
        return WindowEnd.MAX_DURATION, f"closed for {_minutes(t - state.since_t_s)}"
    return None


def _may_close(state: CycleState, inputs: CycleInputs, settings: IncubationSettings) -> bool:
    """Whether an open chamber closes at this tick."""
    assert state.since_t_s is not None and state.light_since_t_s is not None
    t, o2 = inputs.t_s, inputs.o2_sat_pct
    if o2 is None or inputs.forced:
        return False
    if t - state.since_t_s < settings.flush_s or t - state.light_since_t_s < settings.settle_s:
        return False
    margin = settings.reclose_margin_pct
    if not settings.o2_low_pct + margin <= o2 <= settings.o2_high_pct - margin:
        return False
    room = inputs.light_change_in_s
    if settings.pinned_to_light:
        if state.period_used:
            return False
        room -= settings.flush_s
    return min(room, inputs.phase_ends_in_s) >= max(settings.min_closed_s, 1e-9)


def cycle_step(state: CycleState, inputs: CycleInputs, settings: IncubationSettings) -> CycleStep:
    """Advance one chamber's cycle by one tick.

    Parameters
    ----------
    state
        The state after the previous tick (``CycleState()`` before the first).
    inputs
        This tick's readings, schedule look-ahead (s of protocol time) and clock time (s).
    settings
        The chamber's cycle settings (band in % air saturation, durations in s).

    Returns
    -------
    CycleStep
        The new state, the signal, and the window that ended (clock times in s), if any.
    """
    t = inputs.t_s
    if not math.isfinite(t):
        raise ValueError(f"t_s must be finite, got {t!r}")
    if state.since_t_s is None:  # first tick: open, flushing from now
        state = replace(state, since_t_s=t, light=inputs.light, light_since_t_s=t)
    if inputs.light != state.light:
        state = replace(state, light=inputs.light, light_since_t_s=t, period_used=False)
    window: ClosedWindow | None = None
    if state.status is IncubationStatus.CLOSED:
        why = _why_end(state, inputs, settings)
        signal = _STAY if why is None else _FLUSH
        if why is not None:
            assert state.since_t_s is not None and state.window_light is not None
            window = ClosedWindow(
                start_t_s=state.since_t_s,
                end_t_s=t,
                light=state.window_light,
                reason=why[0],
                detail=why[1],
            )
    elif inputs.forced or (state.phase is not None and inputs.phase != state.phase):
        signal = _FLUSH
    else:
        signal = _CLOSE if _may_close(state, inputs, settings) else _STAY
    status = next_status(state.status, signal)
    if signal is _CLOSE:
        state = replace(
            state,
            status=status,
            since_t_s=t,
            period_used=True,
            window_light=inputs.light,
            window_phase=inputs.phase,
            window_o2_pct=inputs.o2_sat_pct,
        )
    elif signal is _FLUSH:
        state = replace(
            state,
            status=status,
            since_t_s=t,
            window_light=None,
            window_phase=None,
            window_o2_pct=None,
        )
    seen = t if inputs.o2_sat_pct is not None else state.o2_seen_t_s
    state = replace(state, phase=inputs.phase, o2_seen_t_s=seen)
    return CycleStep(state=state, signal=signal, window=window)


def end_window(state: CycleState, t_s: float, reason: WindowEnd, detail: str = "") -> CycleStep:
    """End a window from outside the tick (operator, end of the run) and flush.

    Parameters
    ----------
    state
        Current state.
    t_s
        Clock time, s.
    reason
        Why (typically OPERATOR or RUN_END).
    detail
        Words for the log.

    Returns
    -------
    CycleStep
        Open, with the flush time restarted; ``window`` is the window that ended, or None
        when the chamber was open already.
    """
    if not math.isfinite(t_s):
        raise ValueError(f"t_s must be finite, got {t_s!r}")
    window = None
    if state.status is IncubationStatus.CLOSED:
        assert state.since_t_s is not None and state.window_light is not None
        window = ClosedWindow(
            start_t_s=state.since_t_s,
            end_t_s=t_s,
            light=state.window_light,
            reason=reason,
            detail=detail,
        )
    status = next_status(state.status, _FLUSH)
    state = replace(
        state,
        status=status,
        since_t_s=t_s,
        window_light=None,
        window_phase=None,
        window_o2_pct=None,
    )
    return CycleStep(state=state, signal=_FLUSH, window=window)


def light_change_times(
    t_s: npt.ArrayLike, par: npt.ArrayLike, threshold: float
) -> npt.NDArray[np.float64]:
    """Times at which a piecewise-linear PAR schedule crosses the light threshold.

    Parameters
    ----------
    t_s
        Breakpoint times, s, non-decreasing (two equal times make a step).
    par
        PAR at the breakpoints, µmol photons m⁻² s⁻¹.
    threshold
        PAR above which it is light, µmol photons m⁻² s⁻¹.

    Returns
    -------
    numpy.ndarray
        Sorted times, s, at which "PAR above the threshold" changes: the first instant of the
        new state (a linear stretch is cut where it crosses the threshold).
    """
    t = np.asarray(t_s, dtype=np.float64)
    v = np.asarray(par, dtype=np.float64)
    if t.shape != v.shape or t.ndim != 1:
        raise ValueError("t_s and par must be 1-D arrays of equal length")
    if t.size < 2:
        return np.empty(0)
    lit = v > threshold
    flips = np.flatnonzero(lit[1:] != lit[:-1])
    t0, t1, v0, v1 = t[flips], t[flips + 1], v[flips], v[flips + 1]
    dv = v1 - v0
    frac = np.divide(threshold - v0, dv, out=np.ones_like(dv), where=dv != 0)
    crossing = t0 + np.clip(frac, 0.0, 1.0) * (t1 - t0)
    # rising through the threshold, light starts just after it: at the crossing itself the
    # value equals the threshold, which is not yet light; the next representable instant is.
    rising = lit[flips + 1]
    crossing = np.where(rising & (crossing < t1), np.nextafter(crossing, np.inf), crossing)
    return np.sort(crossing)


def cycle_table_markdown() -> str:
    """The transition table as a Markdown table (for the docs).

    Returns
    -------
    str
        One row per legal (status, signal) pair with the next status.
    """
    lines = ["| status | signal | next status |", "|---|---|---|"]
    for (status, signal), after in _TRANSITIONS.items():
        lines.append(f"| {status.value} | {signal.value} | {after.value} |")
    return "\n".join(lines) + "\n"
