"""The fault book: which faults are scheduled, which are active now, and what they do.

Rule: a fault is active on the half-open interval [start_s, end_s). It starts at its
``at_s`` or, if injected later than that, at the moment of injection; it lasts
``duration_s`` or until cleared. The book never reads a clock: the rack tells it the time.
Actuator effects are summarised as boolean masks over chambers, recomputed whenever the
active set changes. The book remembers the next moment anything can change (the earliest
fault edge after the last update), so bringing it up to date between edges costs nothing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from controller.rig import Fault, FaultKind

__all__ = ["ActuatorMasks", "FaultBook", "ScheduledFault"]

B = NDArray[np.bool_]
F = NDArray[np.float64]

_EPS_S = 1e-9
_NOTHING: list[ScheduledFault] = []  # returned, never changed, when nothing began


@dataclass(slots=True)
class ScheduledFault:
    """A fault with its resolved time window and per-fault memory.

    Attributes
    ----------
    fault
        The fault as given.
    chambers
        Indices of the chambers it hits, dimensionless.
    start_s
        Simulated time it begins, s.
    end_s
        Simulated time it ends (``inf`` until cleared), s.
    frozen
        For a stuck sensor: the reading per chamber index captured when it began.
    """

    fault: Fault
    chambers: tuple[int, ...]
    start_s: float
    end_s: float
    frozen: dict[int, object] = field(default_factory=dict)

    def active_at(self, t_s: float) -> bool:
        """Whether the fault is active at ``t_s`` (s)."""
        return self.start_s <= t_s + _EPS_S and t_s + _EPS_S < self.end_s


@dataclass(frozen=True, slots=True)
class ActuatorMasks:
    """Which chambers' actuators a fault overrides now (arrays over chambers).

    Attributes
    ----------
    heater_on, heater_off, chiller_failed, pump_failed, power_off
        One flag per chamber, dimensionless.
    leak_l_s
        Water lost per chamber, L s⁻¹.
    rack_power_off
        A rack-wide power loss is active.
    actuators_hit
        Any fault overrides an actuator (heater, chiller, pump, power) now.
    leaking
        Any chamber is leaking now.
    """

    heater_on: B
    heater_off: B
    chiller_failed: B
    pump_failed: B
    power_off: B
    leak_l_s: F
    rack_power_off: bool
    actuators_hit: bool
    leaking: bool


class FaultBook:
    """Scheduled and active faults of one rack.

    Parameters
    ----------
    chamber_ids
        Ids of the rack's chambers in order.
    """

    def __init__(self, chamber_ids: tuple[str, ...]) -> None:
        self._ids = chamber_ids
        self._index = {cid: i for i, cid in enumerate(chamber_ids)}
        self._faults: list[ScheduledFault] = []
        self._active: list[ScheduledFault] = []
        self._stale = True
        self.next_edge_s = math.inf
        """Earliest fault start or end after the time of the last update, s (``inf``: none)."""
        self.masks = self._compute_masks()

    def add(self, fault: Fault, now_s: float) -> ScheduledFault:
        """Schedule ``fault``; it starts at max(fault.at_s, now_s) (s)."""
        if fault.chamber is None:
            chambers = tuple(range(len(self._ids)))
        elif fault.chamber in self._index:
            chambers = (self._index[fault.chamber],)
        else:
            raise ValueError(f"fault names chamber {fault.chamber!r}, which the rack lacks")
        start = max(fault.at_s, now_s)
        end = math.inf if fault.duration_s is None else start + fault.duration_s
        entry = ScheduledFault(fault=fault, chambers=chambers, start_s=start, end_s=end)
        self._faults.append(entry)
        self._stale = True
        return entry

    def clear(self, now_s: float, kind: FaultKind | None, chamber_id: str | None) -> int:
        """End matching faults (active or pending) at ``now_s`` (s); return how many.

        ``kind`` None matches every kind; ``chamber_id`` None matches every fault, a chamber
        id only the faults that name that chamber (rack-wide faults stay).
        """
        cleared = 0
        for entry in self._faults:
            if kind is not None and entry.fault.kind is not kind:
                continue
            if chamber_id is not None and entry.fault.chamber != chamber_id:
                continue
            if entry.end_s > now_s:
                entry.end_s = max(now_s, entry.start_s)
                cleared += 1
        self._stale = True
        return cleared

    def update(self, t_s: float) -> tuple[list[ScheduledFault], bool]:
        """Bring the active set to time ``t_s`` (s).

        Returns the faults that just began and whether the active set changed at all.
        """
        if not self._stale and t_s + _EPS_S < self.next_edge_s:
            return _NOTHING, False
        self._stale = False
        self._faults = [f for f in self._faults if f.end_s > t_s + _EPS_S]
        now_active = [f for f in self._faults if f.active_at(t_s)]
        began = [f for f in now_active if not any(f is g for g in self._active)]
        changed = bool(began) or len(now_active) != len(self._active)
        self._active = now_active
        if changed:
            self.masks = self._compute_masks()
        self.next_edge_s = self.next_boundary(t_s)
        return began, changed

    def next_boundary(self, t_s: float) -> float:
        """Earliest start or end of a fault after ``t_s`` (s), or ``inf``."""
        best = math.inf
        for entry in self._faults:
            for edge in (entry.start_s, entry.end_s):
                if t_s + _EPS_S < edge < best:
                    best = edge
        return best

    def edges(self, t0_s: float, t1_s: float) -> list[float]:
        """Fault starts and ends strictly inside (t0, t1) (s), sorted, without repeats."""
        found = {
            edge
            for entry in self._faults
            for edge in (entry.start_s, entry.end_s)
            if t0_s + _EPS_S < edge < t1_s - _EPS_S
        }
        return sorted(found)

    @property
    def active(self) -> tuple[ScheduledFault, ...]:
        """Faults active at the time of the last update."""
        return tuple(self._active)

    def sensor_faults(self, chamber: int, sensor: str) -> list[ScheduledFault]:
        """Active sensor faults on one chamber's sensor."""
        return [
            f
            for f in self._active
            if f.fault.sensor == sensor
            and chamber in f.chambers
            and f.fault.kind is not FaultKind.COMM_TIMEOUT
        ]

    def comm_down(self, chamber: int, device: str) -> bool:
        """True when ``device`` of a chamber cannot be reached (timeout or power loss)."""
        if self.masks.power_off[chamber]:
            return True
        return any(
            f.fault.kind is FaultKind.COMM_TIMEOUT
            and chamber in f.chambers
            and f.fault.sensor in (None, device)
            for f in self._active
        )

    def _compute_masks(self) -> ActuatorMasks:
        n = len(self._ids)
        flags = {kind: np.zeros(n, dtype=bool) for kind in FaultKind}
        leak = np.zeros(n)
        rack_power_off = False
        for entry in self._active:
            idx = list(entry.chambers)
            flags[entry.fault.kind][idx] = True
            if entry.fault.kind is FaultKind.LEAK:
                leak[idx] += (entry.fault.magnitude or 0.0) / 3600.0
            if entry.fault.kind is FaultKind.POWER_LOSS and entry.fault.chamber is None:
                rack_power_off = True
        overriding = (
            FaultKind.HEATER_STUCK_ON,
            FaultKind.HEATER_STUCK_OFF,
            FaultKind.CHILLER_FAILURE,
            FaultKind.PUMP_FAILURE,
            FaultKind.POWER_LOSS,
        )
        return ActuatorMasks(
            heater_on=flags[FaultKind.HEATER_STUCK_ON],
            heater_off=flags[FaultKind.HEATER_STUCK_OFF],
            chiller_failed=flags[FaultKind.CHILLER_FAILURE],
            pump_failed=flags[FaultKind.PUMP_FAILURE],
            power_off=flags[FaultKind.POWER_LOSS],
            leak_l_s=leak,
            rack_power_off=rack_power_off,
            actuators_hit=any(bool(flags[kind].any()) for kind in overriding),
            leaking=bool(leak.any()),
        )
