"""The decider's memory of each protocol chamber, thermal node and actuator, with the settings
each tick reads taken once from the (frozen) control plan.

Rule: plain mutable holders for :class:`~controller.runtime.Decider`, which alone changes
them; an actuator computes its drive here (feed-forward on its curve plus its PI trim).
"""

from __future__ import annotations

import math
from bisect import bisect_right

from controller.control import (
    CycleState,
    InterlockMemory,
    Outputs,
    PidLoop,
    PidParams,
    TimeProportionState,
)
from controller.rig import DriveCurve
from controller.runtime._settings import ChamberSettings, NodeSettings

__all__ = ["Actuator", "ChamberMemory", "NodeMemory", "PiGains"]


class PiGains:
    """Base of the decider's holders of a loop stepped every tick: the gains and limits of
    the loop, taken once from its frozen parameters, for a PI step written out there.

    The step, :meth:`pi_step` (used by :meth:`Actuator.drive` and the decider's node
    step), is :meth:`PidLoop.step`'s arithmetic without the derivative term, on the loop's
    own state. The gains sit on the holder itself (no object of their own to reach every
    tick). The integral gain Kc·h/Ti and the back-calculation factor e^{−h/Tt} − 1 are kept
    for the latest step length h and renewed (:meth:`renew`) whenever a step comes with
    another one, as the loop keeps them;
    the parameters are frozen, so nothing else can make them stale.

    Attributes
    ----------
    pi
        Whether the loop is stepped written out: it exists and has no derivative action
        (else :meth:`PidLoop.step` steps it).
    kc, setpoint_weight
        Controller gain (output unit per measurement unit) and setpoint weight b
        (dimensionless).
    out_min, out_max
        Output limits, output unit.
    has_integral
        Whether the loop integrates.
    pi_dt_s
        Step length the two factors below are for, s (NaN before the first step).
    gain_i, back
        Kc·h/Ti (output unit per measurement unit) and e^{−h/Tt} − 1 (dimensionless).
    """

    __slots__ = (
        "back",
        "gain_i",
        "has_integral",
        "kc",
        "out_max",
        "out_min",
        "pi",
        "pi_dt_s",
        "setpoint_weight",
        "ti_s",
        "tt_s",
    )

    def _take_gains(self, params: PidParams | None) -> None:
        """Take the gains of the loop (None: no loop)."""
        self.pi = params is not None and params.td_s == 0.0
        if params is None:
            params = _NO_LOOP
        self.kc, self.setpoint_weight = params.kc, params.setpoint_weight
        self.ti_s, self.tt_s = params.ti_s, params.tt_s
        self.out_min, self.out_max = params.out_min, params.out_max
        self.has_integral = params.has_integral
        self.pi_dt_s = math.nan
        self.gain_i = self.back = 0.0

    def renew(self, dt_s: float) -> None:
        """Compute the integral gain and back-calculation factor for a new step length.

        Parameters
        ----------
        dt_s
            Step length, s.
        """
        self.pi_dt_s = dt_s
        self.gain_i = self.kc * dt_s / self.ti_s
        self.back = math.expm1(-dt_s / self.tt_s)

    def pi_step(self, loop: PidLoop, measured: float, setpoint: float, dt_s: float) -> float:
        """Step ``loop`` as ``loop.step(measured, setpoint, dt_s)`` does, written out when the
        loop has no derivative action (:attr:`pi`).

        Parameters
        ----------
        loop
            The loop's state (its memory is updated in place).
        measured
            Measurement, measurement unit.
        setpoint
            Setpoint, measurement unit.
        dt_s
            Time since the last step, s.

        Returns
        -------
        float
            The controller output, output unit, bit for bit what :meth:`PidLoop.step` gives.
        """
        error = setpoint - measured
        if not (self.pi and error * dt_s * 0.0 == 0.0 and dt_s > 0.0):
            # derivative action, or an input the step names (or an overflowing error)
            return loop.step(measured, setpoint, dt_s)
        # (the test above is the step's own test for finite inputs)
        p = self.kc * (self.setpoint_weight * setpoint - measured)
        i = loop.integral
        v = p + i + 0.0  # + D, which is 0.0: the same sum bit for bit (−0.0 → 0.0)
        high, low = self.out_max, self.out_min
        u = high if v > high else low if v < low else v
        if self.has_integral:
            if dt_s != self.pi_dt_s:
                self.renew(dt_s)
            i = i + self.gain_i * error - self.back * (u - v)
        loop.integral, loop.derivative = i, 0.0
        loop.last_measured, loop.last_output = measured, u
        return u


_NO_LOOP = PidParams(kc=1.0, ti_s=math.inf, out_min=0.0, out_max=1.0)
"""Gains a holder without a loop carries (never used: its ``pi`` is False)."""


class ChamberMemory:
    """One protocol chamber: its settings, taken from the (frozen) plan once, and the loop's
    memory of it (interlocks, lamp and pump trims, write result, forced outputs, cycle) and
    this tick's lamp and pump drives."""

    __slots__ = (
        "cycle",
        "driver",
        "force",
        "interlock",
        "lamp",
        "lamp_pct",
        "limits",
        "name",
        "node",
        "pump",
        "pump_pct",
        "write_ok",
    )

    def __init__(self, name: str, settings: ChamberSettings, cycles: bool, driver: bool) -> None:
        self.name = name
        self.limits = settings.interlocks
        self.driver = driver  # whether its module carries its node's heater and chiller
        self.node: NodeMemory  # set by the node that holds it
        self.interlock = InterlockMemory(settings.interlocks)
        self.lamp = Actuator(settings.lamp_curve, settings.lamp_trim)
        self.pump = Actuator(settings.pump_curve, settings.flow_trim)
        # this tick's lamp and pump drives, %
        self.lamp_pct = 0.0
        self.pump_pct = 0.0
        self.write_ok = True
        self.force: Outputs | None = None
        self.cycle = CycleState() if cycles else None


class NodeMemory(PiGains):
    """One thermal node: its settings, taken from the plan once, and its loop's memory."""

    __slots__ = (
        "chiller",
        "cycle",
        "heater",
        "heater_on_off",
        "lone",
        "members",
        "output_pct",
        "pid",
        "probes",
        "ramp_per_s",
        "setpoint_c",
        "settings",
        "shown_setpoint_c",
    )

    def __init__(self, settings: NodeSettings, members: tuple[ChamberMemory, ...]) -> None:
        self.settings = settings
        self.members = members
        self.probes = tuple(  # each chamber with its probe's plausible range, °C
            (c.name, c.limits.sensor_min_c, c.limits.sensor_max_c) for c in members
        )
        self.lone = self.probes[0] if len(members) == 1 else None  # a chamber's own water
        self.ramp_per_s = settings.max_ramp_c_per_h / 3600.0  # °C s⁻¹
        self.heater_on_off = settings.heater_on_off
        self.pid = PidLoop(settings.pid)
        self._take_gains(settings.pid)
        self.setpoint_c: float | None = None
        self.output_pct = 0.0
        self.cycle = TimeProportionState()
        # this tick's decision: heater and chiller drives (%) and the setpoint shown (°C)
        self.heater = 0.0
        self.chiller = 0.0
        self.shown_setpoint_c: float | None = None


class Actuator(PiGains):
    """A lamp or pump: its drive curve, its PI trim (None: open loop) and the feed-forward
    drive of the latest setpoint.

    That drive is kept with the setpoint it was computed for and recomputed whenever the
    setpoint differs. The curve's segments are taken once for the measured side (start and
    differences, as :meth:`DriveCurve.equivalent_drive` computes them); the curve is frozen
    and never replaced, so neither can go stale.

    A trim without derivative action (every trim the plan builds) is stepped here, in
    :meth:`drive`: :meth:`PidLoop.step`'s arithmetic and state updates on :attr:`trim`,
    written out without the derivative term, with the gains it holds as a :class:`PiGains`.
    """

    __slots__ = (
        "_drive",
        "_edge",
        "_last",
        "_line",
        "_segments",
        "_setpoint",
        "_values",
        "curve",
        "trim",
    )

    def __init__(self, curve: DriveCurve, trim: PidParams | None) -> None:
        self.curve = curve
        self.trim = None if trim is None else PidLoop(trim)
        self._setpoint = math.nan  # equal to no setpoint: the first one computes its drive
        self._drive = 0.0
        xs, ys = curve.value, curve.drive_pct
        self._values, self._last = xs, len(xs) - 1  # quantity's unit; index of the last point
        # segment k (from point k − 1 to point k; 0 repeats 1): x0, y0, y1 − y0, x1 − x0
        # (quantity's unit, %, %, quantity's unit)
        segments = [
            (xs[k - 1], ys[k - 1], ys[k] - ys[k - 1], xs[k] - xs[k - 1]) for k in range(1, len(xs))
        ]
        self._segments = (segments[0], *segments)
        self._line = segments[0] if len(segments) == 1 else None  # a straight line's segment
        self._edge = ys[0]  # the dead band's edge: the least drive a setpoint above 0 gets, %
        self._take_gains(trim)

    def equivalent_drive(self, measured: float) -> float:
        """:meth:`DriveCurve.equivalent_drive` of the actuator's curve, the same numbers.

        Parameters
        ----------
        measured
            Quantity (its unit).

        Returns
        -------
        float
            Drive, %, not clipped.
        """
        last = self._last
        if last == 1:  # a straight line: its one segment, whichever side the value is
            k = 1
        else:
            k = bisect_right(self._values, measured)
            k = 1 if k < 1 else last if k > last else k
        x0, y0, dy, dx = self._segments[k]
        return y0 + (measured - x0) * dy / dx

    def drive(self, setpoint: float | None, measured: float | None, dt_s: float) -> float:
        """Drive, %: the curve's feed-forward for the setpoint plus the PI trim on the sensor,
        both in % of drive (a reading goes through the curve only when the trim uses it).

        Parameters
        ----------
        setpoint
            PAR (µmol photons m⁻² s⁻¹) or flow (cm s⁻¹) wanted, or None (uncontrolled: off).
        measured
            The sensor's reading in the same unit, or None.
        dt_s
            Time since the previous tick, s.

        Returns
        -------
        float
            Drive, %, 0–100.
        """
        if setpoint is None or setpoint <= 0.0:  # the curve gives 0 % for these
            return 0.0
        if setpoint != self._setpoint:
            # self.curve.drive_for(setpoint) (the setpoint is above 0), on the kept segments
            drive = self.equivalent_drive(setpoint)
            drive = drive if drive > self._edge else self._edge  # min(100, max(edge, drive))
            self._setpoint, self._drive = setpoint, drive if drive < 100.0 else 100.0
        drive = self._drive
        if drive <= 0.0:
            return 0.0
        trim = self.trim
        if trim is None:
            correction = 0.0
        elif measured is None:
            correction = trim.last_output or 0.0
        else:
            # self.equivalent_drive(measured), written out
            line = self._line
            if line is None:
                last = self._last
                k = bisect_right(self._values, measured)
                k = 1 if k < 1 else last if k > last else k
                x0, y0, dy, dx = self._segments[k]
            else:
                x0, y0, dy, dx = line
            equivalent = y0 + (measured - x0) * dy / dx
            correction = self.pi_step(trim, equivalent, drive, dt_s)
        drive = 100.0 * (drive + correction) / 100.0
        drive = drive if drive > 0.0 else 0.0  # min(100, max(0, drive)) without the calls
        return drive if drive < 100.0 else 100.0
