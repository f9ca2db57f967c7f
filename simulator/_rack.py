"""The simulated rack: state of every chamber, stepped by whoever owns time.

Rule: the rack never reads a clock and never sleeps; ``advance(dt_s)`` (or
``run_open_loop``, a whole drive program at once, see :mod:`simulator._openloop`) is the
only way time passes. ``advance`` cuts the interval at every fault boundary (and at a heater
or chiller change that arrives between sub-step boundaries), so pumps, lamps and faults are
constant within each segment, then steps the segment in sub-steps no longer than
``physics_step_s`` with :class:`simulator._step.Stepper`. Readings draw noise from one seeded
generator per rack.

Speed: a call costs a few dozen array operations whatever its length; what does not change
between calls (coefficient tables, light weights, effective drives, fault state) is cached,
and state that only the truth needs (lamp hours, heater energy, flushing loss) is kept in a
form that costs nothing per step.

Shared baths: the heater and chiller of a bath node are driven by the bath's first chamber
(in rig order); heater and chiller commands given to the other chambers of the bath are kept
but have no effect, and :meth:`Rack.outputs` reports the bath's heater and chiller for every
chamber in it. Faults on the heater or chiller of any chamber of a bath act on the bath's
heater or chiller; so does a power loss of the driving chamber.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import datetime, timedelta

import numpy as np
from numpy.typing import NDArray

from controller.rig import Fault, FaultKind, Rig
from controller.science.oxygen import solubility_umol_l_scalar
from simulator._actuators import Actuators, Arrivals, drive_pct, substeps
from simulator._faults import FaultBook, ScheduledFault
from simulator._heat import HeatLedger
from simulator._openloop import OpenLoopRun, OpenLoopSchedule, run_open_loop
from simulator._oxygen import Metabolism, metabolism
from simulator._params import resolve
from simulator._physics import aged_lamps, water_exchange
from simulator._readout import Sweep, sweep
from simulator._science import SaturationTable, saturation_umol_l
from simulator._sensors import fault_offset, noisy, optode_reading
from simulator._step import Drive, Stepper, WaterState
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
        self._m = len(p.node_names)
        self._rng = np.random.default_rng(p.seed if seed is None else seed)
        self._table = SaturationTable(p.salinity, p.pressure_kpa)
        self._bio = Metabolism(p)
        self._stepper = Stepper(p, self._table, self._bio)
        self._step_s = p.physics_step_s
        self._instant_lamps = not bool((p.warmup_tau_s > 0.0).all())
        self._ageing = bool((p.ageing_frac_per_1000_h > 0.0).any())
        self._t = 0.0
        self._act = Actuators(p)
        temps = p.initial_node_temperature_c[p.node_of_chamber]
        o2 = self._saturation(temps) * p.initial_o2_sat_frac
        self._water = WaterState(
            temp_c=p.initial_node_temperature_c.copy(),
            o2_umol_l=o2,
            probe_c=temps.copy(),
            optode_umol_l=o2.copy(),
            warmth=np.zeros(len(temps)),
        )
        self._volume = p.volume_l.copy()
        self._volume_version = 0
        # Lamp hours: lit time up to _lamp_since_s, plus the lit pattern since then.
        self._lamp_base_s: list[float] = (p.lamp_hours0_h * 3600.0).tolist()
        self._lamp_since_s = 0.0
        self._lamp_lit = np.zeros(len(temps))
        self._lamp_version = -1
        # PAR of the warm lamps at their drive and present age; while lit it ages by the
        # factor (1 − loss)^(Δh/1000) = e^(λ·lit·span) per segment, cached per span for the
        # present lit pattern (cleared when the pattern, i.e. the act.lit array, changes).
        self._age_rate = (
            np.log1p(
                -p.ageing_frac_per_1000_h,
                out=np.full(len(temps), -np.inf),
                where=p.ageing_frac_per_1000_h < 1.0,
            )
            / 3.6e6
        )
        self._age_steps: dict[float, F] = {}
        self._par_warm = np.zeros(len(temps))
        # Heat bookkeeping (heater and chiller energy live with the actuators).
        self._heat = HeatLedger(self._m, p.room_temperature_c, p.inflow_temperature_c)
        self._water_key: tuple[int, int] = (-1, -1)
        self._water_id = 0
        self._flush_w_k: list[float] = [0.0] * self._m
        self._exchange: list[float] = [0.0] * len(temps)
        self._node_capacity = self._capacity()
        self._capacity_version = self._volume_version  # the volumes _node_capacity is for
        self._node_list: list[int] = p.node_of_chamber.tolist()
        self._rho_cp: list[float] = p.rho_cp_j_l_k.tolist()
        self._reaeration: list[float] = p.reaeration_per_s.tolist()
        self._lamp_keep: list[float] = (1.0 - p.ageing_frac_per_1000_h).tolist()
        self._sweep_consts: object | None = None  # sensor constants of Rack.sweep (fixed)
        self._book = FaultBook(p.chamber_ids)
        self._fault_version = 0  # raised by _settle whenever the active faults change
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
        if not 0.0 <= dt_s < math.inf:
            raise ValueError(f"dt_s must be a finite number ≥ 0, got {dt_s!r}")
        act = self._act
        if act.dirty:
            self._refresh(False)
            act.deliver(self._t)
        t_end = self._t + dt_s
        step = self._step_s
        book = self._book
        while self._t < t_end - _EPS_S:
            t0 = self._t
            seg_end = min(t_end, book.next_edge_s, t0 + _MAX_SUBSTEPS * step)
            if book.masks.leaking and t0 + _LEAK_SEGMENT_S < seg_end:
                seg_end = t0 + _LEAK_SEGMENT_S
            n, h = substeps(seg_end - t0, step)
            arrivals, off_grid = act.arrivals(t0, seg_end, n, h)
            while off_grid is not None:
                seg_end = off_grid
                n, h = substeps(seg_end - t0, step)
                arrivals, off_grid = act.arrivals(t0, seg_end, n, h)
            self._integrate(n, h, arrivals)
            self._t = seg_end
            self._settle()
        if self._t < t_end:
            self._t = t_end

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
        self._act.command(
            i,
            None if heater_pct is None else drive_pct(heater_pct, "heater_pct"),
            None if chiller_pct is None else drive_pct(chiller_pct, "chiller_pct"),
            None if lamp_pct is None else drive_pct(lamp_pct, "lamp_pct"),
            None if pump_pct is None else drive_pct(pump_pct, "pump_pct"),
        )

    def set_outputs_all(
        self, commands: Sequence[tuple[str, float, float, float, float]]
    ) -> list[Exception | None]:
        """Command several chambers at once, as :meth:`set_outputs` on each row in turn.

        Parameters
        ----------
        commands
            Per row: chamber identifier, then heater, chiller, lamp and pump drive, % each
            (0–100).

        Returns
        -------
        list
            Per row None, or the error :meth:`set_outputs` would raise for it (that chamber is
            then left as it was; the other rows still take effect).
        """
        return self._act.command_rows(self._index, commands)

    def outputs(self, chamber_id: str) -> Outputs:
        """What a chamber's actuators do now (after faults); heater/chiller are its node's."""
        i = self._chamber(chamber_id)
        node = self._p.node_of_chamber[i]
        act = self._act
        return Outputs(
            heater_pct=float(act.heater_pct[node]),
            chiller_pct=float(act.chiller_pct[node]),
            lamp_pct=act.lamp_pct[i],
            pump_pct=act.pump_pct[i],
        )

    @property
    def fault_version(self) -> int:
        """A counter raised whenever the set of active faults changes (a fault beginning or
        ending as time passes, injected or cleared), dimensionless: equal values promise the
        same active faults, so whatever depends only on them may be kept meanwhile."""
        return self._fault_version

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
        return float(frozen) if isinstance(frozen, float) else self._measure_temperature(i)

    def read_optode(self, chamber_id: str) -> OptodeReading:
        """Optode reading; raises SensorNoReply when the optode is silent."""
        i = self._chamber(chamber_id)
        frozen = self._reachable(i, "optode")
        return frozen if isinstance(frozen, OptodeReading) else self._measure_optode(i)

    def read_par(self, chamber_id: str) -> float:
        """PAR sensor reading, µmol photons m⁻² s⁻¹; raises SensorNoReply when silent."""
        i = self._chamber(chamber_id)
        frozen = self._reachable(i, "par")
        return float(frozen) if isinstance(frozen, float) else self._measure_par(i)

    def read_flow(self, chamber_id: str) -> float:
        """Flow sensor reading, cm s⁻¹; raises SensorNoReply when silent."""
        i = self._chamber(chamber_id)
        frozen = self._reachable(i, "flow")
        return float(frozen) if isinstance(frozen, float) else self._measure_flow(i)

    def sweep(self, chamber_ids: Sequence[str], optode: Sequence[bool]) -> Sweep:
        """Read several chambers at once, as the one-by-one reads in that order would.

        Per chamber: temperature, PAR, flow and level, then the optode where ``optode`` says
        (same values, same noise draws; see :mod:`simulator._readout`); a silent sensor
        gives None, any other error is returned in :attr:`Sweep.errors`.
        """
        self._sync()
        return sweep(self, chamber_ids, optode)

    def read_level_ok(self, chamber_id: str) -> bool:
        """Level switch: False once a leak has lost more than the rig's alarm share."""
        i = self._chamber(chamber_id)
        lost = 1.0 - self._volume[i] / self._p.volume_l[i]
        return bool(lost < self._p.level_alarm_frac)

    def comm_ok(self, chamber_id: str, device: str) -> bool:
        """Whether a chamber's ``device`` ('modbus' or 'optode') answers now."""
        return not self._book.comm_down(self._chamber(chamber_id), device)

    def comm_ok_all(self, device: str) -> tuple[bool, ...]:
        """:meth:`comm_ok` of every chamber in rig order (no fault active: all True)."""
        self._sync()
        book = self._book
        if not book.active:
            return (True,) * len(self.chamber_ids)
        return tuple(not book.comm_down(i, device) for i in range(len(self.chamber_ids)))

    # ---------------------------------------------------------------- truth
    def truth(self, chamber_id: str) -> ChamberTruth:
        """The true state of a chamber (no sensor in the way)."""
        i = self._chamber(chamber_id)
        p = self._p
        node = p.node_of_chamber[i]
        water = self._water
        temps = water.temp_c[p.node_of_chamber]
        par = self._par_now()
        heat = self._act.energy_j(self._t)
        gpp, resp = metabolism(par, temps, p)
        sat = float(self._saturation(temps)[i])
        o2 = float(water.o2_umol_l[i])
        return ChamberTruth(
            temperature_c=float(temps[i]),
            o2_umol_l=o2,
            o2_sat_pct=100.0 * o2 / sat,
            o2_saturation_umol_l=sat,
            par=float(par[i]),
            flow_cm_s=self._act.flow_cm_s[i],
            incubation_open=self._act.flush_l_s[i] > 0.0,
            water_volume_l=float(self._volume[i]),
            gpp_umol_m2_h=float(gpp[i]),
            resp_umol_m2_h=float(resp[i]),
            net_umol_m2_h=float(gpp[i] - resp[i]),
            heater_w=self._act.water[0][node],
            chiller_w=self._act.water[1][node],
            heat_capacity_j_k=float(self._capacity()[node]),
            heater_energy_j=float(heat[0, node]),
            chiller_energy_j=float(heat[1, node]),
            room_loss_j=float(p.ua_w_k[node] * self._heat.excess_k_s[node]),
            flush_loss_j=self._heat.flush_loss_j()[node],
            probe_temperature_c=float(water.probe_c[i]),
            optode_o2_umol_l=float(water.optode_umol_l[i]),
            lamp_hours_h=float(self._lamp_s()[i] / 3600.0),
        )

    def water_temperatures_c(self) -> F:
        """True water temperature of every chamber in rig order, °C, shape ``(N,)``."""
        return np.asarray(self._water.temp_c[self._p.node_of_chamber], dtype=float)

    # ---------------------------------------------------------- open loop
    def run_open_loop(self, schedule: OpenLoopSchedule) -> OpenLoopRun:
        """Run a whole drive program from now, integrated in vectorised blocks.

        Gives the trajectories (to rounding) of calling :meth:`set_outputs` on every chamber
        at each of the schedule's switches and :meth:`advance` to the next: same sub-steps,
        dead times and faults. The rack ends at the program's end, the last row commanded.
        Sensors are not read (no noise is drawn), except that a stuck-sensor fault beginning
        during the program freezes its reading as it would when stepping.

        Parameters
        ----------
        schedule
            Switch times (s from now) and drives (%) per row and chamber.

        Returns
        -------
        OpenLoopRun
            The true state at the end of every row.
        """
        return run_open_loop(self, schedule)

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
        if self._act.dirty:
            self._refresh(False)
            self._act.deliver(self._t)

    def _settle(self) -> None:
        """Bring faults, actuators and the delay lines up to the present time."""
        began, changed = self._book.update(self._t)
        if changed:
            self._fault_version += 1
        for entry in began:
            self._freeze(entry)
        if changed or self._act.dirty:
            self._refresh(changed)
        self._act.deliver(self._t)

    def _refresh(self, faults_changed: bool) -> None:
        act = self._act
        act.refresh(self._t, self._book, faults_changed)
        if act.lamp_version != self._lamp_version:  # lamps changed: new PAR, new lit pattern
            since = self._t - self._lamp_since_s
            lamps = (self._lamp_base_s, self._lamp_lit, act.new_lamp_par)
            base, par = aged_lamps(*lamps, since, self._lamp_keep)
            self._lamp_base_s = base
            self._lamp_since_s = self._t
            if act.lit is not self._lamp_lit:  # the ageing steps depend on the lit pattern
                self._age_steps.clear()
            self._lamp_lit = act.lit
            self._lamp_version = act.lamp_version
            self._par_warm = np.array(par)
        if self._instant_lamps:  # lamps without warm-up are warm (or cold) at once
            tau = self._p.warmup_tau_s
            warmth = np.where(tau > 0.0, self._water.warmth, self._act.lit)
            if not np.array_equal(warmth, self._water.warmth):
                w = self._water
                self._water = WaterState(w.temp_c, w.o2_umol_l, w.probe_c, w.optode_umol_l, warmth)

    def _freeze(self, entry: ScheduledFault) -> None:
        """Remember what a stuck sensor shows from now on."""
        if entry.fault.kind is not FaultKind.STUCK:
            return
        measure = {
            "temperature": self._measure_temperature,
            "optode": self._measure_optode,
            "par": self._measure_par,
            "flow": self._measure_flow,
        }[entry.fault.sensor or ""]
        for i in entry.chambers:
            entry.frozen[i] = measure(i)

    def _capacity(self) -> F:
        """Heat capacity of each thermal node, J K⁻¹."""
        p = self._p
        own = np.bincount(p.node_of_chamber, self._volume * p.rho_cp_j_l_k, self._m)
        return np.asarray(p.bath_volume_l * p.bath_rho_cp_j_l_k + own, dtype=float)

    def _saturation(self, temps: F) -> F:
        """Air-saturation O2 of each chamber's water at ``temps`` (°C), µmol L⁻¹."""
        p = self._p
        return saturation_umol_l(temps, p.salinity, p.pressure_kpa)

    def _lamp_s(self) -> F:
        """Seconds each lamp has been lit, s."""
        base = np.array(self._lamp_base_s, dtype=float)
        return np.asarray(base + self._lamp_lit * (self._t - self._lamp_since_s), dtype=float)

    def _par_now(self) -> F:
        cold = self._p.cold_output_frac
        return np.asarray(self._par_warm * (cold + (1.0 - cold) * self._water.warmth))

    def _new_water(self, key: tuple[int, int]) -> None:
        """Flows or volumes changed: close the flushing epoch and recompute what follows
        (a control tick comes here every time, its pumps trimming)."""
        flush_w_k, exchange = water_exchange(
            self._act.flush_l_s, self._volume, self._node_list, self._rho_cp, self._reaeration
        )
        self._heat.new_epoch(flush_w_k)
        self._set_water(key, flush_w_k, exchange)

    def _configure_water(self, key: tuple[int, int]) -> None:
        """Flushing heat flow, O2 exchange and heat capacity, without closing the epoch (the
        open-loop integrator closes it with totals of its own)."""
        flush_w_k, exchange = water_exchange(
            self._act.flush_l_s, self._volume, self._node_list, self._rho_cp, self._reaeration
        )
        self._heat.set_flow(flush_w_k)
        self._set_water(key, flush_w_k, exchange)

    def _set_water(
        self, key: tuple[int, int], flush_w_k: list[float], exchange: list[float]
    ) -> None:
        """Take a new water configuration (heat capacity kept per volume version)."""
        self._water_key = key
        self._water_id += 1
        self._flush_w_k = flush_w_k
        self._exchange = exchange
        if self._capacity_version != self._volume_version:
            self._node_capacity = self._capacity()
            self._capacity_version = self._volume_version

    def _integrate(self, n: int, h: float, arrivals: Arrivals) -> None:
        """Step every chamber from now through n sub-steps of h seconds."""
        act = self._act
        key = (act.flow_version, self._volume_version)
        if key != self._water_key:
            self._new_water(key)
        drive = Drive(
            act.water,
            arrivals,
            act.lit,
            self._par_warm,
            self._flush_w_k,
            self._exchange,
            self._node_capacity,
            self._volume,
            self._water_id,
        )
        self._water, excess = self._stepper.step(self._water, drive, n, h)
        span = n * h
        if act.any_lit and self._ageing:
            factor = self._age_steps.get(span)
            if factor is None:
                exponent = np.where(act.lit > 0.0, self._age_rate * span, 0.0)
                factor = self._age_steps[span] = np.exp(exponent)
            self._par_warm = self._par_warm * factor
        self._heat.add(excess, span)
        masks = self._book.masks
        if masks.leaking:
            p = self._p
            self._volume = np.maximum(
                self._volume - masks.leak_l_s * span, _MIN_VOLUME_FRAC * p.volume_l
            )
            self._volume_version += 1

    def _sample(self) -> F:
        """Temperature, O2, PAR, probe and optode of every chamber now, shape ``(5, N)``."""
        w = self._water
        temps = w.temp_c[self._p.node_of_chamber]
        return np.stack((temps, w.o2_umol_l, self._par_now(), w.probe_c, w.optode_umol_l))

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
        true = float(self._water.probe_c[i]) + float(p.temperature_offset_c[i])
        value = noisy(true, float(p.temperature_noise_c[i]), self._rng)
        return value + fault_offset(self._book.sensor_faults(i, "temperature"), self._t, self._rng)

    def _measure_optode(self, i: int) -> OptodeReading:
        p = self._p
        drift = float(p.optode_drift_umol_l_per_s[i]) * self._t
        o2 = float(self._water.optode_umol_l[i]) + float(p.optode_offset_umol_l[i]) + drift
        o2 = noisy(o2, float(p.optode_noise_umol_l[i]), self._rng)
        o2 += fault_offset(self._book.sensor_faults(i, "optode"), self._t, self._rng)
        true_temp = float(self._water.probe_c[i]) + float(p.temperature_offset_c[i])
        temp = noisy(true_temp, float(p.temperature_noise_c[i]), self._rng)
        sat = solubility_umol_l_scalar(temp, float(p.salinity[i]), float(p.pressure_kpa))
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
        value = noisy(true, float(self._p.par_noise_frac[i]) * true, self._rng)
        value += fault_offset(self._book.sensor_faults(i, "par"), self._t, self._rng)
        return max(value, 0.0)

    def _measure_flow(self, i: int) -> float:
        value = noisy(self._act.flow_cm_s[i], float(self._p.flow_noise_cm_s[i]), self._rng)
        value += fault_offset(self._book.sensor_faults(i, "flow"), self._t, self._rng)
        return max(value, 0.0)
