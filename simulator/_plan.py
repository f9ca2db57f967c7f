"""The sub-step grid and the delay lines of an open-loop block.

Rule: the same cuts as :meth:`simulator.Rack.advance` makes, worked out for many pieces at
once: a piece (a row of the schedule, or part of one between fault edges) is cut at 3600
sub-steps and, like ``advance``, wherever a heater or chiller change arrives between
sub-step boundaries; sub-steps are equal within a segment and no longer than the physics
step. A power change queued at a piece start reaches the water after the node's dead time,
felt from the first sub-step starting at (or within a millionth of a sub-step after) its
arrival. Nothing here reads a clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from simulator._actuators import Effective, substeps
from simulator._params import RackParams

if TYPE_CHECKING:
    from simulator._batch import BlockStart

__all__ = ["Segments", "arrival_series", "chunks", "plan", "powers", "runs"]

F = NDArray[np.float64]
I = NDArray[np.intp]  # noqa: E741

_EPS_S = 1e-9
_GRID_TOL = 1e-6
_MAX_SUBSTEPS = 3600


@dataclass(frozen=True, slots=True)
class Segments:
    """Segments of a block: equal sub-steps within each, boundaries in s."""

    t0: F  # start, s
    t1: F  # end, s
    n: I  # sub-steps
    h: F  # sub-step length, s
    piece: I  # the piece each segment belongs to
    last: NDArray[np.bool_]  # the segment ends its piece


def arrival_series(
    p: RackParams, start: BlockStart, piece_t: F, eff: Effective, queued: NDArray[np.bool_]
) -> tuple[list[F], list[F], list[F]]:
    """Each node's heater and chiller power over a block, as times from which each holds.

    Parameters
    ----------
    p
        Resolved rack parameters.
    start
        The rack at the block start (power reaching the water, changes on their way, the
        latest power queued).
    piece_t
        Piece boundaries, s, shape ``(P + 1,)``.
    eff
        Effective drives of each piece, %: heater and chiller shape ``(P, M)``.
    queued
        Whether commands were given at each piece start, shape ``(P,)``.

    Returns
    -------
    tuple of lists of numpy.ndarray
        Per node: arrival times (s; the first is −inf, the power reaching the water now),
        heater power (W) and chiller heat removal (W) from each arrival on. A command that
        does not change a node's power is not queued (as :class:`simulator._actuators.Actuators`
        does), and one queued at the moment a pending change arrives replaces it.
    """
    everywhere = bool(queued.all())
    t0 = piece_t[:-1] if everywhere else piece_t[:-1][queued]
    heat_w = eff.heater_pct.T * (p.heater_max_w / 100.0)[:, None]  # (M, P), rows contiguous
    cold_w = eff.chiller_pct.T * (p.chiller_max_w / 100.0)[:, None]
    if not everywhere:
        heat_w, cold_w = heat_w[:, queued], cold_w[:, queued]
    times: list[F] = []
    heater: list[F] = []
    chiller: list[F] = []
    for j in range(len(p.node_names)):
        h_new, c_new = heat_w[j], cold_w[j]
        prev_h = np.concatenate(([start.sent_w[0, j]], h_new[:-1]))
        prev_c = np.concatenate(([start.sent_w[1, j]], c_new[:-1]))
        changed = (h_new != prev_h) | (c_new != prev_c)  # an unchanged power is not queued
        arrive = t0[changed] + float(p.dead_time_s[j])
        pending = start.lines[j]
        if len(arrive):  # a change queued at the same moment replaces the pending one
            pending = [entry for entry in pending if entry[0] != arrive[0]]
        times.append(np.concatenate(([-math.inf], [e[0] for e in pending], arrive)))
        heater.append(
            np.concatenate(([start.water_w[0, j]], [e[1] for e in pending], h_new[changed]))
        )
        chiller.append(
            np.concatenate(([start.water_w[1, j]], [e[2] for e in pending], c_new[changed]))
        )
    return times, heater, chiller


def plan(step_s: float, piece_t: F, times: list[F]) -> tuple[Segments, list[I]]:
    """Segments and sub-steps of every piece, as :meth:`simulator.Rack.advance` cuts them.

    Parameters
    ----------
    step_s
        Longest sub-step, s.
    piece_t
        Piece boundaries, s, shape ``(P + 1,)``.
    times
        Per node, arrival times of power changes, s (the first, −inf, is skipped).

    Returns
    -------
    tuple
        The segments, and per node the index (in the block, dimensionless) of the first
        sub-step that feels each arrival: the first sub-step starting at or after it, within
        a millionth of a sub-step.
    """
    longest = _MAX_SUBSTEPS * step_s
    p0, p1 = piece_t[:-1], piece_t[1:]
    count = np.maximum(1, np.ceil((p1 - p0 - _EPS_S) / longest)).astype(np.intp)
    if (count == 1).all():
        piece = np.arange(len(p0))
        t0, t1 = p0, p1
    else:
        piece = np.repeat(np.arange(len(p0)), count)
        first = np.cumsum(count) - count
        t0 = p0[piece] + (np.arange(len(piece)) - first[piece]) * longest
        t1 = np.minimum(t0 + longest, p1[piece])
        t1[np.cumsum(count) - 1] = p1  # the last segment of a piece ends at the piece end
    n = np.maximum(1, np.ceil((t1 - t0) / step_s - 1e-9)).astype(np.intp)
    h = (t1 - t0) / n
    arrive = np.concatenate([a[1:] for a in times])
    s = np.searchsorted(t0, arrive, side="right") - 1
    s_ok = np.maximum(s, 0)
    inside = (s >= 0) & (arrive > t0[s_ok] + _EPS_S) & (arrive < t1[s_ok] - _EPS_S)
    k = (arrive - t0[s_ok]) / h[s_ok]
    off = inside & (np.abs(k - np.maximum(0.0, np.round(k))) > _GRID_TOL)
    if off.any():  # rare: split those pieces as advance() would, one by one
        seg = _replan(step_s, piece_t, np.unique(piece[s[off]]), np.sort(arrive))
        return seg, _positions(seg, times)
    last = np.zeros(len(piece), dtype=bool)
    last[np.cumsum(count) - 1] = True
    seg = Segments(t0, t1, n, h, piece, last)
    begin = np.cumsum(n) - n
    at = np.where(s >= 0, begin[s_ok] + np.ceil(k - _GRID_TOL).astype(np.intp), 0)
    split = np.cumsum([len(a) - 1 for a in times])[:-1]
    return seg, np.split(at, split)


def _positions(seg: Segments, times: list[F]) -> list[I]:
    """First sub-step feeling each arrival (see :func:`_plan`), per node."""
    begin = np.cumsum(seg.n) - seg.n
    out = []
    for arrive in times:
        s = np.maximum(np.searchsorted(seg.t0, arrive[1:], side="right") - 1, 0)
        k = np.ceil((arrive[1:] - seg.t0[s]) / seg.h[s] - _GRID_TOL).astype(np.intp)
        out.append(np.where(arrive[1:] >= seg.t0[0], begin[s] + k, 0))
    return out


def _replan(step_s: float, piece_t: F, odd: I, arrivals: F) -> Segments:
    """Plan all pieces, stepping those in ``odd`` with the stepwise rules in Python."""
    rows: list[tuple[float, float, int, float, int, bool]] = []
    longest = _MAX_SUBSTEPS * step_s
    odd_set = set(odd.tolist())
    for i in range(len(piece_t) - 1):
        t, end = float(piece_t[i]), float(piece_t[i + 1])
        cuts: list[tuple[float, float, int, float]] = []
        while t < end - _EPS_S:
            seg_end = min(end, t + longest)
            n, h = substeps(seg_end - t, step_s)
            if i in odd_set:
                off = _first_off_grid(arrivals, t, seg_end, h)
                while off is not None:
                    seg_end = off
                    n, h = substeps(seg_end - t, step_s)
                    off = _first_off_grid(arrivals, t, seg_end, h)
            cuts.append((t, seg_end, n, h))
            t = seg_end
        if not cuts:
            n, h = substeps(end - float(piece_t[i]), step_s)
            cuts.append((float(piece_t[i]), end, n, h))
        cuts[-1] = (cuts[-1][0], end, cuts[-1][2], (end - cuts[-1][0]) / cuts[-1][2])
        rows += [(a, b, n, h, i, q == len(cuts) - 1) for q, (a, b, n, h) in enumerate(cuts)]
    return Segments(
        t0=np.array([r[0] for r in rows]),
        t1=np.array([r[1] for r in rows]),
        n=np.array([r[2] for r in rows], dtype=np.intp),
        h=np.array([r[3] for r in rows]),
        piece=np.array([r[4] for r in rows], dtype=np.intp),
        last=np.array([r[5] for r in rows], dtype=bool),
    )


def _first_off_grid(arrivals: F, t0: float, t1: float, h: float) -> float | None:
    """Earliest arrival in (t0, t1) that falls between the sub-step boundaries, s."""
    lo = int(np.searchsorted(arrivals, t0 + _EPS_S, side="right"))
    hi = int(np.searchsorted(arrivals, t1 - _EPS_S, side="left"))
    for arrive in arrivals[lo:hi]:
        k = (arrive - t0) / h
        if abs(k - max(0, round(k))) > _GRID_TOL:
            return float(arrive)
    return None


def chunks(n: I, size: int) -> list[tuple[int, int]]:
    """Runs of segments holding at most ``size`` sub-steps each (at least one segment).

    Parameters
    ----------
    n
        Sub-steps of each segment, dimensionless, shape ``(S,)``.
    size
        Most sub-steps per run, dimensionless.

    Returns
    -------
    list of tuple
        (first, last + 1) segment index of each run, dimensionless.
    """
    total = np.cumsum(n)
    out: list[tuple[int, int]] = []
    s0 = 0
    while s0 < len(n):
        base = int(total[s0 - 1]) if s0 else 0
        s1 = max(s0 + 1, int(np.searchsorted(total, base + size, side="right")))
        out.append((s0, s1))
        s0 = s1
    return out


def powers(values: F, at: I, g0: int, g1: int) -> F:
    """Power of one node in sub-steps g0..g1−1 of a block (its delay line).

    Parameters
    ----------
    values
        Power before the first arrival, then from each arrival on, W, shape ``(A + 1,)``.
    at
        First sub-step feeling each arrival, dimensionless, shape ``(A,)``, non-decreasing.
    g0, g1
        First and one-past-last sub-step wanted, dimensionless.

    Returns
    -------
    numpy.ndarray
        Power in each of those sub-steps, W, shape ``(g1 − g0,)``.
    """
    lo = int(np.searchsorted(at, g0, side="right"))  # values[lo] holds at g0
    hi = int(np.searchsorted(at, g1, side="left"))
    counts = np.diff(np.concatenate(([g0], at[lo:hi], [g1])))
    return np.repeat(values[lo : hi + 1], counts)


def runs(rows: F) -> I:
    """Number the runs of equal consecutive rows.

    Parameters
    ----------
    rows
        Any values per row, shape ``(P, c)``.

    Returns
    -------
    numpy.ndarray
        Index of the run each row belongs to (0, 0, 1, …), dimensionless, shape ``(P,)``.
    """
    changed = (rows[1:] != rows[:-1]).any(axis=1)
    return np.concatenate(([0], np.cumsum(changed))).astype(np.intp)
