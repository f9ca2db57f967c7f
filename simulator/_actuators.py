"""Actuators of the rack: commands, what faults let through, and the heaters' dead time.

Rule: commands are stored as given; what the actuators *do* is recomputed from the commands
and the active faults whenever either changes. Heater and chiller power then travels down a
delay line per thermal node (transport dead time) before the water feels it. The delay line
is event based: each change is queued with its arrival time, so a long dead time costs
nothing per step.
"""

from __future__ import annotations

import math
from collections import deque

import numpy as np
from numpy.typing import NDArray

from simulator._faults import FaultBook
from simulator._params import RackParams
from simulator._physics import lamp_curve, pump_fraction

__all__ = ["Actuators"]

F = NDArray[np.float64]

_EPS_S = 1e-9
_GRID_TOL = 1e-6


class Actuators:
    """Commanded and effective actuator states of one rack.

    Parameters
    ----------
    p
        Resolved rack parameters.

    Attributes
    ----------
    heater_pct, chiller_pct
        Effective heater and chiller drive of each thermal node, %, shape ``(M,)``.
    lamp_pct, pump_pct
        Effective lamp and pump drive of each chamber, %, shape ``(N,)``.
    lit
        1 where a lamp is on, else 0, shape ``(N,)``.
    new_lamp_par
        PAR of each lamp when new and warm at its drive, µmol m⁻² s⁻¹, shape ``(N,)``.
    flow_cm_s
        Flow over each community, cm s⁻¹, shape ``(N,)``.
    flush_l_s
        Fresh inflow into each chamber, L s⁻¹, shape ``(N,)``.
    water_w
        Heater and chiller power reaching each node's water now, W, shape ``(2, M)``.
    flow_version
        Counter raised whenever pump flow changes, dimensionless.
    dirty
        True when commands changed since the last :meth:`refresh`.
    """

    def __init__(self, p: RackParams) -> None:
        n, m = len(p.chamber_ids), len(p.node_names)
        self._p = p
        self._m = m
        self._cmd = np.zeros((4, n))  # heater, chiller, lamp, pump (%), per chamber
        self._sent_w = np.zeros((2, m))
        self._line: list[deque[tuple[float, float, float]]] = [deque() for _ in range(m)]
        self.water_w = np.zeros((2, m))
        self.heater_pct = np.zeros(m)
        self.chiller_pct = np.zeros(m)
        self.lamp_pct = np.zeros(n)
        self.pump_pct = np.zeros(n)
        self.lit = np.zeros(n)
        self.new_lamp_par = np.zeros(n)
        self.flow_cm_s = np.zeros(n)
        self.flush_l_s = np.zeros(n)
        self.flow_version = 0
        self._lamp_seen = np.full(n, np.nan)
        self._pump_seen = np.full(n, np.nan)
        self.dirty = True

    def command(self, chamber: int, row: int, value: float) -> None:
        """Store a drive (%) for a chamber; row 0 heater, 1 chiller, 2 lamp, 3 pump."""
        self._cmd[row, chamber] = value
        self.dirty = True

    def refresh(self, t_s: float, book: FaultBook) -> None:
        """Recompute effective drives at ``t_s`` (s) and queue changed heat power."""
        p = self._p
        drv = p.driver_of_node
        self.dirty = False
        if not book.active:
            self.lamp_pct = self._cmd[2].copy()
            self.pump_pct = self._cmd[3].copy()
            heater = self._cmd[0, drv]
            chiller = self._cmd[1, drv]
        else:
            masks = book.masks
            powered = ~(masks.power_off | masks.rack_power_off)
            self.lamp_pct = np.where(powered, self._cmd[2], 0.0)
            self.pump_pct = np.where(powered & ~masks.pump_failed, self._cmd[3], 0.0)
            node_of, m = p.node_of_chamber, self._m
            stuck_on = np.bincount(node_of, masks.heater_on, m) > 0
            stuck_off = np.bincount(node_of, masks.heater_off, m) > 0
            chiller_dead = np.bincount(node_of, masks.chiller_failed, m) > 0
            node_powered = powered[drv]
            heater = np.where(stuck_on, 100.0, self._cmd[0, drv])
            heater = np.where(stuck_off | ~node_powered, 0.0, heater)
            chiller = np.where(chiller_dead | ~node_powered, 0.0, self._cmd[1, drv])
        self.heater_pct, self.chiller_pct = heater, chiller
        if not np.array_equal(self.lamp_pct, self._lamp_seen):
            self._lamp_seen = self.lamp_pct
            self.new_lamp_par = lamp_curve(self.lamp_pct, p.par_at_full, p.curve_shape)
            self.lit = (self.lamp_pct > 0.0).astype(float)
        if not np.array_equal(self.pump_pct, self._pump_seen):
            self._pump_seen = self.pump_pct
            pump = pump_fraction(self.pump_pct, p.dead_band_pct)
            self.flow_cm_s = pump * p.flow_at_full_cm_s
            self.flush_l_s = pump * p.flush_at_full_l_s
            self.flow_version += 1
        watts = np.empty((2, self._m))
        np.multiply(heater, p.heater_max_w / 100.0, out=watts[0])
        np.multiply(chiller, p.chiller_max_w / 100.0, out=watts[1])
        for j in np.flatnonzero((watts != self._sent_w).any(axis=0)):
            line = self._line[j]
            arrive = t_s + float(p.dead_time_s[j])
            if line and line[-1][0] == arrive:
                line.pop()
            line.append((arrive, float(watts[0, j]), float(watts[1, j])))
        self._sent_w = watts

    def deliver(self, t_s: float) -> None:
        """Let queued power changes that have arrived by ``t_s`` (s) reach the water."""
        for j, line in enumerate(self._line):
            while line and line[0][0] <= t_s + _EPS_S:
                _, heater_w, chiller_w = line.popleft()
                self.water_w[0, j] = heater_w
                self.water_w[1, j] = chiller_w

    def next_off_grid(self, t0_s: float, t1_s: float, h: float) -> float | None:
        """First queued arrival inside (t0, t1) that falls between sub-step boundaries, s."""
        best: float | None = None
        for line in self._line:
            for arrive, _, _ in line:
                if arrive >= t1_s - _EPS_S:
                    break
                k = (arrive - t0_s) / h
                if abs(k - round(k)) > _GRID_TOL and (best is None or arrive < best):
                    best = arrive
        return best

    def power_path(self, t0_s: float, t1_s: float, n: int, h: float) -> tuple[F, F]:
        """Heater and chiller power per sub-step of [t0, t1] (W, shape ``(n, M)``).

        Arrivals inside the segment must lie on sub-step boundaries (see
        :meth:`next_off_grid`); each applies from its boundary on.
        """
        heater: F | None = None
        chiller: F | None = None
        for j, line in enumerate(self._line):
            for arrive, heater_w, chiller_w in line:
                if arrive >= t1_s - _EPS_S:
                    break
                if heater is None or chiller is None:
                    heater = np.repeat(self.water_w[0][None, :], n, axis=0)
                    chiller = np.repeat(self.water_w[1][None, :], n, axis=0)
                k = max(0, round((arrive - t0_s) / h))
                heater[k:, j] = heater_w
                chiller[k:, j] = chiller_w
        if heater is None or chiller is None:
            shape = (n, self._m)
            return np.broadcast_to(self.water_w[0], shape), np.broadcast_to(self.water_w[1], shape)
        return heater, chiller

    @staticmethod
    def steps(span_s: float, step_s: float) -> tuple[int, float]:
        """Number and length (s) of equal sub-steps no longer than ``step_s`` covering a span."""
        n = max(1, math.ceil(span_s / step_s - 1e-9))
        return n, span_s / n
