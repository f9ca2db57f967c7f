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

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray
from scipy.signal import lfilter

from simulator._actuators import Arrivals
from simulator._oxygen import Metabolism
from simulator._params import RackParams
from simulator._physics import lag_weights, recurrence
from simulator._science import ZERO_CELSIUS_K, SaturationTable

__all__ = ["Drive", "Stepper", "WaterState", "o2_end_weights", "reach_weights"]

F = NDArray[np.float64]

_CACHE_SIZE = 64
_SETTLED = 1e-9  # a lamp within this of fully warm (or cold) counts as settled
_SCALED_MIN_POWER = 1e-260  # a_o^n above this: the scaled sums stay normal doubles


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
        Heater and chiller power reaching each node at the segment start, W, shape ``(2, M)``.
    arrivals
        Power changes reaching the water at sub-step boundaries inside the segment.
    lit
        1 where the lamp is on, else 0, dimensionless, shape ``(N,)``.
    par_warm
        PAR the lamp gives when warm (drive and age applied), µmol m⁻² s⁻¹, shape ``(N,)``.
    flush_w_k
        Flushing heat flow q·ρ·cp of each node, W K⁻¹, shape ``(M,)``.
    exchange_per_s
        O2 exchange with air-saturated water (flushing plus re-aeration), s⁻¹, ``(N,)``.
    capacity_j_k
        Heat capacity of each node, J K⁻¹, shape ``(M,)``.
    volume_l
        Water in each chamber, L, shape ``(N,)``.
    water_key
        Identifies ``flush_w_k``, ``exchange_per_s``, ``capacity_j_k`` and ``volume_l``:
        equal keys promise equal arrays, dimensionless.
    """

    water_w: F
    arrivals: Arrivals
    lit: F
    par_warm: F
    flush_w_k: F
    exchange_per_s: F
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
    warm_decay: F  # e^(−m·h/τ_warm-up) for m = 0..n, (N, n + 1)
    scratch: F  # [production, respiration, saturation, O2_0, optode_0] per chamber, (N, 3n + 2)
    terms: F  # view of scratch: production and respiration per sub-step, (N, 2, n)
    saturation: F  # view of scratch: saturation per sub-step, (N, n)
    start: F  # view of scratch: O2 and optode at the segment start, (N, 2)


@dataclass(frozen=True, slots=True)
class _Water:
    """Coefficients of one grid and water configuration (flows, volumes)."""

    rate: F  # h/τ of each node, (M,)
    tau_s: F  # τ = C/(UA + G), s, (M,)
    powers: F  # a^m for m = 0..n, (M, n + 1)
    inv_g: F  # 1/(UA + G), K W⁻¹, (M,)
    t_base_c: F  # (UA·T_room + G·T_in)/(UA + G), °C, (M,)
    settle_k_s: F  # τ(1 − a^n): ∫ of the transient per K of T_0 − T∞, s, (M,)
    o2: F  # weights: scratch row → [O2 end, optode end, O2 lower bound], (3, N, 3n + 2)
    o2_keep: F  # a_o = e^(−k·h), (N,)
    o2_phi: F  # φ = (1 − a_o)/k, s, (N,)
    exchanging: bool  # any chamber exchanges O2 with saturated water
    shifts: dict[tuple[int, ...], tuple[F, F]]  # arrival pattern → (step response, its ∫)


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
        self._grids: dict[tuple[int, float], _Grid] = {}
        self._waters: dict[tuple[int, float, int], _Water] = {}
        self._light_key: tuple[object, object] = (None, None)
        self._light_now: F = np.zeros((len(node_of), 1))
        self._scale_key: object = None
        self._log_scale: F = np.zeros((len(node_of), 2, 1))

    # ------------------------------------------------------------------ segment
    def step(self, state: WaterState, drive: Drive, n: int, h: float) -> tuple[WaterState, F]:
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
            segment, K s, shape ``(M,)``.
        """
        grid = self._grid(n, h)
        water = self._water(n, h, drive)
        watts = drive.water_w
        t_inf = watts[0] - watts[1]
        t_inf *= water.inv_g
        t_inf += water.t_base_c
        lead = state.temp_c - t_inf
        path = lead[:, None] * water.powers
        path += t_inf[:, None]
        excess = t_inf - self._room_c
        excess *= n * h
        excess += lead * water.settle_k_s
        for ks, delta in drive.arrivals:
            step, integral = self._shift(water, ks, n, h)
            change = np.multiply(delta, water.inv_g)
            path += change[:, None] * step
            excess += change * integral

        chambers = path if self._own_water else path.take(self._node_of, axis=0)
        starts = chambers[:, :-1]
        inv = np.add(starts, ZERO_CELSIUS_K)
        np.divide(1.0, inv, out=inv)
        light, warmth_end = self._light(state.warmth, drive, grid)
        bio = self._bio
        terms = grid.terms
        if self._scale_key is not drive.volume_l:
            self._log_scale = bio.log_scale(drive.volume_l)
            self._scale_key = drive.volume_l
        bio.factors(inv, self._log_scale, light, terms)
        if bio.stressed:
            hottest = float(path.max())
            if hottest > bio.lowest_threshold_c:
                bio.stress(starts, terms, hottest)
        if water.exchanging:
            grid.saturation[...] = self._saturation.rows(starts)
        start = grid.start
        start[:, 0] = state.o2_umol_l
        start[:, 1] = state.optode_umol_l
        ends = np.vecdot(water.o2, grid.scratch)
        if float(ends[2].min()) < 0.0:
            self._floored(ends, state, grid, water, n)

        probe = np.vecdot(grid.probe_w, chambers)
        probe += grid.probe_end * state.probe_c
        return WaterState(path[:, -1], ends[0], probe, ends[1], warmth_end), excess

    # ------------------------------------------------------------------ pieces
    def _shift(self, water: _Water, ks: tuple[int, ...], n: int, h: float) -> tuple[F, F]:
        """Unit step responses of the nodes to a change at boundary k_j, and their integrals.

        Cached per arrival pattern; a node with k_j = n has no change (all zeros).
        """
        found = water.shifts.get(ks)
        if found is None:
            k = np.array(ks, dtype=float)[:, None]
            lag = np.arange(n + 1, dtype=float)[None, :] - k
            rate = water.rate[:, None]
            step = np.where(lag > 0.0, -np.expm1(-np.maximum(lag, 0.0) * rate), 0.0)
            left = n - k[:, 0]
            integral = left * h + water.tau_s * np.expm1(-left * water.rate)
            if len(water.shifts) >= _CACHE_SIZE:
                water.shifts.clear()
            found = water.shifts[ks] = (step, integral)
        return found

    def _floored(self, ends: F, state: WaterState, grid: _Grid, water: _Water, n: int) -> None:
        """Step the O2 recurrence with its floor at 0 and redo the end values (in place)."""
        terms = grid.terms
        u = water.o2_phi[:, None] * (terms[:, 0] - terms[:, 1])
        if water.exchanging:
            u += (1.0 - water.o2_keep)[:, None] * grid.saturation
        path = recurrence(water.o2_keep, u.T, state.o2_umol_l, floor=True).T
        ends[0] = path[:, -1]
        ends[1] = grid.optode_end * state.optode_umol_l + grid.optode_w[:, 0] * state.o2_umol_l
        ends[1] += np.vecdot(grid.optode_w[:, 1:], path)

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
            par = drive.par_warm * (self._cold + self._warm_gain * lit)
            self._light_now = self._bio.light(par)[:, None]
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
        scratch = np.zeros((chambers, 3 * n + 2))
        return _Grid(
            probe_w=np.ascontiguousarray(probe_w.T),
            probe_end=probe_end,
            optode_w=np.ascontiguousarray(optode_w.T),
            optode_end=optode_end,
            warm_decay=decay,
            scratch=scratch,
            terms=scratch[:, : 2 * n].reshape(chambers, 2, n),
            saturation=scratch[:, 2 * n : 3 * n],
            start=scratch[:, 3 * n :],
        )

    def _water(self, n: int, h: float, drive: Drive) -> _Water:
        key = (n, h, drive.water_key)
        water = self._waters.get(key)
        if water is None:
            if len(self._waters) >= _CACHE_SIZE:
                self._waters.clear()
            water = self._waters[key] = self._make_water(n, h, drive)
        return water

    def _make_water(self, n: int, h: float, drive: Drive) -> _Water:
        p = self._p
        g_tot = p.ua_w_k + drive.flush_w_k
        tau = drive.capacity_j_k / g_tot
        rate = h / tau
        powers = np.exp(-np.arange(n + 1, dtype=float)[None, :] * rate[:, None])
        inv_g = 1.0 / g_tot
        base = p.ua_w_k * p.room_temperature_c + drive.flush_w_k * p.inflow_temperature_c
        grid = self._grid(n, h)
        weights, keep, phi = o2_end_weights(
            drive.exchange_per_s, h, n, grid.optode_w, grid.optode_end
        )
        return _Water(
            rate=rate,
            tau_s=tau,
            powers=powers,
            inv_g=inv_g,
            t_base_c=base * inv_g,
            settle_k_s=-tau * np.expm1(-n * rate),
            o2=weights,
            o2_keep=keep,
            o2_phi=phi,
            exchanging=bool((drive.exchange_per_s > 0.0).any()),
            shifts={},
        )


def o2_end_weights(
    exchange_per_s: F, h: float, n: int, optode_w: F, optode_end: F
) -> tuple[F, F, F]:
    """Weights turning one segment's source terms into end O2, end optode and an O2 bound.

    Parameters
    ----------
    exchange_per_s
        O2 exchange rate k of each chamber, s⁻¹, shape ``(N,)``.
    h
        Sub-step length, s.
    n
        Number of sub-steps, dimensionless.
    optode_w
        Optode lag weights of the O2 at t = 0..n·h, dimensionless, shape ``(N, n + 1)``.
    optode_end
        Optode lag decay over the segment, dimensionless, shape ``(N,)``.

    Returns
    -------
    tuple of numpy.ndarray
        The weights, shape ``(3, N, 3n + 2)``, to be dotted with the row [production terms
        (n), respiration terms (n), saturation (n), O2_0, optode_0] of each chamber (µmol L⁻¹
        s⁻¹, µmol L⁻¹ s⁻¹, µmol L⁻¹, µmol L⁻¹, µmol L⁻¹) to give the end O2, the end optode
        value and a lower bound of the O2 over the segment (all µmol L⁻¹); a_o = e^(−k·h)
        and φ = (1 − a_o)/k (s), both shape ``(N,)``.

    Notes
    -----
    C_n = a_o^n·C_0 + Σ_j a_o^(n−1−j)·(φ·S_j + (1 − a_o)·C_sat,j) over sub-step starts j. The
    optode end value is e·y_0 + Σ_m W_m·C_m; substituting C_m gives weights
    V_i = Σ_(m≥i) W_m·a_o^(m−i) on the inputs of step i (:func:`reach_weights`). As
    S ≥ −R (respiration term) and C_sat ≥ 0, every C_m ≥
    a_o^n·C_0 − φ·Σ_j R_j, which is the bound.
    """
    k = exchange_per_s
    chambers = len(k)
    kh = k * h
    keep = np.exp(-kh)
    fresh = -np.expm1(-kh)
    phi = np.where(kh > 0.0, fresh / np.where(kh > 0.0, k, 1.0), h)
    powers = np.exp(-np.arange(n + 1, dtype=float)[None, :] * kh[:, None])  # a_o^m, m = 0..n
    back = powers[:, n - 1 :: -1]  # a_o^(n−1−j)
    reach = reach_weights(optode_w, keep, powers)  # V_0..V_n
    out = np.zeros((3, chambers, 3 * n + 2))
    out[0, :, :n] = phi[:, None] * back
    out[0, :, n : 2 * n] = -out[0, :, :n]
    out[0, :, 2 * n : 3 * n] = fresh[:, None] * back
    out[0, :, 3 * n] = np.exp(-n * kh)
    out[1, :, :n] = phi[:, None] * reach[:, 1:]
    out[1, :, n : 2 * n] = -out[1, :, :n]
    out[1, :, 2 * n : 3 * n] = fresh[:, None] * reach[:, 1:]
    out[1, :, 3 * n] = reach[:, 0]
    out[1, :, 3 * n + 1] = optode_end
    out[2, :, n : 2 * n] = -phi[:, None]
    out[2, :, 3 * n] = np.exp(-n * kh)
    return out, keep, phi


def reach_weights(weights: F, keep: F, powers: F) -> F:
    """Backward sums V_i = Σ_(m≥i) W_m·a^(m−i), i = 0..n, of every chamber at once.

    Parameters
    ----------
    weights
        W_0..W_n of each chamber, ≥ 0, dimensionless, shape ``(N, n + 1)``.
    keep
        a = e^(−k·h) of each chamber, dimensionless, shape ``(N,)``.
    powers
        a^m for m = 0..n of each chamber, dimensionless, shape ``(N, n + 1)``.

    Returns
    -------
    numpy.ndarray
        V_0..V_n, dimensionless, shape ``(N, n + 1)``.

    Notes
    -----
    V_i = a^(−i)·Σ_(m≥i) W_m·a^m: one reversed cumulative sum over all chambers. Every term
    is ≥ 0, so its rounding error stays within n·ε of V_i; where a^n would leave the normal
    range of doubles (a^n ≤ 1e-260) the recurrence V_i = W_i + a·V_(i+1) is run instead
    (``scipy.signal.lfilter``, one chamber at a time).
    """
    if float(powers[:, -1].min(initial=1.0)) > _SCALED_MIN_POWER:
        scaled = weights * powers
        total = np.cumsum(scaled[:, ::-1], axis=1)[:, ::-1]
        return np.asarray(total / powers, dtype=float)
    reach = np.empty_like(weights)
    for c in range(len(keep)):
        reach[c, ::-1] = lfilter([1.0], [1.0, -keep[c]], weights[c, ::-1])
    return reach
