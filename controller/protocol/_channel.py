"""Piecewise-linear setpoint channels and the exact operations the compiler needs on them.

Rules
-----
- A :class:`Channel` is a breakpoint table ``(t_s, v)``: times in s from the experiment start,
  non-decreasing; the value is linear between breakpoints. Two breakpoints at the same time
  make a step; the function is right-continuous there (the later breakpoint wins). Before the
  first breakpoint the first value holds, after the last the last value holds.
- :func:`add` and :func:`maximum` are exact: the result of two piecewise-linear functions is
  again piecewise linear once crossing points are inserted. :func:`multiply` is not (the
  product of two lines is a parabola): intervals are subdivided until the chord error is at
  most ``tol`` (the error of a product of two lines over an interval is |Δa·Δb|/4 at its
  middle, and n equal pieces divide it by n²).
- Channels are immutable (read-only arrays). Evaluation tables for fast sampling (start time,
  start value and slope of every stretch, so a value is v0 + m·(t - t0), exact at
  breakpoints) are built once, when the channel is made. For sorted sample times the
  breakpoints are searched among the times (n log N for n breakpoints, N times) and each
  stretch's entries are expanded with ``numpy.repeat``; unsorted times use
  ``numpy.searchsorted`` of every time among the breakpoints.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

__all__ = [
    "Channel",
    "add",
    "concat",
    "constant",
    "cumulative_integral",
    "is_sorted_1d",
    "left_limit",
    "maximum",
    "multiply",
    "right_value",
    "window",
]

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class Channel:
    """A piecewise-linear setpoint schedule.

    Attributes
    ----------
    t_s
        Breakpoint times, s from the experiment start, non-decreasing (equal neighbours make a
        right-continuous step).
    v
        Values at the breakpoints, in the channel's unit (°C, µmol photons m-2 s-1, cm s-1,
        or dimensionless for light factors).
    """

    t_s: FloatArray
    v: FloatArray
    _seg_t: FloatArray = field(init=False, repr=False)
    _seg_v: FloatArray = field(init=False, repr=False)
    _slope: FloatArray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        t = np.array(self.t_s, dtype=np.float64)
        v = np.array(self.v, dtype=np.float64)
        if t.ndim != 1 or t.shape != v.shape or t.size == 0:
            raise ValueError(f"a channel needs equal 1-D t_s and v, got {t.shape} and {v.shape}")
        if not (np.all(np.isfinite(t)) and np.all(np.isfinite(v))):
            raise ValueError("channel breakpoints must be finite")
        if np.any(np.diff(t) < 0):
            raise ValueError("channel times must be non-decreasing")
        dt = np.diff(t)
        dv = np.diff(v)
        slope = np.divide(dv, dt, out=np.zeros_like(dv), where=dt > 0)
        # table entry i serves times with t[i-1] <= x < t[i]: start point and slope of that
        # stretch; entry 0 (before the first breakpoint) and entry n (after the last) are flat
        seg_t = np.concatenate(([t[0]], t))
        seg_v = np.concatenate(([v[0]], v))
        slope = np.concatenate(([0.0], slope, [0.0]))
        for name, array in (
            ("t_s", t),
            ("v", v),
            ("_seg_t", seg_t),
            ("_seg_v", seg_v),
            ("_slope", slope),
        ):
            array.setflags(write=False)
            object.__setattr__(self, name, array)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Channel):
            return NotImplemented
        return np.array_equal(self.t_s, other.t_s) and np.array_equal(self.v, other.v)

    __hash__ = None  # type: ignore[assignment]

    def __len__(self) -> int:
        return int(self.t_s.size)

    def evaluate(
        self,
        t_s: npt.ArrayLike,
        out: FloatArray | None = None,
        *,
        is_sorted: bool | None = None,
    ) -> FloatArray:
        """Values at times (right-continuous at steps), vectorised.

        Parameters
        ----------
        t_s
            Times, s from the experiment start (any order; sorted is fastest).
        out
            Optional array to write into (same shape as ``t_s``).
        is_sorted
            Whether ``t_s`` is 1-D and non-decreasing, if the caller knows (saves a pass);
            ``None`` checks.

        Returns
        -------
        numpy.ndarray
            Values in the channel's unit.
        """
        x = np.asarray(t_s, dtype=np.float64)
        if is_sorted is None:
            is_sorted = is_sorted_1d(x)
        if is_sorted and x.size > 4 * self.t_s.size:
            # sorted times: search the few breakpoints among the many times; each stretch's
            # start time, start value and slope then repeat over the times it serves
            first = np.searchsorted(x, self.t_s, side="left")
            counts = np.diff(first, prepend=0, append=x.size)
            result = np.subtract(x, np.repeat(self._seg_t, counts), out=out)
            result *= np.repeat(self._slope, counts)
            result += np.repeat(self._seg_v, counts)
            return result
        index = np.searchsorted(self.t_s, x, side="right")
        result = np.subtract(x, np.take(self._seg_t, index), out=out)
        result *= np.take(self._slope, index)
        result += np.take(self._seg_v, index)
        return result

    def max_abs_slope(self) -> tuple[float, float]:
        """Steepest sloped stretch (steps excluded).

        Returns
        -------
        (slope, t_s)
            Largest |dv/dt|, channel unit per s, and the start time of that stretch, s
            (0, 0 when the channel has no sloped stretch).
        """
        slopes = np.abs(self._slope[1:-1])
        if slopes.size == 0:
            return 0.0, 0.0
        k = int(np.argmax(slopes))
        return float(slopes[k]), float(self.t_s[k])

    def steps(self) -> tuple[FloatArray, FloatArray]:
        """Instant changes: times (s) and sizes (value after minus before) of every step."""
        same = np.diff(self.t_s) == 0
        jump = np.diff(self.v)
        mask = same & (jump != 0)
        return self.t_s[:-1][mask], jump[mask]


def is_sorted_1d(t_s: FloatArray) -> bool:
    """Whether times are a 1-D non-decreasing array (s)."""
    return t_s.ndim == 1 and bool(np.all(t_s[1:] >= t_s[:-1]))


def constant(value: float, t0_s: float = 0.0, t1_s: float | None = None) -> Channel:
    """A channel holding ``value`` (one breakpoint, or two spanning ``t0_s``..``t1_s``, s)."""
    if t1_s is None or t1_s == t0_s:
        return Channel(np.array([t0_s]), np.array([value]))
    return Channel(np.array([t0_s, t1_s]), np.array([value, value]))


def _interpolate(channel: Channel, x: FloatArray, side: str) -> FloatArray:
    t, v = channel.t_s, channel.v
    i = np.searchsorted(t, x, side=side)  # type: ignore[call-overload]
    n = t.size
    out = np.empty_like(x)
    before = i == 0
    after = i == n
    inside = ~(before | after)
    out[before] = v[0]
    out[after] = v[-1]
    k = i[inside]
    t0, t1, v0, v1 = t[k - 1], t[k], v[k - 1], v[k]
    xi = x[inside]
    value = v0 + (v1 - v0) * ((xi - t0) / (t1 - t0))
    value = np.where(xi == t1, v1, np.where(xi == t0, v0, value))
    out[inside] = value
    return out


def right_value(channel: Channel, t_s: npt.ArrayLike) -> FloatArray:
    """Exact right-continuous values at times ``t_s`` (s); for compiling, not fast sampling."""
    return _interpolate(channel, np.atleast_1d(np.asarray(t_s, dtype=np.float64)), "right")


def left_limit(channel: Channel, t_s: npt.ArrayLike) -> FloatArray:
    """Exact values just before times ``t_s`` (s): the value before a step at that time."""
    return _interpolate(channel, np.atleast_1d(np.asarray(t_s, dtype=np.float64)), "left")


def _assemble(times: FloatArray, left: FloatArray, right: FloatArray) -> Channel:
    """Build a channel from union times with left limits and right values (steps where differ)."""
    jump = left != right
    counts = 1 + jump.astype(np.int64)
    starts = np.concatenate(([0], np.cumsum(counts)[:-1]))
    total = int(counts.sum())
    t = np.repeat(times, counts)
    v = np.empty(total)
    v[starts] = np.where(jump, left, right)
    v[starts[jump] + 1] = right[jump]
    return _simplify(t, v)


def _simplify(t: FloatArray, v: FloatArray) -> Channel:
    """Drop breakpoints that change nothing: repeats, middles of constant runs and of steps."""
    if t.size <= 2:
        return Channel(t, v)
    keep = np.ones(t.size, dtype=bool)
    same_prev = np.zeros(t.size, dtype=bool)
    same_prev[1:] = (t[1:] == t[:-1]) & (v[1:] == v[:-1])
    keep &= ~same_prev
    t, v = t[keep], v[keep]
    if t.size <= 2:
        return Channel(t, v)
    interior = np.zeros(t.size, dtype=bool)
    interior[1:-1] = (v[1:-1] == v[:-2]) & (v[1:-1] == v[2:])
    interior[1:-1] |= (t[1:-1] == t[:-2]) & (t[1:-1] == t[2:])
    return Channel(t[~interior], v[~interior])


def _union(channels: Sequence[Channel], extra: FloatArray | None = None) -> FloatArray:
    parts = [c.t_s for c in channels]
    if extra is not None:
        parts.append(extra)
    return np.unique(np.concatenate(parts))


def add(channels: Sequence[Channel]) -> Channel:
    """Pointwise sum of channels (exact).

    Parameters
    ----------
    channels
        One or more channels in the same unit.

    Returns
    -------
    Channel
        Their sum.
    """
    if len(channels) == 1:
        return channels[0]
    times = _union(channels)
    left = np.sum([left_limit(c, times) for c in channels], axis=0)
    right = np.sum([right_value(c, times) for c in channels], axis=0)
    return _assemble(times, left, right)


def _crossings(a: Channel, b: Channel, times: FloatArray) -> FloatArray:
    d0 = right_value(a, times[:-1]) - right_value(b, times[:-1])
    d1 = left_limit(a, times[1:]) - left_limit(b, times[1:])
    cross = (d0 * d1) < 0
    if not np.any(cross):
        return np.empty(0)
    fraction = d0[cross] / (d0[cross] - d1[cross])
    t0, t1 = times[:-1][cross], times[1:][cross]
    return t0 + fraction * (t1 - t0)


def maximum(channels: Sequence[Channel]) -> Channel:
    """Pointwise maximum of channels (exact; crossing points are inserted).

    Parameters
    ----------
    channels
        One or more channels in the same unit.

    Returns
    -------
    Channel
        The upper envelope.
    """
    result = channels[0]
    for other in channels[1:]:
        times = _union([result, other])
        times = _union([result, other], _crossings(result, other, times))
        left = np.maximum(left_limit(result, times), left_limit(other, times))
        right = np.maximum(right_value(result, times), right_value(other, times))
        result = _assemble(times, left, right)
    return result


def multiply(channels: Sequence[Channel], tol: float) -> Channel:
    """Pointwise product of channels, tessellated to a bounded error.

    Parameters
    ----------
    channels
        One or more channels (e.g. a light program and dimensionless light factors).
    tol
        Largest allowed deviation of each pairwise product from the true product, in the
        product's unit.

    Returns
    -------
    Channel
        The product; each pairwise step deviates from the exact product by at most ``tol``.
    """
    if tol <= 0:
        raise ValueError("tol must be > 0")
    result = channels[0]
    for other in channels[1:]:
        times = _union([result, other])
        da = left_limit(result, times[1:]) - right_value(result, times[:-1])
        db = left_limit(other, times[1:]) - right_value(other, times[:-1])
        pieces = np.ceil(np.sqrt(np.abs(da * db) / (4.0 * tol))).astype(np.int64)
        pieces = np.maximum(pieces, 1)
        if np.any(pieces > 1):
            refine = pieces > 1
            t0 = np.repeat(times[:-1][refine], pieces[refine] - 1)
            span = np.repeat((times[1:] - times[:-1])[refine], pieces[refine] - 1)
            n = np.repeat(pieces[refine], pieces[refine] - 1)
            k = np.concatenate([np.arange(1, p) for p in pieces[refine]])
            times = np.unique(np.concatenate((times, t0 + span * k / n)))
        left = left_limit(result, times) * left_limit(other, times)
        right = right_value(result, times) * right_value(other, times)
        result = _assemble(times, left, right)
    return result


def window(channel: Channel, t0_s: float, t1_s: float) -> Channel:
    """The channel restricted to ``[t0_s, t1_s]`` (s), with exact end values.

    The first breakpoint is the right value at ``t0_s``, the last the left limit at ``t1_s``,
    so windows of neighbouring intervals concatenate into steps where they disagree.
    """
    t, v = channel.t_s, channel.v
    inside = (t > t0_s) & (t < t1_s)
    start = right_value(channel, t0_s)
    if t1_s <= t0_s:
        return Channel(np.array([t0_s]), start)
    end = left_limit(channel, t1_s)
    return _simplify(
        np.concatenate(([t0_s], t[inside], [t1_s])), np.concatenate((start, v[inside], end))
    )


def concat(pieces: Sequence[Channel]) -> Channel:
    """Join channels that follow each other in time into one (steps where they meet).

    Parameters
    ----------
    pieces
        Channels in time order, each starting at or after the end of the one before.

    Returns
    -------
    Channel
        The joined channel.
    """
    t = np.concatenate([p.t_s for p in pieces])
    v = np.concatenate([p.v for p in pieces])
    if np.any(np.diff(t) < 0):
        raise ValueError("pieces overlap in time")
    return _simplify(t, v)


def cumulative_integral(channel: Channel, t_s: npt.ArrayLike) -> FloatArray:
    """Exact integral of the channel from its first breakpoint to each time.

    Parameters
    ----------
    t_s
        Times, s (before the first breakpoint the integral is negative: the first value held).

    Returns
    -------
    numpy.ndarray
        Integral, channel unit x s.
    """
    t, v = channel.t_s, channel.v
    x = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
    area = np.concatenate(([0.0], np.cumsum(np.diff(t) * (v[:-1] + v[1:]) / 2.0)))
    i = np.searchsorted(t, x, side="right")
    out = np.empty_like(x)
    before = i == 0
    out[before] = (x[before] - t[0]) * v[0]
    k = i[~before] - 1
    xk = x[~before]
    value = right_value(channel, xk)
    out[~before] = area[k] + (xk - t[k]) * (v[k] + value) / 2.0
    # past the last breakpoint the last value holds: the trapezoid above covers it exactly
    return out
