"""The simulated rack: state of every chamber, stepped by whoever owns time.

Rule: the rack never reads a clock and never sleeps; ``advance(dt_s)`` is the only way time
passes. ``advance`` cuts the interval at every event (a fault beginning or ending, an actuator
change arriving after its dead time) so inputs are constant within each segment, then steps
each segment in sub-steps no longer than ``physics_step_s`` with the vectorised functions of
:mod:`simulator._physics` and :mod:`simulator._oxygen`. Readings draw noise from one seeded
generator per rack.

Shared baths: the heater and chiller of a bath node are driven by the bath's first chamber
(in rig order); heater and chiller commands given to the other chambers of the bath are kept
but have no effect. Faults on the heater or chiller of any chamber of a bath act on the
bath's heater or chiller; so does a power loss of the driving chamber.
"""

from __future__ import annotations

import math
from collections import deque
from datetime import datetime, timedelta

import numpy as np
from numpy.typing import NDArray

from controller.rig import Fault, FaultKind, Rig
from simulator._faults import FaultBook, ScheduledFault
from simulator._oxygen import metabolism, oxygen_segment
from simulator._params import resolve
from simulator._physics import (
    ageing_factor,
    first_order,
    lag_segment,
    lamp_curve,
    pump_fraction,
    thermal_segment,
)
from simulator._science import SaturationTable
from simulator._sensors import fault_offset, noisy, optode_reading
from simulator._types import ChamberTruth, OptodeReading, Outputs, SensorNoReply

__all__ = ["Rack"]

F = NDArray[np.float64]

_EPS_S = 1e-9
_LEAK_SEGMENT_S = 60.0
_MAX_SUBSTEPS = 3600  # sub-steps per vectorised segment: bounds memory on long advances
_MIN_VOLUME_FRAC = 0.05
_DEVICE_OF_SENSOR = {"temperature": "modbus", "par": "modbus", "flow": "modbus", "optode": "optode"}


class Rack:
    """A rack of simulated incubation chambers.

    Parameters
    ----------
    rig
        Validated rig with its simulator parameters.
    seed
        Seed of the sensor-noise generator, dimensionless; None = the rig's ``sim.seed``.
    start_utc
        Aware UTC wall time of simulated time 0, or None when wall time does not matter.
    """

    def __init__(
        self, rig: Rig, seed: int | None = None, start_utc: datetime | None = None
    ) -> None:
        if start_utc is not None and start_utc.utcoffset() is None:
            raise ValueError("start_utc must be timezone-aware")
        p = resolve(rig)
        self.rig = rig
        self.start_utc = start_utc
        self.chamber_ids: tuple[str, ...] = p.chamber_ids
        self._p = p
        self._index = {cid: i for i, cid in enumerate(p.chamber_ids)}
        n, m = len(p.chamber_ids), len(p.node_names)
        self._n, self._m = n, m
        self._rng = np.random.default_rng(p.seed if seed is None else seed)
        self._sat = SaturationTable(p.salinity, p.pressure_kpa)
        self._t = 0.0
        # commands (%), per chamber: heater, chiller, lamp, pump
        self._cmd = np.zeros((4, n))
        # actuator state after faults
        self._heater_pct = np.zeros(m)
        self._chiller_pct = np.zeros(m)
        self._lamp_pct = np.zeros(n)
        self._pump_pct = np.zeros(n)
        self._sent_w = np.zeros((2, m))
        self._line: list[deque[tuple[float, float, float]]] = [deque() for _ in range(m)]
        self._water_w = np.zeros((2, m))
        # physical state
        self._temp = p.initial_node_temperature_c.copy()
        self._volume = p.volume_l.copy()
        t_ch = self._temp[p.node_of_chamber]
        self._o2 = self._sat(t_ch) * p.initial_o2_sat_frac
        self._probe = t_ch.copy()
        self._optode = self._o2.copy()
        self._warmth = np.zeros(n)
        self._lamp_s = p.lamp_hours0_h * 3600.0
        self._energy = np.zeros((4, m))  # heater, chiller, room loss, flush loss (J)
        self._dirty = True
        self._book = FaultBook(p.chamber_ids)
        for fault in p.faults:
            self._book.add(fault, 0.0)
        self._settle()

    # ------------------------------------------------------------------ time
    @property
    def t_s(self) -> float:
        """Simulated seconds since start, s."""
        return self._t

    @property
    def utc(self) -> datetime | None:
        """Aware UTC wall time of the present simulated moment, or None without start_utc."""
        if self.start_utc is None:
            return None
        return self.start_utc + timedelta(seconds=self._t)

    def advance(self, dt_s: float) -> None:
        """Integrate the physics forward by ``dt_s`` seconds (s, ≥ 0)."""
        if not math.isfinite(dt_s) or dt_s < 0:
            raise ValueError(f"dt_s must be a finite number ≥ 0, got {dt_s!r}")
        self._sync()
        t_end = self._t + dt_s
        step = self._p.physics_step_s
        while self._t < t_end - _EPS_S:
            seg_end = min(t_end, self._next_event(), self._t + _MAX_SUBSTEPS * step)
            if self._book.masks.leak_l_s.any():
                seg_end = min(seg_end, self._t + _LEAK_SEGMENT_S)
            span = seg_end - self._t
            n = max(1, math.ceil(span / step - 1e-9))
            self._integrate(n, span / n)
            self._t = seg_end
            self._settle()
        self._t = max(self._t, t_end)

    # ------------------------------------------------------------ actuators
    def set_outputs(
        self,
        chamber_id: str,
        *,
        heater_pct: float | None = None,
        chiller_pct: float | None = None,
        lamp_pct: float | None = None,
        pump_pct: float | None = None,
    ) -> None:
        """Command a chamber's actuators, each 0–100 % (None leaves it unchanged)."""
        i = self._index.get(chamber_id)
        if i is None:
            raise KeyError(f"no chamber {chamber_id!r} in this rack")
        for row, value in enumerate((heater_pct, chiller_pct, lamp_pct, pump_pct)):
            if value is None:
                continue
            if not math.isfinite(value) or not 0.0 <= value <= 100.0:
                raise ValueError(f"actuator drive must be within 0–100 %, got {value!r}")
            self._cmd[row, i] = value
        self._dirty = True

    def outputs(self, chamber_id: str) -> Outputs:
        """What a chamber's actuators do now (after faults); heater/chiller are its node's."""
        i = self._chamber(chamber_id)
        node = self._p.node_of_chamber[i]
        return Outputs(
            heater_pct=float(self._heater_pct[node]),
            chiller_pct=float(self._chiller_pct[node]),
            lamp_pct=float(self._lamp_pct[i]),
            pump_pct=float(self._pump_pct[i]),
        )

    @property
    def powered(self) -> bool:
        """False while a rack-wide power loss is active."""
        return not self._book.masks.rack_power_off

    # --------------------------------------------------------------- faults
    def inject(self, fault: Fault) -> None:
        """Schedule a fault from max(fault.at_s, now) for duration_s (None = until cleared)."""
        self._book.add(fault, self._t)
        self._settle()

    def clear_faults(self, kind: FaultKind | None = None, chamber_id: str | None = None) -> int:
        """End matching faults now (None matches all); return how many were ended."""
        if chamber_id is not None:
            self._chamber(chamber_id)
        cleared = self._book.clear(self._t, kind, chamber_id)
        self._settle()
        return cleared

    def active_faults(self) -> tuple[Fault, ...]:
        """Faults active now."""
        return tuple(entry.fault for entry in self._book.active)

    # -------------------------------------------------------------- sensors
    def read_temperature(self, chamber_id: str) -> float:
        """Temperature probe reading, °C; raises SensorNoReply when the probe is silent."""
        i = self._chamber(chamber_id)
        frozen = self._reachable(i, "temperature")
        return float(frozen) if frozen is not None else self._measure_temperature(i)

    def read_optode(self, chamber_id: str) -> OptodeReading:
        """Optode reading; raises SensorNoReply when the optode is silent."""
        i = self._chamber(chamber_id)
        frozen = self._reachable(i, "optode")
        if isinstance(frozen, OptodeReading):
            return frozen
        return self._measure_optode(i)

    def read_par(self, chamber_id: str) -> float:
        """PAR sensor reading, µmol photons m⁻² s⁻¹; raises SensorNoReply when silent."""
        i = self._chamber(chamber_id)
        frozen = self._reachable(i, "par")
        return float(frozen) if frozen is not None else self._measure_par(i)

    def read_flow(self, chamber_id: str) -> float:
        """Flow sensor reading, cm s⁻¹; raises SensorNoReply when silent."""
        i = self._chamber(chamber_id)
        frozen = self._reachable(i, "flow")
        return float(frozen) if frozen is not None else self._measure_flow(i)

    def read_level_ok(self, chamber_id: str) -> bool:
        """Level switch: False once a leak has lost more than the rig's alarm share."""
        i = self._chamber(chamber_id)
        lost = 1.0 - self._volume[i] / self._p.volume_l[i]
        return bool(lost < self._p.level_alarm_frac)

    def comm_ok(self, chamber_id: str, device: str) -> bool:
        """Whether a chamber's ``device`` ('modbus' or 'optode') answers now."""
        return not self._book.comm_down(self._chamber(chamber_id), device)

    # ---------------------------------------------------------------- truth
    def truth(self, chamber_id: str) -> ChamberTruth:
        """The true state of a chamber (no sensor in the way)."""
        i = self._chamber(chamber_id)
        p = self._p
        node = p.node_of_chamber[i]
        temps = self._temp[p.node_of_chamber]
        par = self._par_now()
        gpp, resp = metabolism(par, temps, p)
        sat = float(self._sat(temps)[i])
        heat_capacity = self._capacity[node]
        return ChamberTruth(
            temperature_c=float(temps[i]),
            o2_umol_l=float(self._o2[i]),
            o2_sat_pct=100.0 * float(self._o2[i]) / sat,
            o2_saturation_umol_l=sat,
            par=float(par[i]),
            flow_cm_s=float(self._flow_cm_s[i]),
            incubation_open=bool(self._flush_l_s[i] > 0.0),
            water_volume_l=float(self._volume[i]),
            gpp_umol_m2_h=float(gpp[i]),
            resp_umol_m2_h=float(resp[i]),
            net_umol_m2_h=float(gpp[i] - resp[i]),
            heater_w=float(self._water_w[0, node]),
            chiller_w=float(self._water_w[1, node]),
            heat_capacity_j_k=float(heat_capacity),
            heater_energy_j=float(self._energy[0, node]),
            chiller_energy_j=float(self._energy[1, node]),
            room_loss_j=float(self._energy[2, node]),
            flush_loss_j=float(self._energy[3, node]),
            probe_temperature_c=float(self._probe[i]),
            optode_o2_umol_l=float(self._optode[i]),
            lamp_hours_h=float(self._lamp_s[i] / 3600.0),
        )

    # ============================================================ internals
    def _chamber(self, chamber_id: str) -> int:
        """Index of a chamber; also brings commands given since the last call into effect."""
        try:
            i = self._index[chamber_id]
        except KeyError:
            raise KeyError(f"no chamber {chamber_id!r} in this rack") from None
        self._sync()
        return i

    def _sync(self) -> None:
        """Apply commands given since the last look (they take effect at the present time)."""
        if self._dirty:
            self._refresh_actuators()
            self._deliver()

    def _settle(self) -> None:
        """Bring faults, actuators and the delay lines up to the present time."""
        began, changed = self._book.update(self._t)
        for entry in began:
            self._freeze(entry)
        if changed or self._dirty:
            self._refresh_actuators()
        self._deliver()

    def _freeze(self, entry: ScheduledFault) -> None:
        """Remember what a stuck sensor shows from now on."""
        if entry.fault.kind is not FaultKind.STUCK:
            return
        for i in entry.chambers:
            if entry.fault.sensor == "temperature":
                entry.frozen[i] = self._measure_temperature(i)
            elif entry.fault.sensor == "optode":
                entry.frozen[i] = self._measure_optode(i)
            elif entry.fault.sensor == "par":
                entry.frozen[i] = self._measure_par(i)
            else:
                entry.frozen[i] = self._measure_flow(i)

    def _refresh_actuators(self) -> None:
        """Apply faults to the commands and send changed heater/chiller power down the line."""
        p = self._p
        drv = p.driver_of_node
        self._dirty = False
        if not self._book.active:
            self._lamp_pct = self._cmd[2].copy()
            self._pump_pct = self._cmd[3].copy()
            heater = self._cmd[0, drv]
            chiller = self._cmd[1, drv]
        else:
            masks = self._book.masks
            powered = ~(masks.power_off | masks.rack_power_off)
            self._lamp_pct = np.where(powered, self._cmd[2], 0.0)
            self._pump_pct = np.where(powered & ~masks.pump_failed, self._cmd[3], 0.0)
            node_of, m = p.node_of_chamber, self._m
            stuck_on = np.bincount(node_of, masks.heater_on, m) > 0
            stuck_off = np.bincount(node_of, masks.heater_off, m) > 0
            chiller_dead = np.bincount(node_of, masks.chiller_failed, m) > 0
            node_powered = powered[drv]
            heater = np.where(stuck_on, 100.0, self._cmd[0, drv])
            heater = np.where(stuck_off | ~node_powered, 0.0, heater)
            chiller = np.where(chiller_dead | ~node_powered, 0.0, self._cmd[1, drv])
        self._heater_pct, self._chiller_pct = heater, chiller
        self._lamp_new_par = lamp_curve(self._lamp_pct, p.par_at_full, p.curve_shape)
        self._lit = (self._lamp_pct > 0.0).astype(float)
        self._warmth = np.where(p.warmup_tau_s > 0.0, self._warmth, self._lit)
        pump = pump_fraction(self._pump_pct, p.dead_band_pct)
        self._flow_cm_s = pump * p.flow_at_full_cm_s
        self._flush_l_s = pump * p.flush_at_full_l_s
        self._derive_water()
        watts = np.empty((2, self._m))
        np.multiply(heater, p.heater_max_w / 100.0, out=watts[0])
        np.multiply(chiller, p.chiller_max_w / 100.0, out=watts[1])
        changed = np.flatnonzero((watts != self._sent_w).any(axis=0))
        for j in changed:
            line = self._line[j]
            arrive = self._t + float(p.dead_time_s[j])
            if line and line[-1][0] == arrive:
                line.pop()
            line.append((arrive, float(watts[0, j]), float(watts[1, j])))
        self._sent_w = watts

    def _deliver(self) -> None:
        """Let actuator changes whose dead time has passed reach the water."""
        for j, line in enumerate(self._line):
            while line and line[0][0] <= self._t + _EPS_S:
                _, heater_w, chiller_w = line.popleft()
                self._water_w[0, j] = heater_w
                self._water_w[1, j] = chiller_w

    def _next_event(self) -> float:
        best = self._book.next_boundary(self._t)
        for line in self._line:
            if line and line[0][0] < best:
                best = line[0][0]
        return best

    def _derive_water(self) -> None:
        """Recompute what depends on pump flow and water volume."""
        p = self._p
        volume = self._volume
        own = np.bincount(p.node_of_chamber, volume * p.rho_cp_j_l_k, self._m)
        self._capacity = p.bath_volume_l * p.bath_rho_cp_j_l_k + own
        flush = self._flush_l_s
        self._flush_w_k = np.bincount(p.node_of_chamber, flush * p.rho_cp_j_l_k, self._m)
        self._exchange = flush / volume + np.where(flush > 0.0, p.reaeration_per_s, 0.0)

    def _par_target(self) -> F:
        p = self._p
        age = ageing_factor(self._lamp_s / 3600.0, p.ageing_frac_per_1000_h)
        return np.asarray(self._lamp_new_par * age, dtype=float)

    def _par_now(self) -> F:
        p = self._p
        cold = p.cold_output_frac
        return np.asarray(self._par_target() * (cold + (1.0 - cold) * self._warmth), dtype=float)

    def _integrate(self, n: int, h: float) -> None:
        """Step every chamber through n sub-steps of h seconds with constant inputs."""
        p = self._p
        span = n * h
        node_of = p.node_of_chamber
        th = thermal_segment(
            self._temp,
            self._water_w[0] - self._water_w[1],
            p.ua_w_k,
            self._flush_w_k,
            self._capacity,
            p.room_temperature_c,
            p.inflow_temperature_c,
            h,
            n,
        )
        temps = th.temperature_c[:, node_of]
        temp_starts = temps[:-1]
        warmth = first_order(self._warmth, self._lit, p.warmup_tau_s, h, n)
        cold = p.cold_output_frac
        par_starts = self._par_target() * (cold + (1.0 - cold) * warmth[:-1])
        o2 = oxygen_segment(
            self._o2,
            temp_starts,
            par_starts,
            self._sat(temp_starts),
            self._exchange,
            self._volume,
            p,
            h,
        )
        o2_path = np.concatenate((self._o2[None, :], o2))
        self._optode = lag_segment(self._optode, o2_path, p.optode_tau_s, h)[-1]
        self._probe = lag_segment(self._probe, temps, p.temperature_tau_s, h)[-1]
        self._o2 = o2[-1]
        self._temp = th.temperature_c[-1]
        self._warmth = warmth[-1]
        self._lamp_s = self._lamp_s + self._lit * span
        self._energy[:2] += self._water_w * span
        self._energy[2] += th.room_loss_j
        self._energy[3] += th.flush_loss_j
        leak = self._book.masks.leak_l_s
        if leak.any():
            floor = _MIN_VOLUME_FRAC * p.volume_l
            self._volume = np.maximum(self._volume - leak * span, floor)
            self._derive_water()

    def _reachable(self, i: int, sensor: str) -> object | None:
        """Raise SensorNoReply if the sensor is silent; return a stuck value if frozen."""
        if self._book.comm_down(i, _DEVICE_OF_SENSOR[sensor]):
            raise SensorNoReply(self.chamber_ids[i], sensor)
        frozen: object | None = None
        for entry in self._book.sensor_faults(i, sensor):
            if entry.fault.kind is FaultKind.DROPOUT:
                raise SensorNoReply(self.chamber_ids[i], sensor)
            if entry.fault.kind is FaultKind.STUCK:
                frozen = entry.frozen.get(i)
        return frozen

    def _measure_temperature(self, i: int) -> float:
        p = self._p
        value = noisy(
            self._probe[i] + p.temperature_offset_c[i], p.temperature_noise_c[i], self._rng
        )
        return value + fault_offset(self._book.sensor_faults(i, "temperature"), self._t, self._rng)

    def _measure_optode(self, i: int) -> OptodeReading:
        p = self._p
        o2 = self._optode[i] + p.optode_offset_umol_l[i] + p.optode_drift_umol_l_per_s[i] * self._t
        o2 = noisy(o2, p.optode_noise_umol_l[i], self._rng)
        o2 += fault_offset(self._book.sensor_faults(i, "optode"), self._t, self._rng)
        temp = noisy(
            self._probe[i] + p.temperature_offset_c[i], p.temperature_noise_c[i], self._rng
        )
        sat = float(self._sat(np.full(self._n, temp))[i])
        return optode_reading(
            o2,
            temp,
            sat,
            float(p.phase0_deg[i]),
            float(p.ksv_l_umol[i]),
            float(p.quenchable_fraction[i]),
        )

    def _measure_par(self, i: int) -> float:
        true = float(self._par_now()[i])
        value = noisy(true, self._p.par_noise_frac[i] * true, self._rng)
        value += fault_offset(self._book.sensor_faults(i, "par"), self._t, self._rng)
        return max(value, 0.0)

    def _measure_flow(self, i: int) -> float:
        value = noisy(float(self._flow_cm_s[i]), self._p.flow_noise_cm_s[i], self._rng)
        value += fault_offset(self._book.sensor_faults(i, "flow"), self._t, self._rng)
        return max(value, 0.0)
