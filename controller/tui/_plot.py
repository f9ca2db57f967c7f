"""A small time-series plot drawn in text: braille dots for measurements, dashes for setpoints.

Rules of this module
--------------------
- :func:`draw` is pure: numbers in, lines of (character, style) runs out; the widget only
  wraps it. Tests check the drawing without a terminal.
- Readable without colour: the measured series is drawn with braille dots (2 × 4 dots per
  cell, each column of dots spanning the minimum to maximum of its time bin, so noise shows
  as thickness), a setpoint with ``╌`` dashes, and closed incubation windows as ``▀`` marks
  on the axis line (and a tinted background in colour terminals).
- The time axis is relative to the newest time shown: ``-6h … now``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget

from ._look import PALETTE

__all__ = ["PlotData", "PlotSeries", "TracePlot", "draw", "span_label"]

_LEFT_BITS = (0x01, 0x02, 0x04, 0x40)
_RIGHT_BITS = (0x08, 0x10, 0x20, 0x80)
_Y_LABEL_W = 7


@dataclass(frozen=True, eq=False)
class PlotSeries:
    """One line of a plot.

    Attributes
    ----------
    label
        Legend text.
    values
        One value per time in :attr:`PlotData.utc_s` (NaN where missing), the plot's unit.
    kind
        ``"dots"`` (braille, for measurements) or ``"dash"`` (for setpoints).
    style
        Rich colour of the line.
    """

    label: str
    values: np.ndarray
    kind: str = "dots"
    style: str = PALETTE["foam"]


@dataclass(frozen=True, eq=False)
class PlotData:
    """What one plot shows.

    Attributes
    ----------
    title
        Title with the unit, e.g. ``temperature °C``.
    utc_s
        Sample times, UTC POSIX s, increasing.
    series
        Lines to draw (setpoints first, so measurements draw over them).
    shaded
        Per sample, whether it lies in a marked stretch (closed incubation); None for none.
    end_utc_s
        Right edge of the time axis, UTC POSIX s.
    span_s
        Width of the time axis, s.
    min_range
        Smallest value range shown, the plot's unit (so noise is not blown up).
    """

    title: str
    utc_s: np.ndarray
    series: tuple[PlotSeries, ...]
    shaded: np.ndarray | None = None
    end_utc_s: float = 0.0
    span_s: float = 3600.0
    min_range: float = 1.0


def span_label(seconds: float) -> str:
    """``6h``, ``30min`` or ``2d`` for an axis span.

    Parameters
    ----------
    seconds
        Span, s.
    """
    if seconds >= 86400 and seconds % 86400 == 0:
        return f"{seconds / 86400:.0f}d"
    if seconds >= 3600:
        return f"{seconds / 3600:g}h"
    return f"{seconds / 60:g}min"


def _y_range(data: PlotData, lo_i: int, hi_i: int) -> tuple[float, float] | None:
    chunks = [s.values[lo_i:hi_i] for s in data.series]
    finite = [c[np.isfinite(c)] for c in chunks]
    finite = [c for c in finite if c.size]
    if not finite:
        return None
    lo = float(min(c.min() for c in finite))
    hi = float(max(c.max() for c in finite))
    if hi - lo < data.min_range:
        mid = (hi + lo) / 2
        lo, hi = mid - data.min_range / 2, mid + data.min_range / 2
    pad = (hi - lo) * 0.05
    return lo - pad, hi + pad


def draw(data: PlotData, width: int, height: int) -> list[list[tuple[str, str]]]:
    """Draw a plot into ``height`` lines of ``width`` cells.

    Parameters
    ----------
    data
        What to draw.
    width
        Cells per line.
    height
        Lines (at least 4: title, one plot line, axis, labels).

    Returns
    -------
    list of lines
        Each line a list of (text, style) runs whose texts add up to ``width`` cells.
    """
    mist, foam = PALETTE["mist"], PALETTE["foam"]
    title: list[tuple[str, str]] = [(data.title, f"bold {foam}")]
    for s in data.series:
        glyph = "⣿" if s.kind == "dots" else "╌"
        title += [("  ", ""), (glyph, s.style), (f" {s.label}", mist)]
    if data.shaded is not None:
        title += [("  ", ""), ("▀", PALETTE["dusk"]), (" closed", mist)]
    lines = [_fit(title, width)]
    rows = max(1, height - 3)
    cols = max(1, width - _Y_LABEL_W)
    t1 = data.end_utc_s
    t0 = t1 - data.span_s
    utc = data.utc_s
    edges2 = np.searchsorted(utc, np.linspace(t0, t1, 2 * cols + 1), side="right")
    lo_i, hi_i = int(edges2[0]), int(edges2[-1])
    yr = _y_range(data, lo_i, hi_i)
    grid = [[" "] * cols for _ in range(rows)]
    styles = [[mist] * cols for _ in range(rows)]
    bits = np.zeros((rows, cols), dtype=np.int32)
    dot_style: list[list[str | None]] = [[None] * cols for _ in range(rows)]
    shade = np.zeros(cols, dtype=bool)
    if data.shaded is not None and hi_i > lo_i:
        any_closed, _ = _bin_reduce(data.shaded.astype("float64"), edges2[::2], np.fmax)
        shade = np.nan_to_num(any_closed) > 0
    if yr is not None:
        y_lo, y_hi = yr
        scale = (rows * 4 - 1) / (y_hi - y_lo)
        last = rows * 4 - 1
        for s in data.series:
            if s.kind == "dash":
                means = _bin_mean(s.values, edges2[::2])
                for c in np.flatnonzero(np.isfinite(means)):
                    r = min(last, max(0, int((y_hi - float(means[c])) * scale))) // 4
                    grid[r][c], styles[r][c] = "╌", s.style
                continue
            highs, _ = _bin_reduce(s.values, edges2, np.fmax)
            lows, _ = _bin_reduce(s.values, edges2, np.fmin)
            for sub in np.flatnonzero(np.isfinite(highs)):
                top = min(last, max(0, int((y_hi - float(highs[sub])) * scale)))
                bottom = min(last, max(0, int((y_hi - float(lows[sub])) * scale)))
                c, side = divmod(int(sub), 2)
                table = _RIGHT_BITS if side else _LEFT_BITS
                for dot in range(top, bottom + 1):
                    r, k = divmod(dot, 4)
                    bits[r, c] |= table[k]
                    dot_style[r][c] = s.style
        for r, c in zip(*np.nonzero(bits), strict=True):
            grid[r][c] = chr(0x2800 + int(bits[r, c]))
            styles[r][c] = dot_style[r][c] or foam
    if yr is None:  # nothing in the span: say so inside the frame
        message = "no data in this span"[:cols]
        start = max(0, (cols - len(message)) // 2)
        for i, ch in enumerate(message):
            grid[rows // 2][start + i] = ch
    tint = f" on {PALETTE['water']}"
    for r in range(rows):
        if yr is None:
            label = ""
        elif r == 0:
            label = _num(yr[1])
        elif r == rows - 1:
            label = _num(yr[0])
        elif r == rows // 2 and rows >= 5:
            label = _num((yr[0] + yr[1]) / 2)
        else:
            label = ""
        runs: list[tuple[str, str]] = [(label.rjust(_Y_LABEL_W - 1)[: _Y_LABEL_W - 1] + "┤", mist)]
        runs += [(grid[r][c], styles[r][c] + (tint if shade[c] else "")) for c in range(cols)]
        lines.append(_merge(runs))
    axis = [(" " * (_Y_LABEL_W - 1) + "└", mist)]
    axis += [("▀", PALETTE["dusk"]) if shade[c] else ("─", mist) for c in range(cols)]
    lines.append(_merge(axis))
    lines.append(_labels(data.span_s, cols, width))
    return lines[:height] if height >= 4 else lines[:1]


def _bin_reduce(
    values: np.ndarray, edges: np.ndarray, ufunc: np.ufunc
) -> tuple[np.ndarray, np.ndarray]:
    """Reduce ``values`` over the bins ``edges[i]:edges[i+1]`` with a NaN-ignoring ufunc.

    Returns the per-bin result (NaN for empty or all-NaN bins) and whether each bin is empty.
    """
    n = edges.size - 1
    empty = edges[1:] <= edges[:-1]
    out = np.full(n, np.nan)
    values = values[: int(edges[-1])] if n > 0 else values  # reduceat runs to the array's end
    if values.size == 0 or n <= 0 or empty.all():
        return out, empty
    starts = np.minimum(edges[:-1], values.size - 1)
    reduced = ufunc.reduceat(values, starts)
    out[~empty] = reduced[~empty]
    return out, empty


def _bin_mean(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Mean of the finite values in each bin ``edges[i]:edges[i+1]`` (NaN when none)."""
    finite = np.isfinite(values)
    sums, empty = _bin_reduce(np.where(finite, values, 0.0), edges, np.add)
    counts, _ = _bin_reduce(finite.astype("float64"), edges, np.add)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = sums / counts
    means[empty | ~(counts > 0)] = np.nan
    return means


def _num(value: float) -> str:
    size = abs(value)
    if size >= 1000:
        return f"{value:.0f}"
    if size >= 100:
        return f"{value:.1f}"
    return f"{value:.2f}" if size >= 10 or size == 0 else f"{value:.3g}"


def _labels(span_s: float, cols: int, width: int) -> list[tuple[str, str]]:
    cells = [" "] * cols
    marks = [(0, f"-{span_label(span_s)}"), (cols // 2, f"-{span_label(span_s / 2)}")]
    marks.append((cols - 3, "now"))
    for pos, text in marks:
        pos = max(0, min(pos, cols - len(text)))
        for i, ch in enumerate(text):
            if pos + i < cols:
                cells[pos + i] = ch
    return _fit([(" " * _Y_LABEL_W + "".join(cells), PALETTE["mist"])], width)


def _merge(runs: list[tuple[str, str]]) -> list[tuple[str, str]]:
    merged: list[tuple[str, str]] = []
    for text, style in runs:
        if merged and merged[-1][1] == style:
            merged[-1] = (merged[-1][0] + text, style)
        else:
            merged.append((text, style))
    return merged


def _fit(runs: list[tuple[str, str]], width: int) -> list[tuple[str, str]]:
    out: list[tuple[str, str]] = []
    used = 0
    for text, style in runs:
        if used >= width:
            break
        piece = text[: width - used]
        out.append((piece, style))
        used += len(piece)
    if used < width:
        out.append((" " * (width - used), ""))
    return out


class TracePlot(Widget):
    """A plot widget: set :attr:`data` and it redraws at its own size."""

    DEFAULT_CSS = """
    TracePlot {
        height: 1fr;
        min-height: 5;
        width: 1fr;
    }
    """

    data: reactive[PlotData | None] = reactive(None)
    """What to plot; None shows an empty frame while history loads."""

    def render(self) -> Text:
        """The plot as rich text."""
        width, height = self.size.width, self.size.height
        if self.data is None or width < _Y_LABEL_W + 4 or height < 4:
            return Text("loading history…", style=PALETTE["mist"])
        text = Text(no_wrap=True)
        for i, line in enumerate(draw(self.data, width, height)):
            if i:
                text.append("\n")
            for piece, style in line:
                text.append(piece, style=style or None)
        return text
