"""The vectorised integrator of an open-loop block: many segments' sub-steps at once.

Rule: a block is a stretch of time in which the faults do not change and nothing leaks, cut
into pieces at the schedule's switch times. With the sub-step grid and the delay lines of
:mod:`simulator._plan` (the cuts :meth:`simulator.Rack.advance` would make, the heater and
chiller power every sub-step feels), this module integrates heat, light, O2 and the sensor lags over
all sub-steps with :func:`simulator._physics.series_recurrence`, in chunks of at most
``CHUNK`` sub-steps to bound memory. The discretisation is the stepwise one (exact
exponential steps, O2 source and saturation held at sub-step starts, first-order hold for
the sensors), so the results agree with stepping to rounding. Arrays are chamber-major
(rows are nodes or chambers, time runs along the row).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from simulator._actuators import Effective
from simulator._oxygen import Metabolism
from simulator._params import RackParams
from simulator._physics import lamp_curve, pump_fraction, series_recurrence
from simulator._plan import Segments, arrival_series, chunks, plan, powers, runs
from simulator._science import ZERO_CELSIUS_K, SaturationTable
from simulator._step import WaterState

__all__ = ["CHUNK", "BlockEnd", "BlockStart", "Line", "integrate_block"]

F = NDArray[np.float64]
I = NDArray[np.intp]  # noqa: E741
Line = list[tuple[float, float, float]]

CHUNK = 16384
"""Most sub-steps integrated in one go, dimensionless."""

_EPS_S = 1e-9
_SETTLED = 1e-9


@dataclass(frozen=True, slots=True, kw_only=True)
class BlockStart:
    """The rack at the start of a block (everything the integrator needs besides params).

    Attributes
    ----------
    water
        Water and sensor state.
    water_w
        Heater and chiller power reaching each node now, W, shape ``(2, M)``.
    lines
        Power changes on their way per node: (arrival s, heater W, chiller W).
    sent_w
        The latest heater and chiller power queued per node, W, shape ``(2, M)``.
    lamp_s
        Seconds each lamp has been lit, s, shape ``(N,)``.
    volume_l
        Water in each chamber, L, shape ``(N,)``.
    capacity_j_k
        Heat capacity of each node, J K⁻¹, shape ``(M,)``.
    """

    water: WaterState
    water_w: F
    lines: list[Line]
    sent_w: F
    lamp_s: F
    volume_l: F
    capacity_j_k: F


@dataclass(frozen=True, slots=True, kw_only=True)
class BlockEnd:
    """What a block did (state at its end, sums over it, samples at row ends).

    Attributes
    ----------
    water
        Water and sensor state at the block end.
    water_w
        Heater and chiller power reaching each node at the end, W, shape ``(2, M)``.
    lines
        Power changes still on their way per node.
    heat_j
        Heater and chiller energy over the block, J, shape ``(2, M)``.
    excess_k_s
        ∫(T − T_room)dt over the block, K s, shape ``(M,)``.
    flush_loss_j
        Heat carried out by flushing over the block, J, shape ``(M,)``.
    span_s
        Time integrated, s.
    lamp_s
        Seconds each lamp has been lit at the end, s, shape ``(N,)``.
    """

    water: WaterState
    water_w: F
    lines: list[Line]
    heat_j: F
    excess_k_s: F
    flush_loss_j: F
    span_s: float
    lamp_s: F


def integrate_block(
    p: RackParams,
    saturation: SaturationTable,
    bio: Metabolism,
    start: BlockStart,
    piece_t: F,
    eff: Effective,
    queued: NDArray[np.bool_],
    sample_to: I,
    out: F,
) -> BlockEnd:
    """Integrate every chamber over the pieces of one block.

    Parameters
    ----------
    p
        Resolved rack parameters.
    saturation
        O2 saturation of each chamber's water (°C → µmol L⁻¹).
    bio
        The communities' net O2 source.
    start
        The rack at the block start (time ``piece_t[0]``).
    piece_t
        Piece boundaries, s, shape ``(P + 1,)``, increasing.
    eff
        Effective drives (%) of each piece: heater and chiller ``(P, M)``, lamp and pump
        ``(P, N)``.
    queued
        Whether commands were given at the start of each piece (heater and chiller power
        is then queued, as :meth:`simulator.Rack.set_outputs` would), shape ``(P,)``.
    sample_to
        Column of ``out`` receiving the state at the end of each piece, or −1 for none,
        shape ``(P,)``.
    out
        Receives temperature (°C), O2 (µmol L⁻¹), PAR (µmol m⁻² s⁻¹), probe (°C) and
        optode (µmol L⁻¹) of every chamber, shape ``(5, N, columns)``.

    Returns
    -------
    BlockEnd
        The state at ``piece_t[-1]`` and what happened on the way.
    """
    times, heater, chiller = arrival_series(p, start, piece_t, eff, queued)
    seg, arrival_at = plan(p.physics_step_s, piece_t, times)
    per_piece = np.bincount(seg.piece, minlength=len(piece_t) - 1)
    lit_p = (eff.lamp_pct > 0.0).astype(float)
    lamp_run = runs(eff.lamp_pct)
    lamp_first = np.flatnonzero(np.diff(lamp_run, prepend=-1))
    par_new_p = lamp_curve(eff.lamp_pct[lamp_first], p.par_at_full, p.curve_shape)[lamp_run]
    flow_run = runs(eff.pump_pct)
    flow_first = np.flatnonzero(np.diff(flow_run, prepend=-1))
    flows = pump_fraction(eff.pump_pct[flow_first], p.dead_band_pct) * p.flush_at_full_l_s
    span = seg.n * seg.h
    lit_s = np.repeat(lit_p, per_piece, axis=0)
    par_new_s = np.repeat(par_new_p, per_piece, axis=0)
    age = _ages(start.lamp_s, lit_s, span, _age_rate(p))
    # chamber-major per-segment arrays (N, S): the chunks read contiguous rows
    par_warm_s = np.ascontiguousarray((par_new_s * age[:-1]).T)
    par_end_s = np.ascontiguousarray((par_new_s * age[1:]).T)  # warm PAR at segment ends
    lit_rows = np.ascontiguousarray(lit_s.T)
    flow_s = np.repeat(flow_run, per_piece)  # which run of constant flows each segment is in
    sample_s = np.full(len(span), -1, dtype=np.intp)
    sample_s[seg.last] = sample_to
    water = start.water
    state = [water.temp_c, water.o2_umol_l, water.probe_c, water.optode_umol_l, water.warmth]
    m_nodes = len(start.capacity_j_k)
    heat = np.zeros((2, m_nodes))
    excess = np.zeros(m_nodes)
    flush_loss = np.zeros(m_nodes)
    log_scale = bio.log_scale(start.volume_l)
    for s0, s1 in chunks(seg.n, CHUNK):
        sums = _chunk(
            p, saturation, bio, start, seg, s0, s1, times, heater, chiller, arrival_at,
            lit_rows, par_warm_s, par_end_s, flows, flow_s, sample_s, log_scale, out, state,
        )  # fmt: skip
        heat += sums[0]
        excess += sums[1]
        flush_loss += sums[2]
    t_end = float(piece_t[-1])
    water_w = np.empty((2, len(times)))
    lines: list[Line] = []
    for j, arrive in enumerate(times):
        now = int(np.searchsorted(arrive, t_end + _EPS_S, side="right")) - 1
        water_w[0, j] = heater[j][now]
        water_w[1, j] = chiller[j][now]
        lines.append(
            [(float(arrive[i]), float(heater[j][i]), float(chiller[j][i]))
             for i in range(now + 1, len(arrive))]
        )  # fmt: skip
    lit_end = lit_p[-1]
    warmth = state[4]
    warmth = np.where(np.abs(warmth - lit_end) < _SETTLED, lit_end, warmth)
    return BlockEnd(
        water=WaterState(state[0], state[1], state[2], state[3], warmth),
        water_w=water_w,
        lines=lines,
        heat_j=heat,
        excess_k_s=excess,
        flush_loss_j=flush_loss,
        span_s=float(span.sum()),
        lamp_s=start.lamp_s + span @ lit_s,
    )


@dataclass(frozen=True, slots=True)
class _Coefficients:
    """Per-sub-step coefficients; ``(rows, 1)`` when one combination serves the chunk."""

    h: F  # sub-step length, s, (1, L) or (1, 1)
    keep_t: F  # e^(−h/τ) of each node, (M, ·)
    fresh_t: F  # 1 − e^(−h/τ)
    transient_s: F  # τ(1 − e^(−h/τ)), s
    inv_g: F  # 1/(UA + G), K W⁻¹
    t_base_c: F  # (UA·T_room + G·T_in)/(UA + G), °C
    g_flush: F  # G, W K⁻¹
    warm_keep: F  # e^(−h/τ_warm-up) of each chamber, (N, ·)
    o2_keep: F  # e^(−k·h)
    o2_fresh: F  # 1 − e^(−k·h)
    o2_phi: F  # (1 − e^(−k·h))/k, s
    exchanging: bool
    probe: tuple[F, F]  # (a, c) of the probe lag
    optode: tuple[F, F]  # (a, c) of the optode lag


def _coefficients(
    p: RackParams, start: BlockStart, h_seg: F, flows: F, flow_seg: I, n: I
) -> _Coefficients:
    """Coefficients of each distinct (sub-step length, flows) pair, spread over sub-steps."""
    lengths, length_of = np.unique(h_seg, return_inverse=True)
    pair = flow_seg * len(lengths) + length_of
    pairs, pair_of = np.unique(pair, return_inverse=True)
    h = lengths[pairs % len(lengths)][None, :]  # (1, C)
    flush = flows[pairs // len(lengths)].T  # (N, C)
    g_flush = np.zeros((len(start.capacity_j_k), flush.shape[1]))
    np.add.at(g_flush, p.node_of_chamber, flush * p.rho_cp_j_l_k[:, None])
    g_tot = p.ua_w_k[:, None] + g_flush
    tau = start.capacity_j_k[:, None] / g_tot
    fresh_t = -np.expm1(-h / tau)
    k = flush / start.volume_l[:, None] + np.where(flush > 0.0, p.reaeration_per_s[:, None], 0.0)
    kh = k * h
    o2_fresh = -np.expm1(-kh)
    base = p.ua_w_k[:, None] * p.room_temperature_c + g_flush * p.inflow_temperature_c

    def spread(x: F) -> F:
        return x if len(pairs) == 1 else np.repeat(x[:, pair_of], n, axis=1)

    probe = _lag_coefficients(p.temperature_tau_s, h)
    optode = _lag_coefficients(p.optode_tau_s, h)
    return _Coefficients(
        h=spread(h),
        keep_t=spread(1.0 - fresh_t),
        fresh_t=spread(fresh_t),
        transient_s=spread(tau * fresh_t),
        inv_g=spread(1.0 / g_tot),
        t_base_c=spread(base / g_tot),
        g_flush=spread(g_flush),
        warm_keep=spread(np.exp(-h / np.maximum(p.warmup_tau_s, 1e-9)[:, None])),
        o2_keep=spread(np.exp(-kh)),
        o2_fresh=spread(o2_fresh),
        o2_phi=spread(np.where(kh > 0.0, o2_fresh / np.where(kh > 0.0, k, 1.0), h)),
        exchanging=bool((kh > 0.0).any()),
        probe=(spread(probe[0]), spread(probe[1])),
        optode=(spread(optode[0]), spread(optode[1])),
    )


def _lag_coefficients(tau_s: F, h: F) -> tuple[F, F]:
    """a = e^(−h/τ) and c = τ(1 − a)/h of first-order lags (as lag_weights), shape (N, C)."""
    ratio = h / np.maximum(tau_s, 1e-9)[:, None]
    return np.exp(-ratio), -np.expm1(-ratio) / ratio


def _chunk(
    p: RackParams,
    saturation: SaturationTable,
    bio: Metabolism,
    start: BlockStart,
    seg: Segments,
    s0: int,
    s1: int,
    times: list[F],
    heater: list[F],
    chiller: list[F],
    arrival_at: list[I],
    lit_s: F,  # (N, S) from here on
    par_warm_s: F,
    par_end_s: F,
    flows: F,
    flow_s: I,
    sample_s: I,
    log_scale: F,
    out: F,
    state: list[F],
) -> tuple[F, F, F]:
    """Integrate segments s0..s1−1, sampling into ``out`` and updating ``state`` in place.

    Returns heater and chiller energy (J, (2, M)), ∫(T − T_room)dt (K s, (M,)) and the
    flushing heat loss (J, (M,)) over these segments.
    """
    n = seg.n[s0:s1]
    ends = np.cumsum(n) - 1
    length = int(ends[-1] + 1)
    g0 = int(np.sum(seg.n[:s0]))
    co = _coefficients(p, start, seg.h[s0:s1], flows, flow_s[s0:s1], n)
    node_of = p.node_of_chamber
    m_nodes = len(times)

    # heater and chiller power felt in each sub-step (the delay lines), and its energy
    net = np.empty((m_nodes, length))
    heat = np.empty((2, m_nodes))
    for j in range(m_nodes):
        hw = powers(heater[j], arrival_at[j], g0, g0 + length)
        cw = powers(chiller[j], arrival_at[j], g0, g0 + length)
        np.subtract(hw, cw, out=net[j])
        if co.h.shape[1] == 1:
            heat[:, j] = (float(hw.sum()) * float(co.h[0, 0]), float(cw.sum()) * float(co.h[0, 0]))
        else:
            heat[:, j] = (float(np.dot(hw, co.h[0])), float(np.dot(cw, co.h[0])))

    # thermal nodes: T_k = a·T_(k−1) + (1 − a)·T∞_k, and the heat that left them
    t_inf = net
    t_inf *= co.inv_g
    t_inf += co.t_base_c
    temp_end = series_recurrence(co.keep_t, t_inf, state[0], b0=co.fresh_t)
    if co.h.shape[1] == 1:  # one sub-step length and flow: sums first, then coefficients
        sum_inf = t_inf.sum(axis=1)
        sum_start = state[0] + temp_end.sum(axis=1) - temp_end[:, -1]
        h = float(co.h[0, 0])
        excess = (sum_inf - length * p.room_temperature_c) * h
        excess += (sum_start - sum_inf) * co.transient_s[:, 0]
        drift = (p.room_temperature_c - p.inflow_temperature_c) * h * length
        flush_loss = co.g_flush[:, 0] * (excess + drift)
    else:
        transient = _shift(state[0], temp_end)
        transient -= t_inf
        transient *= co.transient_s
        t_inf -= p.room_temperature_c
        t_inf *= co.h
        t_inf += transient  # ∫(T − T_room)dt per sub-step
        excess = t_inf.sum(axis=1)
        t_inf += (p.room_temperature_c - p.inflow_temperature_c) * co.h  # now ∫(T − T_in)dt
        t_inf *= co.g_flush
        flush_loss = t_inf.sum(axis=1)
    ch_end = temp_end[node_of]
    ch_start = _shift(state[0][node_of], ch_end)

    # lamps: warm-up and light limitation (per segment where the lamp is settled)
    lit_seg = lit_s[:, s0:s1]  # (N, S)
    warm0 = state[4]
    settled = (lit_seg == warm0[:, None]).all(axis=1) | (p.warmup_tau_s <= 0.0)
    cold = p.cold_output_frac[:, None]
    glow_seg = cold + (1.0 - cold) * lit_seg
    light = bio.light(par_warm_s[:, s0:s1] * glow_seg)
    if length != s1 - s0:
        light = np.repeat(light, n, axis=1)
    moving = np.flatnonzero(~settled)
    warm_end: F | None = None
    if len(moving):
        warm_end = np.repeat(lit_seg, n, axis=1)
        keep_w = co.warm_keep[moving]
        warm_end[moving] = series_recurrence(
            keep_w, warm_end[moving], warm0[moving], b0=1.0 - keep_w
        )
        glow = _shift(warm0[moving], warm_end[moving])
        glow *= 1.0 - cold[moving]
        glow += cold[moving]
        glow *= np.repeat(par_warm_s[moving, s0:s1], n, axis=1)
        light[moving] = bio.light(glow, moving)

    # community O2: dC/dt = (GPP − R)·A/V − k·(C − C_sat), held over each sub-step
    inv = ch_start + ZERO_CELSIUS_K
    np.divide(1.0, inv, out=inv)
    terms = np.empty((len(node_of), 2, length))
    bio.factors(inv, log_scale, light, terms)
    if bio.stressed:
        hottest = float(ch_start.max())
        if hottest > bio.lowest_threshold_c:
            bio.stress(ch_start, terms, hottest)
    u = np.subtract(terms[:, 0], terms[:, 1])
    u *= co.o2_phi
    if co.exchanging:
        sat = saturation.rows(ch_start)
        sat *= co.o2_fresh
        u += sat
    o2_end = series_recurrence(co.o2_keep, u, state[1], floor=True)

    # sensors: first-order lags with a first-order hold of their input
    probe = _lag(co.probe, state[0][node_of], ch_end, state[2])
    optode = _lag(co.optode, state[1], o2_end, state[3])

    # samples at the ends of pieces
    to = sample_s[s0:s1]
    pick = to >= 0
    at = ends[pick]
    cols = to[pick]
    if len(cols):
        if cols[-1] - cols[0] == len(cols) - 1 and at[-1] - at[0] == len(at) - 1:
            cols, at = slice(cols[0], cols[-1] + 1), slice(at[0], at[-1] + 1)  # type: ignore[assignment]
        out[0][:, cols] = ch_end[:, at]
        out[1][:, cols] = o2_end[:, at]
        glow_end = lit_seg[:, pick] if warm_end is None else warm_end[:, at]
        glow_end = glow_end * (1.0 - cold)
        glow_end += cold
        glow_end *= par_end_s[:, s0:s1][:, pick]
        out[2][:, cols] = glow_end
        out[3][:, cols] = probe[:, at]
        out[4][:, cols] = optode[:, at]
    warmth = lit_seg[:, -1].copy() if warm_end is None else warm_end[:, -1].copy()
    lit_end = lit_seg[:, -1]
    warmth = np.where(np.abs(warmth - lit_end) < _SETTLED, lit_end, warmth)  # as stepping does
    state[:] = [
        temp_end[:, -1].copy(),
        o2_end[:, -1].copy(),
        probe[:, -1].copy(),
        optode[:, -1].copy(),
        warmth,
    ]
    return heat, excess, flush_loss


def _age_rate(p: RackParams) -> F:
    """λ = ln(1 − loss)/(3.6e6 s) of each lamp, s⁻¹ (−inf for a total loss)."""
    loss = p.ageing_frac_per_1000_h
    rate = np.log1p(-loss, out=np.full(len(loss), -np.inf), where=loss < 1.0)
    return np.asarray(rate / 3.6e6, dtype=float)


def _ages(lamp_s: F, lit_s: F, span_s: F, rate: F) -> F:
    """Output fraction of each lamp at the block start and after each segment.

    Parameters
    ----------
    lamp_s
        Seconds lit at the block start, s, shape ``(N,)``.
    lit_s
        1 where a lamp is lit during a segment, else 0, shape ``(S, N)``.
    span_s
        Length of each segment, s, shape ``(S,)``.
    rate
        λ = ln(1 − loss)/3.6e6 s, s⁻¹, shape ``(N,)``.

    Returns
    -------
    numpy.ndarray
        (1 − loss)^(hours/1000), shape ``(S + 1, N)``: e^(λ·s) at the start, then multiplied
        by e^(λ·span) after each lit segment (as the stepping rack ages its lamps); the
        segment lengths take few distinct values, so few exponentials are evaluated.
    """
    out = np.empty((len(span_s) + 1, len(lamp_s)))
    out[0] = np.exp(np.where(lamp_s > 0.0, lamp_s * rate, 0.0))
    spans, which = np.unique(span_s, return_inverse=True)
    factor = np.exp(np.where(rate[None, :] > -np.inf, spans[:, None] * rate[None, :], -np.inf))
    out[1:] = np.where(lit_s > 0.0, factor[which.reshape(-1)], 1.0)
    np.cumprod(out, axis=0, out=out)
    return out


def _shift(first: F, path: F) -> F:
    """Values at sub-step starts: ``first`` followed by all but the last of ``path``."""
    out = np.empty_like(path)
    out[:, 0] = first
    out[:, 1:] = path[:, :-1]
    return out


def _lag(coefficients: tuple[F, F], x0: F, x_end: F, y0: F) -> F:
    """First-order lag with its input linear over each sub-step (as lag_weights).

    y_k = a·y_(k−1) + (1 − c)·x_k − (a − c)·x_(k−1); ``x0`` is the input before the first
    sub-step, ``x_end`` the input at each sub-step end.
    """
    a, c = coefficients
    return series_recurrence(a, x_end, y0, b0=1.0 - c, b1=c - a, u0=x0)
