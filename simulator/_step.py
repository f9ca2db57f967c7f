"""One segment of simulated time: every chamber stepped at once, no Python loop over steps.

Rule: an update function in the manner of a state-space model's ``update``: the water state
at the segment start and the inputs held over it go in, the state at the end and the heat
that flowed come out. Nothing here reads a clock or draws a random number; the only memory
is a cache of coefficient tables for the sub-step grids and water configurations seen
recently, so that a segment costs a few dozen array operations whatever its length.

Within a segment, pump flow and water volume are constant; heater and chiller power may
change at sub-step boundaries (actuator changes arriving after their dead time). Arrays are
chamber-major (one row per node or chamber, time along the row) so that time sums are
contiguous dot products.

How a segment of n sub-steps of h seconds is solved:

- Each thermal node obeys C·dT/dt = P − UA·(T − T_room) − G·(T − T_in), exactly:
  T_m = T∞ + (T_0 − T∞)·a^m with a = e^(−h/τ), τ = C/(UA + G), plus, for a power change
  arriving at boundary k that moves T∞ by Δ, Δ·(1 − a^(m−k)) for m > k (superposition).
- Oxygen obeys dC/dt = S(T, I) − k·(C − C_sat(T)) with S and C_sat held at their sub-step
  start values (exact exponential step), C_m = a_o·C_(m−1) + φ·S_(m−1) + (1 − a_o)·C_sat,(m−1)
  with a_o = e^(−k·h), φ = (1 − a_o)/k. The end O2, the optode's lagged end value (first-order
  hold, see :func:`simulator._physics.lag_weights`) and a lower bound of the O2 path are all
  linear in (S, C_sat, C_0, optode_0), so one dot product with precomputed weights gives all
  three. Only when the bound is negative is the floored recurrence (C ≥ 0) stepped.
- The probe's lagged end value is a dot product of the chamber temperature path.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray

from simulator._actuators import Arrivals
from simulator._oxygen import Metabolism
from simulator._params import RackParams
from simulator._physics import lag_weights, recurrence
from simulator._science import ZERO_CELSIUS_K, SaturationTable

__all__ = ["Drive", "Stepper", "WaterState"]

F = NDArray[np.float64]

_CACHE_SIZE = 64
_SETTLED = 1e-9  # a lamp within this of fully warm (or cold) counts as settled
_MAX_SCALED_EXPONENT = 500.0  # k·h·n up to this: the O2 sums scaled by a_o^(−m) stay finite
_BOUND_MARGIN_C = 1e-6  # rounding of a path against its bound (°C): far above 1 ulp


class WaterState(NamedTuple):
    """What the water and the sensors remember.

    Attributes
    ----------
    temp_c
        Temperature of each thermal node, °C, shape ``(M,)``.
    o2_umol_l
        Dissolved O2 of each chamber, µmol L⁻¹, shape ``(N,)``.
    probe_c
        Lagged temperature inside each chamber's probe, °C, shape ``(N,)``.
    optode_umol_l
        Lagged O2 inside each chamber's optode, µmol L⁻¹, shape ``(N,)``.
    warmth
        Lamp warm-up state, 0 (cold) to 1 (warm), dimensionless, shape ``(N,)``.
    """

    temp_c: F
    o2_umol_l: F
    probe_c: F
    optode_umol_l: F
    warmth: F


class Drive(NamedTuple):
    """Inputs held over a segment (actuators after faults, water after leaks).

    Attributes
    ----------
    water_w
        Heater and chiller power reaching each node at the segment start, W, two lists of M
        values.
    arrivals
        Power changes reaching the water at sub-step boundaries inside the segment.
    lit
        1 where the lamp is on, else 0, dimensionless, shape ``(N,)``.
    par_warm
        PAR the lamp gives when warm (drive and age applied), µmol m⁻² s⁻¹, shape ``(N,)``.
    flush_w_k
        Flushing heat flow q·ρ·cp of each node, W K⁻¹, M values.
    exchange_per_s
        O2 exchange with air-saturated water (flushing plus re-aeration), s⁻¹, N values.
    capacity_j_k
        Heat capacity of each node, J K⁻¹, shape ``(M,)``.
    volume_l
        Water in each chamber, L, shape ``(N,)``.
    water_key
        Identifies ``flush_w_k``, ``exchange_per_s``, ``capacity_j_k`` and ``volume_l``:
        equal keys promise equal arrays, dimensionless.
    """

    water_w: tuple[list[float], list[float]]
    arrivals: Arrivals
    lit: F
    par_warm: F
    flush_w_k: list[float]
    exchange_per_s: list[float]
    capacity_j_k: F
    volume_l: F
    water_key: int


@dataclass(frozen=True, slots=True)
class _Grid:
    """Coefficients and scratch space of one sub-step grid (n sub-steps of h seconds)."""

    probe_w: F  # lag weights of the temperature at t = 0..n·h, (N, n + 1)
    probe_end: F  # a^n of each probe, (N,)
    optode_w: F  # lag weights of the O2 at t = 0..n·h, (N, n + 1)
    optode_end: F
    lag_w: F  # probe_w stacked over optode_w: both sensors' lags in one dot, (2N, n + 1)
    lag_end: F  # probe_end then optode_end, (2N,)
    inv_k: F  # scratch: 1/T of the water at the sub-step starts, K⁻¹, (N, n)
    warm_decay: F  # e^(−m·h/τ_warm-up) for m = 0..n, (N, n + 1)
    back: F  # −m for m = 0..n, (n + 1,)
    terms: F  # scratch: production and respiration per sub-step, (N, 2, n)
    sums: F  # scratch: 0, then running sums of the scaled O2 inputs, (N, n + 1)
    lags: dict[tuple[int, ...], F]  # arrival pattern → −max(m − k_j, 0), (M, n + 1)


class _Water(NamedTuple):
    """Coefficients of one grid and water configuration (flows, volumes); a NamedTuple, as
    pumps change every control tick and a frozen dataclass costs more to build."""

    rate: list[float]  # h/τ of each node, M values
    rate_col: F  # the same as a column, (M, 1)
    tau_s: list[float]  # τ = C/(UA + G), s
    inv_g: list[float]  # 1/(UA + G), K W⁻¹
    t_base_c: list[float]  # (UA·T_room + G·T_in)/(UA + G), °C
    settle_k_s: list[float]  # τ(1 − a^n): ∫ of the transient per K of T_0 − T∞, s
    powers: F  # a^m for m = 0..n, (M, n + 1)
    o2_powers: F  # a_o^m = e^(−k·h·m) for m = 0..n, (N, n + 1)
    o2_scaled: F  # [φ, 1 − a_o]·a_o^(−m) for m = 1..n, (N, 2, n)
    o2_keep: F  # a_o = e^(−k·h), (N,)
    o2_gain: F  # [φ, 1 − a_o] with φ = (1 − a_o)/k in s, (N, 2, 1)
    scaled: bool  # a_o^(−n) stays finite: the scaled sums may be used
    exchanging: bool  # any chamber exchanges O2 with saturated water


class Stepper:
    """Steps every chamber of a rack through segments of constant inputs.

    Parameters
    ----------
    p
        Resolved rack parameters.
    saturation
        O2 saturation of each chamber's water as a function of temperature.
    biology
        The communities' net O2 source.

    Notes
    -----
    Arrays are worth their call overhead only along the sub-steps (``(rows, n)``); what is
    one number per node or chamber (coefficients, end values, light of settled lamps) is
    computed in plain floats, with the same operations in the same order as the array
    expressions they stand for.
    """

    def __init__(self, p: RackParams, saturation: SaturationTable, biology: Metabolism) -> None:
        self._p = p
        self._saturation = saturation
        self._bio = biology
        node_of = p.node_of_chamber
        self._node_of = node_of
        self._m = len(p.node_names)
        self._own_water = self._m == len(node_of) and bool(
            (node_of == np.arange(len(node_of))).all()
        )
        self._room_c = p.room_temperature_c
        self._cold = p.cold_output_frac
        self._warm_gain = 1.0 - p.cold_output_frac
        self._cold_list: list[float] = self._cold.tolist()
        self._gain_list: list[float] = self._warm_gain.tolist()
        self._inv_ik: list[float] = biology.inv_ik.tolist()
        self._ua: list[float] = p.ua_w_k.tolist()
        self._ua_room: list[float] = (p.ua_w_k * p.room_temperature_c).tolist()
        self._grids: dict[tuple[int, float], _Grid] = {}
        self._waters: dict[tuple[int, float, int], _Water] = {}
        self._light_key: tuple[object, object] = (None, None)
        self._light_now: F = np.zeros((len(node_of), 1))
        self._scale_key: object = None
        self._log_scale: F = np.zeros((len(node_of), 2, 1))

    # ------------------------------------------------------------------ segment
    def step(
        self, state: WaterState, drive: Drive, n: int, h: float
    ) -> tuple[WaterState, list[float]]:
        """Advance every chamber through ``n`` sub-steps of ``h`` seconds.

        Parameters
        ----------
        state
            Water and sensor state at the segment start.
        drive
            Inputs held over the segment.
        n
            Number of sub-steps, dimensionless (≥ 1).
        h
            Sub-step length, s.

        Returns
        -------
        tuple
            The state at the segment end, and ∫(T − T_room)dt of each node over the
            segment, K s, M values.
        """
        grid = self._grids.get((n, h)) or self._grid(n, h)
        water = self._waters.get((n, h, drive.water_key)) or self._water(n, h, drive)
        path, excess, bound = self._thermal(state.temp_c, drive, grid, water, n, h)
        # each chamber's temperature path above its O2 path: one dot gives both sensors' lags
        size = len(self._node_of)
        sensed = np.empty((2 * size, n + 1))
        chambers = sensed[:size]
        path.take(self._node_of, axis=0, out=chambers)
        starts = chambers[:, :-1]
        inv = np.add(starts, ZERO_CELSIUS_K, out=grid.inv_k)
        np.divide(1.0, inv, out=inv)
        light, warmth_end = self._light(state.warmth, drive, grid)
        bio = self._bio
        terms = grid.terms
        if self._scale_key is not drive.volume_l:
            self._log_scale = bio.log_scale(drive.volume_l)
            self._scale_key = drive.volume_l
        bio.factors(inv, self._log_scale, light, terms)
        # the bound says "nowhere near the threshold" without a reduction over the path
        if bio.stressed and bound + _BOUND_MARGIN_C > bio.lowest_threshold_c:
            hottest = float(path.max())
            if hottest > bio.lowest_threshold_c:
                bio.stress(starts, terms, hottest)
        o2 = self._oxygen(state.o2_umol_l, starts, grid, water, sensed[size:])
        if o2.base is not sensed:  # stepped with the floor: a path of its own
            sensed[size:] = o2
        lagged = np.vecdot(grid.lag_w, sensed)
        lagged += grid.lag_end * np.concatenate((state.probe_c, state.optode_umol_l))
        end = WaterState(path[:, -1], o2[:, -1], lagged[:size], lagged[size:], warmth_end)
        return end, excess

    # ------------------------------------------------------------------ pieces
    def _thermal(
        self, temp_c: F, drive: Drive, grid: _Grid, water: _Water, n: int, h: float
    ) -> tuple[F, list[float], float]:
        """Temperature path of every node at t = 0..n·h (°C, ``(M, n + 1)``), ∫(T − T_room)dt
        of each node (K s, M values) and an upper bound of the path (°C).

        T_m = T∞ + (T_0 − T∞)·a^m, plus Δ·(1 − a^(m−k)) for m > k for each power change
        arriving at boundary k that moves T∞ by Δ. Between changes each node's path runs
        monotonically from where it is towards the T∞ then in force: without a change the
        higher of its ends bounds it, with changes the highest of its start and those T∞.
        """
        room = self._room_c
        span = n * h
        heater, chiller = drive.water_w
        inv_g = water.inv_g
        starts = temp_c.tolist()
        t_inf, lead, excess = [], [], []
        for w, c, g, base, t, k in zip(
            heater, chiller, inv_g, water.t_base_c, starts, water.settle_k_s, strict=True
        ):
            ti = (w - c) * g + base
            d = t - ti
            t_inf.append(ti)
            lead.append(d)
            excess.append((ti - room) * span + d * k)
        ends = np.array((lead, t_inf))[:, :, None]
        path = np.multiply(ends[0], water.powers)
        path += ends[1]
        if not drive.arrivals:
            return path, excess, max(max(starts), max(path[:, -1].tolist()))
        bound = max(max(starts), max(t_inf))
        settling = t_inf
        for ks, delta in drive.arrivals:
            change = [d * g for d, g in zip(delta, inv_g, strict=True)]
            settling = [ti + c for ti, c in zip(settling, change, strict=True)]
            bound = max(bound, max(settling))
            for j, k in enumerate(ks):
                if k < n:
                    left = n - k
                    integral = left * h + water.tau_s[j] * math.expm1(-left * water.rate[j])
                    excess[j] += change[j] * integral
            # Δ·(1 − a^(m−k)) = −Δ·expm1(−(m − k)·h/τ) for m > k, 0 before
            rise = np.multiply(self._lags(grid, ks, n), water.rate_col)
            np.expm1(rise, out=rise)
            rise *= np.array(change)[:, None]
            path -= rise
        return path, excess, bound

    def _oxygen(self, o2_0: F, starts: F, grid: _Grid, water: _Water, out: F | None = None) -> F:
        """O2 of every chamber at t = 0..n·h, µmol L⁻¹, shape ``(N, n + 1)`` (into ``out``,
        shape ``(N, n + 1)``, unless the floored recurrence had to be stepped).

        C_m = a_o·C_(m−1) + φ·S_(m−1) + (1 − a_o)·C_sat,(m−1) summed in closed form,
        C_m = a_o^m·(C_0 + Σ_(j<m) a_o^(−(j+1))·u_j), with the net source S and saturation
        of the sub-step starts; where that could dip below 0 (the floor) or a_o^(−n) would
        overflow, the recurrence is stepped instead.
        """
        terms = grid.terms
        net = np.subtract(terms[:, 0], terms[:, 1])
        saturation = self._saturation.rows(starts) if water.exchanging else None
        if water.scaled:
            inputs = net * water.o2_scaled[:, 0]
            if saturation is not None:
                inputs += saturation * water.o2_scaled[:, 1]
            sums = grid.sums
            np.add.accumulate(inputs, axis=1, out=sums[:, 1:])  # the running sums (cumsum)
            path = np.add(sums, o2_0[:, None], out=out)
            path *= water.o2_powers
            if np.minimum.reduce(path, axis=None) >= 0.0:
                return path
        gain = water.o2_gain
        inputs = net * gain[:, 0]
        if saturation is not None:
            inputs += saturation * gain[:, 1]
        stepped = recurrence(water.o2_keep, inputs.T, o2_0, floor=True).T
        return np.concatenate((o2_0[:, None], stepped), axis=1)

    def _lags(self, grid: _Grid, ks: tuple[int, ...], n: int) -> F:
        """−max(m − k_j, 0) for m = 0..n of every node (cached per arrival pattern; the
        sign makes its product with h/τ the exponent −(m − k)·h/τ itself)."""
        found = grid.lags.get(ks)
        if found is None:
            if len(grid.lags) >= _CACHE_SIZE:
                grid.lags.clear()
            k = np.array(ks, dtype=float)[:, None]
            found = grid.lags[ks] = -np.maximum(-grid.back[None, :] - k, 0.0)
        return found

    def _light(self, warmth: F, drive: Drive, grid: _Grid) -> tuple[F, F]:
        """Light limitation tanh(I/Ik) (``(N, 1)``, or ``(N, n)`` while lamps warm) and end warmth.

        A settled lamp (warmth equal to ``lit``) hands ``lit`` itself on as its warmth, so
        that the next segment recognises it by identity.
        """
        lit = drive.lit
        if warmth is lit or (warmth == lit).all():
            # The rack replaces these arrays, never mutates them: identity says "unchanged".
            seen_par, seen_lit = self._light_key
            if seen_par is drive.par_warm and seen_lit is lit:
                return self._light_now, lit
            # Metabolism.light of par_warm·(cold + gain·lit), one chamber at a time
            limited = []
            for warm, on, cold, gain, inv_ik in zip(
                drive.par_warm.tolist(),
                lit.tolist(),
                self._cold_list,
                self._gain_list,
                self._inv_ik,
                strict=True,
            ):
                x = 2.0 * min(warm * (cold + gain * on) * inv_ik, 40.0)
                limited.append(-2.0 / (math.exp(x) + 1.0) + 1.0)
            self._light_now = np.array(limited)[:, None]
            self._light_key = (drive.par_warm, lit)
            return self._light_now, lit
        path = (warmth - lit)[:, None] * grid.warm_decay
        path += lit[:, None]
        end = path[:, -1]
        settled = np.abs(end - lit) < _SETTLED
        end = lit if settled.all() else np.where(settled, lit, end)
        glow = self._warm_gain[:, None] * path[:, :-1]
        glow += self._cold[:, None]
        glow *= drive.par_warm[:, None]
        return self._bio.light(glow), end

    # ------------------------------------------------------------------ caches
    def _grid(self, n: int, h: float) -> _Grid:
        key = (n, h)
        grid = self._grids.get(key)
        if grid is None:
            if len(self._grids) >= _CACHE_SIZE:
                self._grids.clear()
            grid = self._grids[key] = self._make_grid(n, h)
        return grid

    def _make_grid(self, n: int, h: float) -> _Grid:
        p = self._p
        chambers = len(p.chamber_ids)
        probe_end, probe_w = lag_weights(p.temperature_tau_s, h, n)
        optode_end, optode_w = lag_weights(p.optode_tau_s, h, n)
        tau = np.maximum(p.warmup_tau_s, 1e-9)
        decay = np.exp(-(np.arange(n + 1, dtype=float)[None, :] * h) / tau[:, None])
        probe_rows, optode_rows = probe_w.T, optode_w.T
        return _Grid(
            probe_w=np.ascontiguousarray(probe_rows),
            probe_end=probe_end,
            optode_w=np.ascontiguousarray(optode_rows),
            optode_end=optode_end,
            lag_w=np.concatenate((probe_rows, optode_rows)),
            lag_end=np.concatenate((probe_end, optode_end)),
            inv_k=np.zeros((chambers, n)),
            warm_decay=decay,
            back=-np.arange(n + 1, dtype=float),
            terms=np.zeros((chambers, 2, n)),
            sums=np.zeros((chambers, n + 1)),
            lags={},
        )

    def _water(self, n: int, h: float, drive: Drive) -> _Water:
        key = (n, h, drive.water_key)
        water = self._waters.get(key)
        if water is None:
            # Kept for the present water configuration only: the rack numbers each new one
            # afresh, so the tables of an earlier configuration are never asked for again
            # (and a control tick brings a new one, the pumps trimming); a new key clears them.
            if len(self._waters) >= _CACHE_SIZE or any(
                k[2] != drive.water_key for k in self._waters
            ):
                self._waters.clear()
            water = self._waters[key] = self._make_water(n, h, drive)
        return water

    def _make_water(self, n: int, h: float, drive: Drive) -> _Water:
        grid = self._grid(n, h)
        inflow = self._p.inflow_temperature_c
        rate, tau, inv_g, t_base, settle = [], [], [], [], []
        for ua, ua_room, flush, capacity in zip(
            self._ua, self._ua_room, drive.flush_w_k, drive.capacity_j_k.tolist(), strict=True
        ):
            g_tot = ua + flush
            t = capacity / g_tot
            r = h / t
            inv = 1.0 / g_tot
            rate.append(r)
            tau.append(t)
            inv_g.append(inv)
            t_base.append((ua_room + flush * inflow) * inv)
            settle.append(-t * math.expm1(-n * r))
        kh, phi, fresh = [], [], []
        for k in drive.exchange_per_s:
            x = k * h
            f = -math.expm1(-x)
            kh.append(x)
            phi.append(f / k if x > 0.0 else h)
            fresh.append(f)
        # a^m and a_o^m for m = 0..n, both as e^(−m·h/τ) and e^(−m·k·h), in one exp
        m = len(rate)
        rates = np.array(rate + kh)[:, None]
        powers = np.exp(rates * grid.back)
        o2_powers = powers[m:]
        gains = np.array((phi, fresh)).T[:, :, None]
        fastest = max(kh, default=0.0)
        scaled = fastest * n <= _MAX_SCALED_EXPONENT
        o2_scaled = gains / o2_powers[:, None, 1:] if scaled else gains
        return _Water(
            rate=rate,
            rate_col=rates[:m],
            tau_s=tau,
            inv_g=inv_g,
            t_base_c=t_base,
            settle_k_s=settle,
            powers=powers[:m],
            o2_powers=o2_powers,
            o2_scaled=o2_scaled,
            o2_keep=o2_powers[:, 1],
            o2_gain=gains,
            scaled=scaled,
            exchanging=fastest > 0.0,
        )
