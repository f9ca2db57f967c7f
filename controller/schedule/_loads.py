"""Loads an experiment puts on shared resources over time: heat demand of each thermal node,
electrical power of each lamp (pure: numbers in, numbers out).

Rules
-----
- Heat demand of a thermal node (a bath, or a chamber with its own water) to follow its
  temperature program T(t) (°C):

      P(t) = UA·(T − T_room) + C·dT/dt + Σ_chambers ρcp·q(t)·(T − T_inflow)      (W)

  positive = heating, negative = cooling. ``UA`` (W K⁻¹) is the node's thermal description
  (``[baths.thermal]`` or ``[chambers.sim.thermal]``, defaults when absent, as the simulator
  does); C = ρcp·V (J K⁻¹) with V the node's water: a bath's own water plus the water of every
  chamber in it, or the chamber's water. ρcp (J L⁻¹ K⁻¹) is from TEOS-10 (gsw
  ``rho_t_exact`` × ``cp_t_exact`` at sea pressure 0) at the node's salinity and the middle
  of its program; between 5 and 35 °C it changes by less than 0.5 % (from gsw at S = 32), so
  one value per node is used. The flushing term is the fresh water the pump brings in,
  q = flush_at_full_drive × flow/flow_at_full_drive (the pump model of the rig's
  ``[chambers.sim.pump]`` table), counted as if the incubation were always open, the largest
  demand. Heat from lamps and pumps into the water is ignored: it is a few W per chamber,
  small beside the terms above, and it only adds to cooling and helps heating.
- At its start a node's water is taken to be at room temperature (between runs a rack is
  held safe, heaters and chillers off) and is brought to T(0) at the node's fastest ramp
  (``limits.max_ramp_c_per_h`` of its slowest chamber); an instant step in the program is
  followed the same way. Such a stretch needs C × ramp on top of the other terms (their UA
  part is taken at the programmed temperature, which the water reaches at the stretch's end).
- A node whose temperature is uncontrolled in the protocol draws nothing (its heater and
  chiller stay off); so do nodes the experiment does not use.
- Lamp power: rated_w × drive/100 per chamber, with the drive the runtime gives for the PAR
  asked: from the lamp's measured curve (``[chambers.lamp] drive_pct_par``, interpolated and
  held between the dead band's edge and 100 %) when the rig has one, else PAR/max_par (the
  straight line the runtime uses then). The electrical power is taken to be proportional to
  the drive (dimmed LED drivers come close; common practice); for a lamp whose light
  saturates with drive but has no measured curve, the straight line overestimates the drive,
  so the check errs on the safe side. Where PAR crosses a point of the curve is a breakpoint
  of the grid, so each lamp's power is linear between grid instants.
- Grid that cannot miss a peak (:func:`load_grid`): every load is linear between the union of
  all breakpoints (programs, ramp-follow stretches, starts and ends), except the flushing
  term where flow and temperature change together: a product of two lines, a parabola. Such
  intervals are split until each node's chord is within ``tol_w`` of the parabola (a
  parabola's largest distance from its chord is at the middle, and n equal pieces divide it
  by n²). On each piece every node's demand is then a line (to within ``tol_w``), and what a
  plant must give, Σ max(±P, 0) over its nodes, a convex function of time, so its largest
  value on the piece lies at one of the piece's ends. Both one-sided values are taken at
  every instant of the grid, so steps are seen from both sides.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING, Literal

import numpy as np
import numpy.typing as npt

from controller.schedule._models import Booking

if TYPE_CHECKING:
    from controller.protocol import Channel, CompiledProtocol
    from controller.rig import Chamber, Rig

__all__ = [
    "LampLoad",
    "NodeLoad",
    "Side",
    "lamp_loads",
    "load_grid",
    "node_demand_w",
    "node_loads",
    "sides",
    "water_rho_cp_j_l_k",
]

FloatArray = npt.NDArray[np.float64]
Side = Literal["left", "right"]
_EPS_C = 1e-9


def water_rho_cp_j_l_k(salinity: float, temp_c: float) -> float:
    """Volumetric heat capacity of seawater, J L⁻¹ K⁻¹.

    Parameters
    ----------
    salinity
        Practical salinity (PSS-78), dimensionless.
    temp_c
        In-situ temperature (ITS-90), °C.

    Returns
    -------
    float
        ρ·cp at sea pressure 0, J L⁻¹ K⁻¹.

    References
    ----------
    IOC, SCOR and IAPSO (2010), The international thermodynamic equation of seawater – 2010
    (TEOS-10), through gsw ``SR_from_SP``, ``rho_t_exact`` and ``cp_t_exact``.
    """
    import gsw

    sr = gsw.SR_from_SP(salinity)
    return float(gsw.rho_t_exact(sr, temp_c, 0.0) * gsw.cp_t_exact(sr, temp_c, 0.0) / 1000.0)


def sides(channel: Channel, x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """One-sided values and slopes of a piecewise-linear channel.

    Parameters
    ----------
    channel
        Breakpoint table (s, channel unit); right-continuous at steps.
    x
        Times, s from the channel's zero.

    Returns
    -------
    tuple of numpy.ndarray
        Left limit and right value (channel unit), then the slopes of the stretches ending
        and starting at each time (channel unit per s; 0 outside the table).
    """
    t, v = channel.t_s, channel.v
    n = t.size
    out: dict[str, tuple[FloatArray, FloatArray]] = {}
    for side in ("left", "right"):
        i = np.searchsorted(t, x, side=side)  # type: ignore[call-overload]
        inside = (i > 0) & (i < n)
        k = np.clip(i - 1, 0, n - 1)
        j = np.clip(i, 0, n - 1)
        span = np.where(inside, t[j] - t[k], 1.0)
        slope = np.where(inside, (v[j] - v[k]) / span, 0.0)
        value = np.where(i == 0, v[0], np.where(i == n, v[-1], v[k] + slope * (x - t[k])))
        out[side] = (value, slope)
    return out["left"][0], out["right"][0], out["left"][1], out["right"][1]


def _active(x: FloatArray, t0: float, t1: float, side: Side) -> npt.NDArray[np.bool_]:
    return (x > t0) & (x <= t1) if side == "left" else (x >= t0) & (x < t1)


@dataclass(frozen=True)
class NodeLoad:
    """Heat demand of one thermal node while one booking runs it (see the module rules).

    Attributes
    ----------
    node
        Node id (bath id, or chamber id) (no unit).
    booking
        The booking that runs it (no unit).
    chambers
        The booking's chambers in the node.
    t0_s, t1_s
        The booking's span, epoch s.
    temperature
        The node's program, s from the booking's start to °C.
    ua_w_k
        Heat-loss coefficient to the room, W K⁻¹.
    c_j_k
        Heat capacity of the node's water, J K⁻¹.
    room_c, inflow_c
        Room and flushing-water temperature, °C.
    heater_max_w, chiller_max_w
        What the node's own heater and chiller give, W.
    flushes
        Flow channel (cm s⁻¹) of each flushed chamber and its W K⁻¹ per cm s⁻¹.
    follows
        Ramp-follow stretches: start and end (s from the booking start) and power, W.
    """

    node: str
    booking: Booking
    chambers: tuple[str, ...]
    t0_s: float
    t1_s: float
    temperature: Channel
    ua_w_k: float
    c_j_k: float
    room_c: float
    inflow_c: float
    heater_max_w: float
    chiller_max_w: float
    flushes: tuple[tuple[Channel, float], ...]
    follows: tuple[tuple[float, float, float], ...]

    @property
    def is_bath(self) -> bool:
        """Whether the node is a shared bath (not a chamber's own water)."""
        return self.chambers != (self.node,)

    def breakpoints(self) -> FloatArray:
        """Instants where a term changes course, epoch s."""
        parts = [self.temperature.t_s] + [flow.t_s for flow, _ in self.flushes]
        parts += [np.array([a, b]) for a, b, _ in self.follows]
        rel = np.concatenate(parts)
        rel = rel[(rel > 0.0) & (rel < self.t1_s - self.t0_s)]
        return np.concatenate(([self.t0_s, self.t1_s], self.t0_s + rel))

    def watts(self, x: FloatArray, side: Side) -> FloatArray:
        """Demand at epoch times ``x`` (s) seen from one side, W (+ heating, − cooling)."""
        rel = x - self.t0_s
        left, right, slope_left, slope_right = sides(self.temperature, rel)
        temp, slope = (left, slope_left) if side == "left" else (right, slope_right)
        power = self.ua_w_k * (temp - self.room_c) + self.c_j_k * slope
        for flow, g_w_k in self.flushes:
            f_left, f_right, _, _ = sides(flow, rel)
            power += g_w_k * (f_left if side == "left" else f_right) * (temp - self.inflow_c)
        for a, b, watts in self.follows:
            power += np.where(_active(rel, a, b, side), watts, 0.0)
        return np.where(_active(x, self.t0_s, self.t1_s, side), power, 0.0)


@dataclass(frozen=True)
class LampLoad:
    """Electrical power of one chamber's lamp while one booking runs it.

    Attributes
    ----------
    chamber
        Chamber id (no unit).
    booking
        The booking that runs it (no unit).
    t0_s, t1_s
        The booking's span, epoch s.
    par
        PAR program, s from the booking's start to µmol photons m⁻² s⁻¹.
    rated_w
        Electrical power at 100 % drive, W.
    curve_par, curve_drive_pct
        The lamp's drive curve: PAR (µmol photons m⁻² s⁻¹) and drive (%) of each point,
        rising (the measured table, or the straight line to ``limits.max_par``).
    """

    chamber: str
    booking: Booking
    t0_s: float
    t1_s: float
    par: Channel
    rated_w: float
    curve_par: tuple[float, ...]
    curve_drive_pct: tuple[float, ...]

    def drive_pct(self, par: FloatArray) -> FloatArray:
        """Drive the runtime gives for PAR setpoints, % (as ``DriveCurve.drive_for``).

        Parameters
        ----------
        par
            PAR setpoints, µmol photons m⁻² s⁻¹.

        Returns
        -------
        numpy.ndarray
            0 for PAR of 0 or less, else interpolated on the curve (straight beyond its
            ends) and held between the curve's first drive and 100 %, %.
        """
        xs, ys = np.array(self.curve_par), np.array(self.curve_drive_pct)
        k = np.clip(np.searchsorted(xs, par, side="right"), 1, xs.size - 1)
        drive = ys[k - 1] + (par - xs[k - 1]) * (ys[k] - ys[k - 1]) / (xs[k] - xs[k - 1])
        return np.where(par <= 0.0, 0.0, np.clip(drive, ys[0], 100.0))

    def breakpoints(self) -> FloatArray:
        """Instants where the power changes course, epoch s: the program's breakpoints and
        where PAR crosses a point of the drive curve."""
        t, v = self.par.t_s, self.par.v
        crossings = []
        for level in self.curve_par:
            d0, d1 = v[:-1] - level, v[1:] - level
            cross = (d0 * d1 < 0) & (t[1:] > t[:-1])
            crossings.append(
                t[:-1][cross] + d0[cross] / (d0[cross] - d1[cross]) * (t[1:][cross] - t[:-1][cross])
            )
        rel = np.concatenate([t, *crossings])
        rel = rel[(rel > 0.0) & (rel < self.t1_s - self.t0_s)]
        return np.concatenate(([self.t0_s, self.t1_s], self.t0_s + rel))

    def watts(self, x: FloatArray, side: Side) -> FloatArray:
        """Power at epoch times ``x`` (s) seen from one side, W."""
        left, right, _, _ = sides(self.par, x - self.t0_s)
        power = self.rated_w / 100.0 * self.drive_pct(left if side == "left" else right)
        return np.where(_active(x, self.t0_s, self.t1_s, side), power, 0.0)


def node_loads(bookings: Sequence[Booking], rig: Rig) -> list[NodeLoad]:
    """Heat-demand models of every thermal node each compiled booking runs.

    Parameters
    ----------
    bookings
        Bookings (those without a compiled protocol are skipped) (no unit).
    rig
        The rig (no unit).

    Returns
    -------
    list of NodeLoad
        In booking order, then rig order (no unit).
    """
    from controller.rig import ThermalSim

    room = rig.sim.room_temperature_c
    inflow = room if rig.sim.inflow_temperature_c is None else rig.sim.inflow_temperature_c
    loads: list[NodeLoad] = []
    for booking in bookings:
        compiled = booking.compiled
        if compiled is None:
            continue
        for node, members in rig.thermal_nodes().items():
            mine = [rig.chamber(c) for c in members if c in compiled.group_of]
            if not mine:
                continue
            temperature = compiled.channels[mine[0].id].get("temperature_c")
            if temperature is None:
                continue
            bath = rig.bath(mine[0].bath) if mine[0].bath is not None else None
            if mine[0].bath is None:
                thermal, own_l, salinity = (
                    mine[0].sim.thermal or ThermalSim(),
                    0.0,
                    mine[0].salinity,
                )
            elif bath is None:  # a bath named but not described: defaults, no water of its own
                thermal, own_l, salinity = ThermalSim(), 0.0, mine[0].salinity
            else:
                thermal, own_l, salinity = bath.thermal, bath.water_volume_l, bath.salinity
            volume_l = own_l + sum(rig.chamber(c).water_volume_l for c in members)
            middle_c = float(temperature.v.min() + temperature.v.max()) / 2.0
            rho_cp = water_rho_cp_j_l_k(salinity, middle_c)
            loads.append(
                NodeLoad(
                    node=node,
                    booking=booking,
                    chambers=tuple(c.id for c in mine),
                    t0_s=booking.start_utc.timestamp(),
                    t1_s=booking.end_utc.timestamp(),
                    temperature=temperature,
                    ua_w_k=thermal.ua_w_k,
                    c_j_k=rho_cp * volume_l,
                    room_c=room,
                    inflow_c=inflow,
                    heater_max_w=thermal.heater_max_w,
                    chiller_max_w=thermal.chiller_max_w,
                    flushes=_flushes(compiled, mine, rho_cp),
                    follows=_follows(temperature, room, rho_cp * volume_l, mine),
                )
            )
    return loads


def _flushes(
    compiled: CompiledProtocol, chambers: Sequence[Chamber], rho_cp: float
) -> tuple[tuple[Channel, float], ...]:
    result: list[tuple[Channel, float]] = []
    for chamber in chambers:
        flow = compiled.channels[chamber.id].get("flow_cm_s")
        pump = chamber.sim.pump
        full = pump.flow_at_full_drive_cm_s
        full = chamber.limits.max_flow_cm_s if full is None else full
        if flow is None or full <= 0.0:
            continue
        result.append((flow, pump.flush_at_full_drive_l_h / 3600.0 / full * rho_cp))
    return tuple(result)


def _follows(
    temperature: Channel, room_c: float, c_j_k: float, chambers: Sequence[Chamber]
) -> tuple[tuple[float, float, float], ...]:
    rate_c_s = min(c.limits.max_ramp_c_per_h for c in chambers) / 3600.0
    times, sizes = temperature.steps()
    starts = [0.0, *times.tolist()]
    jumps = [float(temperature.v[0]) - room_c, *sizes.tolist()]
    return tuple(
        (t, t + abs(jump) / rate_c_s, math.copysign(c_j_k * rate_c_s, jump))
        for t, jump in zip(starts, jumps, strict=True)
        if abs(jump) > _EPS_C
    )


def lamp_loads(bookings: Sequence[Booking], rig: Rig) -> list[LampLoad]:
    """Lamp power models of every chamber each compiled booking lights.

    Parameters
    ----------
    bookings
        Bookings (those without a compiled protocol are skipped) (no unit).
    rig
        The rig; chambers without ``lamp.rated_w``, or with neither a lamp curve nor a
        ``max_par`` above 0, are skipped (no unit).

    Returns
    -------
    list of LampLoad
        In booking order, then protocol order (no unit).
    """
    from controller.rig import DriveCurve

    known = {c.id: c for c in rig.chambers}
    loads: list[LampLoad] = []
    for booking in bookings:
        compiled = booking.compiled
        if compiled is None:
            continue
        for chamber_id in compiled.group_of:
            chamber = known.get(chamber_id)
            par = compiled.channels[chamber_id].get("par")
            if chamber is None or par is None or chamber.lamp.rated_w is None:
                continue
            curve = chamber.lamp.curve()
            if curve is None:
                if chamber.limits.max_par <= 0.0:
                    continue
                curve = DriveCurve.linear(chamber.limits.max_par)
            loads.append(
                LampLoad(
                    chamber=chamber_id,
                    booking=booking,
                    t0_s=booking.start_utc.timestamp(),
                    t1_s=booking.end_utc.timestamp(),
                    par=par,
                    rated_w=chamber.lamp.rated_w,
                    curve_par=curve.value,
                    curve_drive_pct=curve.drive_pct,
                )
            )
    return loads


def load_grid(
    loads: Sequence[NodeLoad | LampLoad], lo_s: float, hi_s: float, tol_w: float = 1.0
) -> FloatArray:
    """Instants at which to evaluate loads so no peak is missed (see the module rules).

    Parameters
    ----------
    loads
        Node and lamp loads (no unit).
    lo_s, hi_s
        Span to cover, epoch s.
    tol_w
        Largest distance of a node's chord from its parabola on a flushing interval, W.

    Returns
    -------
    numpy.ndarray
        Sorted unique instants in [lo_s, hi_s], epoch s.
    """
    parts = [load.breakpoints() for load in loads] + [np.array([lo_s, hi_s])]
    grid = np.unique(np.concatenate(parts))
    grid = grid[(grid >= lo_s) & (grid <= hi_s)]
    if grid.size < 2:
        return grid
    a, b = grid[:-1], grid[1:]
    mid = (a + b) / 2.0
    deviation = np.zeros_like(mid)
    for load in loads:
        if isinstance(load, NodeLoad) and load.flushes:
            chord = (load.watts(a, "right") + load.watts(b, "left")) / 2.0
            deviation = np.maximum(deviation, np.abs(load.watts(mid, "right") - chord))
    pieces = np.minimum(np.ceil(np.sqrt(deviation / tol_w)), 10_000).astype(np.int64)
    refine = np.flatnonzero(pieces > 1)
    if refine.size == 0:
        return grid
    inner = [a[k] + (b[k] - a[k]) * np.arange(1, pieces[k]) / pieces[k] for k in refine]
    return np.unique(np.concatenate([grid, *inner]))


def node_demand_w(
    booking: Booking, rig: Rig, times_utc: Sequence[datetime]
) -> dict[str, FloatArray]:
    """Heat demand of every thermal node a booking runs, at given instants (right values).

    Parameters
    ----------
    booking
        A booking with its compiled protocol (no unit).
    rig
        The rig (no unit).
    times_utc
        Aware instants.

    Returns
    -------
    dict of str to numpy.ndarray
        Node id to its demand at each instant, W (positive = heating, negative = cooling,
        0 outside the booking).
    """
    x = np.array([t.timestamp() for t in times_utc], dtype=np.float64)
    return {load.node: load.watts(x, "right") for load in node_loads([booking], rig)}
