"""PID in the standard (ISA) form as a pure step function, plus the small output helpers.

Rules of this module
--------------------
- Nothing here reads a clock or keeps hidden state: every call takes the previous
  :class:`PidState` and the elapsed time ``dt_s`` and returns a new state. Parameters and
  states are frozen dataclasses that validate themselves when built. The one exception is
  :class:`PidLoop`, the same step on a state kept in place for loops stepped every tick
  (its state is in plain view; :func:`pid_step` and :func:`pid_track` run on it).
- The controller is u = Kc·[b·r − y + (1/Ti)∫(r − y)dt − Td·dy_f/dt], output limited to
  [out_min, out_max] in the actuator's own physical unit (for example −100..100 % for a
  split-range heater/chiller pair, see :func:`split_range`).
- The derivative acts on the measurement only (no kick when the setpoint steps) and is
  filtered by a first-order lag of time constant Td/N.
- Anti-windup is back-calculation: while the output saturates, the integral is pulled
  toward the value that would make the unsaturated output equal the limit, with tracking
  time Tt (default √(Ti·Td), or Ti for PI control).
- Manual→auto transfer is bumpless: :func:`pid_track` keeps the integral such that the
  controller's output equals the manual output, so the first automatic step continues from it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

__all__ = [
    "PidLoop",
    "PidParams",
    "PidResult",
    "PidState",
    "pid_step",
    "pid_track",
    "rate_limit",
    "split_range",
]


_INF = math.inf


def _finite(value: float, name: str) -> float:
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return value


@dataclass(frozen=True, kw_only=True)
class PidParams:
    """Gains and limits of one loop (ISA/standard form).

    Parameters
    ----------
    kc
        Controller gain, output unit per measurement unit (for example % per °C); not 0.
        Positive for a heating loop (output rises when the measurement is below setpoint).
    ti_s
        Integral time, s, above 0; ``math.inf`` for no integral action.
    td_s
        Derivative time, s, 0 or more; 0 for no derivative action.
    out_min
        Lowest output, output unit.
    out_max
        Highest output, output unit; above ``out_min``.
    derivative_filter_n
        N of the derivative filter Td·s/(1 + Td·s/N), dimensionless, above 0; usually 8–20.
    setpoint_weight
        Proportional setpoint weight b, dimensionless, 0 or more: P = Kc·(b·r − y). 1 is the
        textbook controller; smaller values soften the response to setpoint steps.
    tracking_time_s
        Back-calculation tracking time Tt, s, above 0; default √(Ti·Td), or Ti when Td = 0.
    """

    kc: float
    ti_s: float
    td_s: float = 0.0
    out_min: float
    out_max: float
    derivative_filter_n: float = 10.0
    setpoint_weight: float = 1.0
    tracking_time_s: float | None = None

    def __post_init__(self) -> None:
        if _finite(self.kc, "kc") == 0.0:
            raise ValueError("kc must not be 0")
        if math.isnan(self.ti_s) or self.ti_s <= 0:
            raise ValueError(f"ti_s must be above 0 (inf for no integral), got {self.ti_s!r}")
        if _finite(self.td_s, "td_s") < 0:
            raise ValueError(f"td_s must not be negative, got {self.td_s!r}")
        if _finite(self.derivative_filter_n, "derivative_filter_n") <= 0:
            raise ValueError("derivative_filter_n must be above 0")
        if _finite(self.setpoint_weight, "setpoint_weight") < 0:
            raise ValueError("setpoint_weight must not be negative")
        if _finite(self.out_min, "out_min") >= _finite(self.out_max, "out_max"):
            raise ValueError(f"out_min {self.out_min!r} must be below out_max {self.out_max!r}")
        if self.tracking_time_s is not None and (
            _finite(self.tracking_time_s, "tracking_time_s") <= 0
        ):
            raise ValueError("tracking_time_s must be above 0")

    @cached_property
    def has_integral(self) -> bool:
        """Whether the loop integrates (finite Ti)."""
        return math.isfinite(self.ti_s)

    @cached_property
    def tt_s(self) -> float:
        """Back-calculation tracking time Tt, s."""
        if self.tracking_time_s is not None:
            return self.tracking_time_s
        if self.td_s > 0 and self.has_integral:
            return math.sqrt(self.ti_s * self.td_s)
        return self.ti_s

    def clamp(self, value: float) -> float:
        """Limit ``value`` (output unit) to [out_min, out_max]."""
        return min(self.out_max, max(self.out_min, value))


@dataclass(frozen=True, kw_only=True)
class PidState:
    """What a loop remembers between steps.

    Parameters
    ----------
    integral
        Integral term I to use at the next step, output unit (for P/PD loops: the bias).
    derivative
        Filtered derivative term D of the last step, output unit.
    last_measured
        Measurement of the last step, measurement unit; None before the first step.
    last_output
        Output of the last step, output unit; None before the first step.
    """

    integral: float = 0.0
    derivative: float = 0.0
    last_measured: float | None = None
    last_output: float | None = None


@dataclass(frozen=True, kw_only=True)
class PidResult:
    """One step's outcome; ``p + i + d`` is the output before limiting.

    Parameters
    ----------
    state
        State for the next step.
    output
        Output after limiting, output unit.
    p
        Proportional term, output unit.
    i
        Integral term used in this step, output unit.
    d
        Filtered derivative term, output unit.
    saturated
        Whether the output was limited.
    """

    state: PidState
    output: float
    p: float
    i: float
    d: float
    saturated: bool


def _derivative(
    params: PidParams,
    derivative: float,
    last_measured: float | None,
    measured: float,
    dt_s: float,
) -> float:
    """Filtered derivative on the measurement, backward difference (stable for any dt)."""
    if params.td_s == 0.0 or last_measured is None:
        return 0.0
    denom = params.td_s + params.derivative_filter_n * dt_s
    keep = params.td_s / denom
    gain = params.kc * params.td_s * params.derivative_filter_n / denom
    return keep * derivative - gain * (measured - last_measured)


def _check_inputs(measured: float, setpoint: float, dt_s: float) -> None:
    if math.isfinite(measured) and math.isfinite(setpoint) and math.isfinite(dt_s) and dt_s > 0:
        return
    _finite(measured, "measured")
    _finite(setpoint, "setpoint")
    raise ValueError(f"dt_s must be finite and above 0, got {dt_s!r}")


class PidLoop:
    """One loop's memory kept in place, for a runtime that steps many loops every tick.

    :func:`pid_step` and :func:`pid_track` are built on it, so the arithmetic and the input
    checks are the same; only the bookkeeping differs: the state is updated in place instead
    of a new :class:`PidState` and :class:`PidResult` being built per step.

    Parameters
    ----------
    params
        Gains and limits (validated when they were built).
    state
        State to start from, default ``PidState()``.

    Attributes
    ----------
    integral, derivative, last_measured, last_output
        As the fields of :class:`PidState` (output unit; measurement unit; None before the
        first step).

    Notes
    -----
    The gains and limits a step reads are copied from ``params`` once, here. ``params`` is
    frozen and :attr:`params` cannot be replaced, so the copies cannot go stale. The integral
    gain Kc·h/Ti and the back-calculation factor e^{−h/Tt} − 1 are kept for the latest step
    length h and recomputed whenever a step comes with another one.
    """

    __slots__ = (
        "_back",
        "_dt_s",
        "_gain_i",
        "_has_integral",
        "_kc",
        "_no_derivative",
        "_out_max",
        "_out_min",
        "_p",
        "_params",
        "_setpoint_weight",
        "_ti_s",
        "_tt_s",
        "derivative",
        "integral",
        "last_measured",
        "last_output",
    )

    def __init__(self, params: PidParams, state: PidState | None = None) -> None:
        state = PidState() if state is None else state
        self._params = params
        self._kc, self._setpoint_weight = params.kc, params.setpoint_weight
        self._ti_s, self._tt_s = params.ti_s, params.tt_s
        self._out_min, self._out_max = params.out_min, params.out_max
        self._has_integral = params.has_integral
        self._dt_s = math.nan  # step length the two factors below are for (none yet), s
        self._gain_i = self._back = 0.0  # Kc·h/Ti (output unit per measurement unit), e^{−h/Tt} − 1
        self.integral = state.integral
        self.derivative = state.derivative
        self.last_measured = state.last_measured
        self.last_output = state.last_output
        self._no_derivative = params.td_s == 0.0
        self._p = 0.0  # P term of the latest track, output unit

    @property
    def params(self) -> PidParams:
        """Gains and limits (read-only)."""
        return self._params

    @property
    def state(self) -> PidState:
        """The memory as a :class:`PidState` (output and measurement units)."""
        return PidState(
            integral=self.integral,
            derivative=self.derivative,
            last_measured=self.last_measured,
            last_output=self.last_output,
        )

    def step(self, measured: float, setpoint: float, dt_s: float) -> float:
        """One automatic step, as :func:`pid_step`.

        Parameters
        ----------
        measured
            Process value y, measurement unit.
        setpoint
            Setpoint r, measurement unit.
        dt_s
            Time since the previous step, s, above 0.

        Returns
        -------
        float
            Output after limiting, output unit.
        """
        error = setpoint - measured
        # one test for the usual case: 0·x is 0 only for a finite x, so this fails for any
        # non-finite input (or an overflowing product); the checks name the bad input then
        if not (error * dt_s * 0.0 == 0.0 and dt_s > 0.0):
            _check_inputs(measured, setpoint, dt_s)
        p = self._kc * (self._setpoint_weight * setpoint - measured)
        if self._no_derivative or self.last_measured is None:
            d = 0.0
        else:
            d = _derivative(self._params, self.derivative, self.last_measured, measured, dt_s)
        i = self.integral
        v = p + i + d
        u = self._out_max if v > self._out_max else self._out_min if v < self._out_min else v
        if self._has_integral:
            if dt_s != self._dt_s:
                self._dt_s = dt_s
                self._gain_i = self._kc * dt_s / self._ti_s
                self._back = math.expm1(-dt_s / self._tt_s)
            i = i + self._gain_i * error - self._back * (u - v)
        self.integral, self.derivative = i, d
        self.last_measured, self.last_output = measured, u
        return u

    def track(self, manual_output: float, measured: float, setpoint: float, dt_s: float) -> float:
        """Follow a manual output, as :func:`pid_track`.

        Parameters
        ----------
        manual_output
            Output applied, output unit; limited to the range.
        measured
            Process value y, measurement unit.
        setpoint
            Setpoint r that automatic mode will use, measurement unit.
        dt_s
            Time since the previous sample, s, above 0.

        Returns
        -------
        float
            The limited manual output, output unit.
        """
        _check_inputs(manual_output, setpoint, dt_s)
        _finite(measured, "measured")
        params = self._params
        u = params.clamp(manual_output)
        p = params.kc * (params.setpoint_weight * setpoint - measured)
        d = _derivative(params, self.derivative, self.last_measured, measured, dt_s)
        self.integral, self.derivative = u - p - d, d
        self.last_measured, self.last_output = measured, u
        self._p = p
        return u


def pid_step(
    state: PidState, params: PidParams, measured: float, setpoint: float, dt_s: float
) -> PidResult:
    """Advance the controller by one sample in automatic mode.

    Parameters
    ----------
    state
        State returned by the previous step (``PidState()`` to start).
    params
        Gains and limits.
    measured
        Process value y, measurement unit (for example °C).
    setpoint
        Setpoint r, measurement unit.
    dt_s
        Time since the previous step, s, above 0.

    Returns
    -------
    PidResult
        New state, limited output (output unit) and the P, I and D terms (output unit).

    Notes
    -----
    Discretisation after Åström & Hägglund (*Advanced PID Control*, 2006, ch. 3, from
    memory): P is evaluated directly; D by backward difference of the filtered derivative,
    D_k = Td/(Td + N·h)·D_{k−1} − Kc·Td·N/(Td + N·h)·(y_k − y_{k−1}); I by forward Euler,
    I_{k+1} = I_k + Kc·h/Ti·e_k + (1 − e^{−h/Tt})·(u_k − v_k), where v is the output before
    and u after limiting. The back-calculation term is written as a first-order lag so that
    a step longer than Tt never overshoots the tracking target.
    """
    loop = PidLoop(params, state)
    u = loop.step(measured, setpoint, dt_s)
    p = params.kc * (params.setpoint_weight * setpoint - measured)  # as the step took it
    return PidResult(
        state=loop.state,
        output=u,
        p=p,
        i=state.integral,
        d=loop.derivative,
        saturated=u != p + state.integral + loop.derivative,
    )


def pid_track(
    state: PidState,
    params: PidParams,
    manual_output: float,
    measured: float,
    setpoint: float,
    dt_s: float,
) -> PidResult:
    """Follow a manual output so that switching to automatic is bumpless.

    Call this every sample while the loop is in manual; the first :func:`pid_step` after it
    starts from the manual output (exactly, when the measurement has not moved).

    Parameters
    ----------
    state
        Previous state.
    params
        Gains and limits.
    manual_output
        Output the operator (or a safe state) applies, output unit; limited to the range.
    measured
        Process value y, measurement unit.
    setpoint
        Setpoint r that automatic mode will use, measurement unit.
    dt_s
        Time since the previous sample, s, above 0.

    Returns
    -------
    PidResult
        New state, the (limited) manual output, and the P, I and D terms behind it.
    """
    loop = PidLoop(params, state)
    u = loop.track(manual_output, measured, setpoint, dt_s)
    return PidResult(
        state=loop.state,
        output=u,
        p=loop._p,
        i=loop.integral,
        d=loop.derivative,
        saturated=u != manual_output,
    )


def split_range(u_pct: float, deadband_pct: float = 2.0) -> tuple[float, float]:
    """Split one signed controller output into heater and chiller drives.

    Parameters
    ----------
    u_pct
        Controller output, %, −100 (full cooling) to 100 (full heating); clipped to that.
    deadband_pct
        Half-width of the band around 0 where both stay off, %, 0 to below 100. It keeps the
        heater and chiller from fighting each other near zero demand.

    Returns
    -------
    tuple of float
        ``(heater_pct, chiller_pct)``, each 0–100 %, never both above 0. Outside the dead
        band each drive rises linearly from 0 at the band edge to 100 at ±100 %, so the map
        is continuous.
    """
    u, db = float(u_pct), float(deadband_pct)
    if not (math.isfinite(u) and 0.0 <= db < 100.0):  # one test for the usual case
        _finite(u, "u_pct")
        _finite(db, "deadband_pct")
        raise ValueError(f"deadband_pct must be in [0, 100), got {deadband_pct!r}")
    u = -100.0 if u < -100.0 else 100.0 if u > 100.0 else u
    if u > db:
        return min(100.0, 100.0 * (u - db) / (100.0 - db)), 0.0
    if u < -db:
        return 0.0, min(100.0, 100.0 * (-u - db) / (100.0 - db))
    return 0.0, 0.0


def rate_limit(prev_sp: float, target_sp: float, max_rate_per_s: float, dt_s: float) -> float:
    """Move a setpoint toward its target no faster than a ramp limit.

    Parameters
    ----------
    prev_sp
        Setpoint applied at the previous step, setpoint unit (for example °C).
    target_sp
        Setpoint wanted now, setpoint unit.
    max_rate_per_s
        Fastest allowed change, setpoint unit per s, 0 or more (``math.inf``: no limit).
        A chamber's ``max_ramp_c_per_h`` becomes ``max_ramp_c_per_h / 3600``.
    dt_s
        Time since the previous step, s, 0 or more.

    Returns
    -------
    float
        The setpoint to apply now, setpoint unit.
    """
    prev_sp, target_sp = float(prev_sp), float(target_sp)
    if not (
        math.isfinite(prev_sp)
        and math.isfinite(target_sp)
        and max_rate_per_s >= 0
        and math.isfinite(dt_s)
        and dt_s >= 0
    ):  # one test for the usual case; the messages below say which input is wrong
        _finite(prev_sp, "prev_sp")
        _finite(target_sp, "target_sp")
        if math.isnan(max_rate_per_s) or max_rate_per_s < 0:
            raise ValueError(f"max_rate_per_s must be 0 or more, got {max_rate_per_s!r}")
        if _finite(dt_s, "dt_s") < 0:
            raise ValueError(f"dt_s must not be negative, got {dt_s!r}")
    step = max_rate_per_s * dt_s if dt_s > 0 else 0.0
    return prev_sp + max(-step, min(step, target_sp - prev_sp))
