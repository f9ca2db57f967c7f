"""Actuators of the rack: commands, what faults let through, and the heaters' dead time.

Rule: commands are stored as given; what the actuators *do* is recomputed from the commands
and the active faults whenever either changes (only the groups whose commands changed, when
no fault overrides an actuator). Heater and chiller power then travels down a delay line per
thermal node (transport dead time) before the water feels it. The delay line is event
based: each change is queued with its arrival time, so a long dead time costs nothing per
step, and the earliest pending arrival is remembered so that a step with nothing arriving
does not look at the lines at all.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Mapping, Sequence
from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray

from simulator._faults import ActuatorMasks, FaultBook
from simulator._params import RackParams

__all__ = [
    "Actuators",
    "Arrivals",
    "Effective",
    "drive_pct",
    "effective_drives",
    "substeps",
]

F = NDArray[np.float64]

_EPS_S = 1e-9
_GRID_TOL = 1e-6
_POWER = 1  # heater or chiller commands changed
_LAMP = 2
_PUMP = 4


Arrivals = list[tuple[tuple[int, ...], list[float]]]
"""Power changes reaching the water inside a segment, in rounds of at most one per node:
(k_j per node, the index of the first sub-step that feels it, n where nothing arrives;
change of net heater − chiller power per node, W)."""


class Effective(NamedTuple):
    """Drives the actuators actually deliver, % (rows of shape ``(..., M)`` or ``(..., N)``)."""

    heater_pct: F
    chiller_pct: F
    lamp_pct: F
    pump_pct: F


def effective_drives(
    p: RackParams, heater: F, chiller: F, lamp: F, pump: F, masks: ActuatorMasks
) -> Effective:
    """What faults let through of commanded drives.

    Parameters
    ----------
    p
        Resolved rack parameters.
    heater, chiller, lamp, pump
        Commanded drives per chamber, %, shape ``(..., N)``.
    masks
        Active fault masks.

    Returns
    -------
    Effective
        Heater and chiller per thermal node (driven by the node's first chamber), shape
        ``(..., M)``; lamp and pump per chamber, shape ``(..., N)``; all %.

    Notes
    -----
    A power loss (of the chamber, or of the whole rack) turns lamp and pump off and, for the
    chamber driving a node, the node's heater and chiller. A heater stuck on or off, or a
    failed chiller, on any chamber of a node acts on the node's heater or chiller; stuck off
    wins over stuck on.
    """
    drv = p.driver_of_node
    heater_n = heater[..., drv]
    chiller_n = chiller[..., drv]
    if not masks.actuators_hit:
        return Effective(heater_n, chiller_n, lamp, pump)
    powered = ~(masks.power_off | masks.rack_power_off)
    lamp_e = np.where(powered, lamp, 0.0)
    pump_e = np.where(powered & ~masks.pump_failed, pump, 0.0)
    node_of, m = p.node_of_chamber, len(drv)
    stuck_on = np.bincount(node_of, masks.heater_on, m) > 0
    stuck_off = np.bincount(node_of, masks.heater_off, m) > 0
    chiller_dead = np.bincount(node_of, masks.chiller_failed, m) > 0
    node_powered = powered[drv]
    heater_e = np.where(stuck_on, 100.0, heater_n)
    heater_e = np.where(stuck_off | ~node_powered, 0.0, heater_e)
    chiller_e = np.where(chiller_dead | ~node_powered, 0.0, chiller_n)
    return Effective(heater_e, chiller_e, lamp_e, pump_e)


def drive_pct(value: float, name: str) -> float:
    """A drive (%) checked to lie within 0–100 % (NaN and infinities fail the comparison);
    ``name`` names it in the error."""
    if not 0.0 <= value <= 100.0:
        raise ValueError(f"{name} must be within 0–100 %, got {value!r}")
    return float(value)


def _row_error(
    index: Mapping[str, int], cid: str, heater: float, chiller: float, lamp: float, pump: float
) -> Exception | None:
    """The error that refuses a row of :meth:`Actuators.command_rows`, or None when it is good:
    KeyError for an unknown chamber, ValueError for a drive outside 0–100 % (NaN included, as
    :func:`drive_pct` says, naming the culprit), TypeError for one that is not a number."""
    if cid not in index:
        return KeyError(f"no chamber {cid!r} in this rack")
    try:
        drive_pct(heater, "heater_pct")
        drive_pct(chiller, "chiller_pct")
        drive_pct(lamp, "lamp_pct")
        drive_pct(pump, "pump_pct")
    except (TypeError, ValueError) as error:
        return error
    return None


def substeps(span_s: float, step_s: float) -> tuple[int, float]:
    """Number and length (s) of equal sub-steps no longer than ``step_s`` covering a span."""
    n = max(1, math.ceil(span_s / step_s - 1e-9))
    return n, span_s / n


class Actuators:
    """Commanded and effective actuator states of one rack.

    Parameters
    ----------
    p
        Resolved rack parameters.

    Attributes
    ----------
    heater_pct, chiller_pct
        Effective heater and chiller drive of each thermal node, %, M values.
    lamp_pct, pump_pct
        Effective lamp and pump drive of each chamber, %, N values.
    lit
        1 where a lamp is on, else 0, shape ``(N,)``.
    any_lit
        Whether any lamp is on.
    new_lamp_par
        PAR of each lamp when new and warm at its drive, µmol m⁻² s⁻¹, N values.
    flow_cm_s
        Flow over each community, cm s⁻¹, N values.
    flush_l_s
        Fresh inflow into each chamber, L s⁻¹, N values.
    water
        Heater and chiller power reaching each node's water now, W, two lists of M values
        (updated in place as queued power arrives; :attr:`water_w` is an array copy).
    flow_version, lamp_version
        Counters raised whenever pump flow or lamp output changes, dimensionless.

    Notes
    -----
    Per-chamber values are plain lists: a control tick changes them all and reads them one
    by one (8 chambers are too few for numpy to pay).
    """

    def __init__(self, p: RackParams) -> None:
        n, m = len(p.chamber_ids), len(p.node_names)
        self._p = p
        self._m = m
        self._cmd: list[list[float]] = [[0.0] * n for _ in range(4)]  # heater, chiller, lamp, pump
        self._heater_w_pct = (p.heater_max_w / 100.0).tolist()
        self._chiller_w_pct = (p.chiller_max_w / 100.0).tolist()
        self._dead_s = p.dead_time_s.tolist()
        self._drivers = p.driver_of_node.tolist()
        # lamp_curve and pump_fraction per chamber in plain floats (same operations)
        curved = (p.curve_shape > 1e-9).tolist()
        k = np.where(p.curve_shape > 1e-9, p.curve_shape, 1.0)
        self._lamp_k = [float(v) if bend else None for v, bend in zip(k, curved, strict=True)]
        self._lamp_norm = np.expm1(-k).tolist()
        self._par_at_full = p.par_at_full.tolist()
        self._dead_band = p.dead_band_pct.tolist()
        self._flow_full = p.flow_at_full_cm_s.tolist()
        self._flush_full = p.flush_at_full_l_s.tolist()
        self._lit_list: list[float] = [0.0] * n
        self._sent: list[tuple[float, float]] = [(0.0, 0.0)] * m
        self._line: list[deque[tuple[float, float, float]]] = [deque() for _ in range(m)]
        self._next_arrival_s = math.inf
        self._faulted = False
        self._energy_j = [[0.0] * m, [0.0] * m]  # heater, chiller, up to _since_s
        self._since_s = [0.0] * m  # when each node's present power began, s
        self.water: tuple[list[float], list[float]] = ([0.0] * m, [0.0] * m)
        self.heater_pct: list[float] = [0.0] * m
        self.chiller_pct: list[float] = [0.0] * m
        self.lamp_pct: list[float] = [0.0] * n
        self.pump_pct: list[float] = [0.0] * n
        self.lit = np.zeros(n)
        self.any_lit = False
        self.new_lamp_par: list[float] = [0.0] * n
        self.flow_cm_s: list[float] = [0.0] * n
        self.flush_l_s: list[float] = [0.0] * n
        self.flow_version = 0
        self.lamp_version = 0
        self._dirty = _POWER | _LAMP | _PUMP

    @property
    def dirty(self) -> bool:
        """True when commands changed since the last :meth:`refresh`."""
        return self._dirty != 0

    def command(
        self,
        chamber: int,
        heater: float | None,
        chiller: float | None,
        lamp: float | None,
        pump: float | None,
    ) -> None:
        """Store drives (%) for a chamber; None leaves a drive as it is."""
        cmd = self._cmd
        if heater is not None and cmd[0][chamber] != heater:
            cmd[0][chamber] = heater
            self._dirty |= _POWER
        if chiller is not None and cmd[1][chamber] != chiller:
            cmd[1][chamber] = chiller
            self._dirty |= _POWER
        if lamp is not None and cmd[2][chamber] != lamp:
            cmd[2][chamber] = lamp
            self._dirty |= _LAMP
        if pump is not None and cmd[3][chamber] != pump:
            cmd[3][chamber] = pump
            self._dirty |= _PUMP

    def command_rows(
        self,
        index: Mapping[str, int],
        commands: Sequence[tuple[str, float, float, float, float]],
    ) -> list[Exception | None]:
        """Check and store drives for several chambers in one pass, as :meth:`command` after
        :func:`drive_pct` on each row in turn.

        Parameters
        ----------
        index
            Chamber identifier to chamber index, dimensionless.
        commands
            Per row: chamber identifier, then heater, chiller, lamp and pump drive, % each.

        Returns
        -------
        list
            Per row None, or the error that refuses it (KeyError for an unknown chamber,
            ValueError for a drive outside 0–100 %, TypeError for one that is not a number);
            a refused row leaves its chamber as it was, the other rows still take effect.
        """
        heater_c, chiller_c, lamp_c, pump_c = self._cmd
        dirty = self._dirty
        errors: list[Exception | None] = [None] * len(commands)
        for k, (cid, heater, chiller, lamp, pump) in enumerate(commands):
            i = index[cid] if cid in index else None
            try:  # the checks of drive_pct without a call per drive (a non-number: TypeError)
                good = (
                    i is not None
                    and 0.0 <= heater <= 100.0
                    and 0.0 <= chiller <= 100.0
                    and 0.0 <= lamp <= 100.0
                    and 0.0 <= pump <= 100.0
                )
            except TypeError:
                good = False
            if not good or i is None:  # _row_error finds the culprit and names it
                errors[k] = _row_error(index, cid, heater, chiller, lamp, pump)
                continue
            heater, chiller, lamp, pump = float(heater), float(chiller), float(lamp), float(pump)
            if heater_c[i] != heater:
                heater_c[i] = heater
                dirty |= _POWER
            if chiller_c[i] != chiller:
                chiller_c[i] = chiller
                dirty |= _POWER
            if lamp_c[i] != lamp:
                lamp_c[i] = lamp
                dirty |= _LAMP
            if pump_c[i] != pump:
                pump_c[i] = pump
                dirty |= _PUMP
        self._dirty = dirty
        return errors

    def commands(self) -> F:
        """Commanded drives, %, shape ``(4, N)`` (heater, chiller, lamp, pump)."""
        return np.array(self._cmd)

    def refresh(self, t_s: float, book: FaultBook, faults_changed: bool = False) -> None:
        """Recompute effective drives at ``t_s`` (s) and queue changed heat power.

        Parameters
        ----------
        t_s
            Present simulated time, s.
        book
            The rack's faults.
        faults_changed
            True when the active faults changed since the last refresh.
        """
        masks = book.masks
        dirty = self._dirty
        self._dirty = 0
        if faults_changed or masks.actuators_hit or self._faulted:
            self._faulted = masks.actuators_hit
            cmd = self._cmd
            eff = effective_drives(
                self._p,
                np.array(cmd[0]),
                np.array(cmd[1]),
                np.array(cmd[2]),
                np.array(cmd[3]),
                masks,
            )
            lamp, pump = eff.lamp_pct.tolist(), eff.pump_pct.tolist()
            if lamp != self.lamp_pct:
                self._set_lamp(lamp)
            if pump != self.pump_pct:
                self._set_pump(pump)
            self.heater_pct = eff.heater_pct.tolist()
            self.chiller_pct = eff.chiller_pct.tolist()
            self._queue(t_s)
            return
        if dirty & _LAMP:
            self._set_lamp(self._cmd[2])
        if dirty & _PUMP:
            self._set_pump(self._cmd[3])
        if dirty & _POWER:
            heater, chiller = self._cmd[0], self._cmd[1]
            self.heater_pct = [heater[d] for d in self._drivers]
            self.chiller_pct = [chiller[d] for d in self._drivers]
            self._queue(t_s)

    def _set_lamp(self, lamp_pct: list[float]) -> None:
        """New lamp drives (%): PAR of new warm lamps by
        :func:`simulator._physics.lamp_curve`, in floats."""
        par = []
        for drive, k, norm, full in zip(
            lamp_pct, self._lamp_k, self._lamp_norm, self._par_at_full, strict=True
        ):
            # min(max(drive, 0), 100) as the builtins decide it (NaN and −0.0 included)
            drive = 0.0 if 0.0 > drive else drive
            frac = (100.0 if 100.0 < drive else drive) / 100.0
            par.append(full * (frac if k is None else math.expm1(-k * frac) / norm))
        lit = [1.0 if drive > 0.0 else 0.0 for drive in lamp_pct]
        self.lamp_pct = list(lamp_pct)  # a copy: the caller's list may be the commands
        self.new_lamp_par = par
        if lit != self._lit_list:  # the same pattern keeps its array: consumers test identity
            self._lit_list = lit
            self.lit = np.array(lit)
            self.any_lit = 1.0 in lit
        self.lamp_version += 1

    def _set_pump(self, pump_pct: list[float]) -> None:
        """New pump drives (%): flow and flushing by
        :func:`simulator._physics.pump_fraction`, in floats."""
        flow, flush = [], []
        for drive, dead, flow_full, flush_full in zip(
            pump_pct, self._dead_band, self._flow_full, self._flush_full, strict=True
        ):
            # max(min(max(drive, 0), 100) − dead, 0) as the builtins decide it
            drive = 0.0 if 0.0 > drive else drive
            above = (100.0 if 100.0 < drive else drive) - dead
            share = (0.0 if 0.0 > above else above) / (100.0 - dead)
            flow.append(share * flow_full)
            flush.append(share * flush_full)
        self.pump_pct = list(pump_pct)  # a copy: the caller's list may be the commands
        self.flow_cm_s = flow
        self.flush_l_s = flush
        self.flow_version += 1

    def _queue(self, t_s: float) -> None:
        """Queue each node's changed heater and chiller power to arrive after its dead time."""
        heater = self.heater_pct
        chiller = self.chiller_pct
        for j in range(self._m):
            watts = (heater[j] * self._heater_w_pct[j], chiller[j] * self._chiller_w_pct[j])
            if watts == self._sent[j]:
                continue
            self._sent[j] = watts
            line = self._line[j]
            arrive = t_s + self._dead_s[j]
            if line and line[-1][0] == arrive:
                line.pop()
            line.append((arrive, *watts))
            if arrive < self._next_arrival_s:
                self._next_arrival_s = arrive

    def deliver(self, t_s: float) -> None:
        """Let queued power changes that have arrived by ``t_s`` (s) reach the water."""
        if t_s + _EPS_S < self._next_arrival_s:
            return
        heater, chiller = self.water
        heater_j, chiller_j = self._energy_j
        since = self._since_s
        best = math.inf
        for j, line in enumerate(self._line):
            while line and line[0][0] <= t_s + _EPS_S:
                arrive, heater_w, chiller_w = line.popleft()
                heater_j[j] += heater[j] * (arrive - since[j])
                chiller_j[j] += chiller[j] * (arrive - since[j])
                since[j] = arrive
                heater[j] = heater_w
                chiller[j] = chiller_w
            if line and line[0][0] < best:
                best = line[0][0]
        self._next_arrival_s = best

    @property
    def water_w(self) -> F:
        """Heater and chiller power reaching each node's water now, W, shape ``(2, M)``."""
        return np.array(self.water, dtype=float)

    def energy_j(self, t_s: float) -> F:
        """Heat delivered by each node's heater and removed by its chiller since start.

        Parameters
        ----------
        t_s
            Present simulated time, s.

        Returns
        -------
        numpy.ndarray
            J, shape ``(2, M)``: the power reaching the water integrated over time.
        """
        done = np.array(self._energy_j)
        return done + self.water_w * (t_s - np.array(self._since_s))

    def arrivals(self, t0_s: float, t1_s: float, n: int, h: float) -> tuple[Arrivals, float | None]:
        """Queued power changes inside (t0, t1) on a grid of n sub-steps of ``h`` seconds.

        Returns
        -------
        tuple
            The arrivals on sub-step boundaries (see :data:`Arrivals`), and the first arrival
            that falls between boundaries (s), or None: the caller then shortens the segment
            to end there and asks again.
        """
        if self._next_arrival_s >= t1_s - _EPS_S:
            return [], None
        m = self._m
        rounds: list[tuple[list[int], list[float]]] = []
        snaps: list[tuple[deque[tuple[float, float, float]], int, tuple[float, float, float]]] = []
        heater, chiller = self.water
        for j, line in enumerate(self._line):
            net = heater[j] - chiller[j]
            for index, (arrive, heater_w, chiller_w) in enumerate(line):
                if arrive >= t1_s - _EPS_S:
                    break
                k = (arrive - t0_s) / h
                near = max(0, round(k))
                if abs(k - near) > _GRID_TOL:
                    return [], self._first_off_grid(t0_s, t1_s, h)
                snapped = t0_s + near * h
                if snapped != arrive:  # account heat from the boundary the water feels it at
                    snaps.append((line, index, (snapped, heater_w, chiller_w)))
                if index == len(rounds):
                    rounds.append(([n] * m, [0.0] * m))
                ks, delta = rounds[index]
                ks[j] = near
                delta[j] = heater_w - chiller_w - net
                net = heater_w - chiller_w
        for line, index, entry in snaps:
            line[index] = entry
        return [(tuple(ks), delta) for ks, delta in rounds], None

    def _first_off_grid(self, t0_s: float, t1_s: float, h: float) -> float:
        """Earliest queued arrival inside (t0, t1) between sub-step boundaries, s."""
        best = math.inf
        for line in self._line:
            for arrive, _, _ in line:
                if arrive >= t1_s - _EPS_S:
                    break
                k = (arrive - t0_s) / h
                if abs(k - max(0, round(k))) > _GRID_TOL:
                    best = min(best, arrive)
                    break
        return best

    def sent_w(self) -> F:
        """The latest heater and chiller power queued per node, W, shape ``(2, M)``."""
        return np.array(self._sent, dtype=float).reshape(self._m, 2).T.copy()

    def pending(self) -> list[list[tuple[float, float, float]]]:
        """Queued (arrival s, heater W, chiller W) per node, earliest first (copies)."""
        return [list(line) for line in self._line]

    def load(
        self,
        cmd: F,
        water_w: F,
        lines: list[list[tuple[float, float, float]]],
        book: FaultBook,
        energy_j: F,
        t_s: float,
    ) -> None:
        """Take over a state computed elsewhere (the open-loop integrator).

        Parameters
        ----------
        cmd
            Commanded drives, %, shape ``(4, N)`` (heater, chiller, lamp, pump).
        water_w
            Heater and chiller power reaching each node now, W, shape ``(2, M)``.
        lines
            Power changes still on their way per node: (arrival s, heater W, chiller W).
        book
            The rack's faults (for the effective drives).
        energy_j
            Heater and chiller energy since start, J, shape ``(2, M)``.
        t_s
            Present simulated time, s.
        """
        self._energy_j = [energy_j[0].tolist(), energy_j[1].tolist()]
        self._since_s = [t_s] * self._m
        self._cmd = [[float(v) for v in row] for row in cmd]
        eff = effective_drives(self._p, cmd[0], cmd[1], cmd[2], cmd[3], book.masks)
        lamp = np.asarray(eff.lamp_pct, dtype=float).tolist()
        pump = np.asarray(eff.pump_pct, dtype=float).tolist()
        if lamp != self.lamp_pct:
            self._set_lamp(lamp)
        if pump != self.pump_pct:
            self._set_pump(pump)
        self.heater_pct = np.asarray(eff.heater_pct, dtype=float).tolist()
        self.chiller_pct = np.asarray(eff.chiller_pct, dtype=float).tolist()
        self._faulted = book.masks.actuators_hit
        heater = self.heater_pct
        chiller = self.chiller_pct
        self._sent = [
            (heater[j] * self._heater_w_pct[j], chiller[j] * self._chiller_w_pct[j])
            for j in range(self._m)
        ]
        power = np.asarray(water_w, dtype=float)
        self.water = (power[0].tolist(), power[1].tolist())
        self._line = [deque(line) for line in lines]
        heads = [line[0][0] for line in self._line if line]
        self._next_arrival_s = min(heads) if heads else math.inf
        self._dirty = 0
