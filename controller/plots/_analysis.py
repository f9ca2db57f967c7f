"""Figures of a run-log analysis: O2 traces with the fitted windows, rates against
temperature with the fitted Arrhenius curves, achieved versus programmed temperature.

Rules
-----
- Input is plain data (pandas frames with documented columns), so this module knows nothing
  about run logs or how the analysis was made.
- :class:`matplotlib.figure.Figure` with the Agg canvas directly: no pyplot, no global state,
  no display. Figures have a fixed width (:data:`WIDTH_IN`) and are saved at :data:`DPI`.
- Grey-scale safe: light and dark windows differ by line style as well as colour, GPP and R
  by marker; flagged windows are drawn dotted.
- Time runs along x as hours since the run's start, or days for runs longer than three days.
- At most :data:`MAX_PANELS` panels per figure; callers split longer lists into pages.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

__all__ = [
    "DPI",
    "MAX_PANELS",
    "WIDTH_IN",
    "figure_png",
    "render_o2_traces",
    "render_temperature_response",
    "render_tracking",
    "save_png",
]

WIDTH_IN = 7.2
"""Figure width, inches (a two-column journal page)."""
DPI = 150
"""Resolution of saved figures, dots per inch."""
MAX_PANELS = 16
"""Most panels drawn in one figure."""

_INK = "#222222"
_TRACE = "#8a8a8a"
_LIGHT = "#d08a10"
_DARK = "#1f3f6e"
_FLAGGED = "#b0342a"
_GPP = "#2d7d46"
_R = "#3b3b3b"
_SETPOINT = "#b0342a"


def _time_axis(run_s_max: float) -> tuple[float, str]:
    """Divisor of run_s and the axis label: hours, or days beyond three days."""
    if run_s_max > 3 * 86400:
        return 86400.0, "Time since start (d)"
    return 3600.0, "Time since start (h)"


def _grid(n: int, height_per_row_in: float, xlabel: str) -> tuple[Figure, list[Axes]]:
    """A figure with n panels in up to four columns, shared x, spare panels hidden.

    The lowest panel of each column shows the x tick labels and ``xlabel``.
    """
    n = max(min(n, MAX_PANELS), 1)
    cols = 1 if n == 1 else 2 if n <= 4 else 3 if n <= 9 else 4
    rows = math.ceil(n / cols)
    fig = Figure(figsize=(WIDTH_IN, max(2.4, height_per_row_in * rows + 0.9)), dpi=DPI)
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, cols, sharex=True, squeeze=False).ravel().tolist()
    for ax in axes[n:]:
        ax.set_visible(False)
    for k, ax in enumerate(axes[:n]):
        ax.tick_params(labelsize=7, colors=_INK)
        for spine in ("top", "right"):
            ax.spines[spine].set_visible(False)
        if k + cols >= n:  # nothing drawn below this panel
            ax.xaxis.set_tick_params(labelbottom=True)
            ax.set_xlabel(xlabel, fontsize=7)
    return fig, axes[:n]


def _empty(message: str) -> Figure:
    fig = Figure(figsize=(WIDTH_IN, 2.4), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.set_axis_off()
    ax.text(0.5, 0.5, message, ha="center", va="center", fontsize=10, color=_INK)
    return fig


def render_o2_traces(
    traces: pd.DataFrame, windows: pd.DataFrame, chambers: Sequence[str]
) -> Figure:
    """Dissolved O2 of each chamber with the straight lines fitted to its closed windows.

    Parameters
    ----------
    traces
        ``chamber``, ``run_s`` (s since the run's start) and ``o2_umol_l`` (µmol L⁻¹).
    windows
        ``chamber``, ``light`` (light/dark), ``fit_start_s``, ``fit_end_s``, ``mid_s`` (s),
        ``o2_mid_umol_l`` (µmol L⁻¹), ``slope_umol_l_h`` (µmol L⁻¹ h⁻¹) and ``usable``.
    chambers
        Chambers to draw, one panel each (at most :data:`MAX_PANELS`).

    Returns
    -------
    matplotlib.figure.Figure
        The figure (Agg canvas attached).
    """
    chambers = list(chambers)[:MAX_PANELS]
    if not chambers or traces.empty:
        return _empty("No O2 readings in this log")
    scale, label = _time_axis(float(np.nanmax(traces["run_s"].to_numpy(float))))
    fig, axes = _grid(len(chambers), 1.45, label)
    for ax, chamber in zip(axes, chambers, strict=True):
        part = traces[traces["chamber"] == chamber]
        ax.plot(part["run_s"] / scale, part["o2_umol_l"], color=_TRACE, lw=0.6)
        mine = windows[windows["chamber"] == chamber]
        for w in mine.itertuples(index=False):
            if not (np.isfinite(w.slope_umol_l_h) and np.isfinite(w.fit_start_s)):
                continue
            t = np.array([w.fit_start_s, w.fit_end_s])
            o2 = w.o2_mid_umol_l + w.slope_umol_l_h * (t - w.mid_s) / 3600.0
            light = w.light == "light"
            ax.plot(
                t / scale,
                o2,
                color=(_LIGHT if light else _DARK) if w.usable else _FLAGGED,
                lw=1.6,
                ls=("-" if light else "--") if w.usable else ":",
                solid_capstyle="butt",
            )
        ax.set_title(str(chamber), fontsize=8, color=_INK, loc="left")
    for ax in axes:
        ax.set_ylabel("O$_2$ (µmol L$^{-1}$)", fontsize=7)
    handles = [
        Line2D([], [], color=_TRACE, lw=0.8, label="optode reading"),
        Line2D([], [], color=_LIGHT, lw=1.6, label="light window fit"),
        Line2D([], [], color=_DARK, lw=1.6, ls="--", label="dark window fit"),
        Line2D([], [], color=_FLAGGED, lw=1.6, ls=":", label="flagged window"),
    ]
    fig.legend(handles=handles, loc="lower center", ncol=4, fontsize=7, frameon=False)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    return fig


def render_temperature_response(
    points: pd.DataFrame, fits: pd.DataFrame, crossings: pd.DataFrame, units: Sequence[str]
) -> Figure:
    """GPP and R against temperature with the fitted Boltzmann–Arrhenius curves.

    Parameters
    ----------
    points
        ``unit``, ``rate`` (``gpp``/``r``), ``par_level`` (µmol photons m⁻² s⁻¹),
        ``temperature_c`` (°C) and ``value`` (µmol O2 m⁻² h⁻¹).
    fits
        ``unit``, ``rate``, ``par_level``, ``t_min_c``, ``t_max_c``, ``t_ref_c`` (°C),
        ``ln_rate_ref`` and ``ea_ev`` (eV); rows without a fit have NaN ``ea_ev``.
    crossings
        ``unit``, ``par_level``, ``t_cross_c``, ``ci_low_c`` and ``ci_high_c`` (°C).
    units
        Units to draw, one panel each (at most :data:`MAX_PANELS`).

    Returns
    -------
    matplotlib.figure.Figure
        The figure; a vertical line and band mark each crossing and its interval; GPP at
        light levels without a temperature fit (e.g. a light curve) is drawn hollow.
    """
    units = list(units)[:MAX_PANELS]
    if not units or points.empty:
        return _empty("No rates to plot against temperature")
    fig, axes = _grid(len(units), 1.9, "Temperature (°C)")
    k = 8.617333262e-5
    for ax, unit in zip(axes, units, strict=True):
        mine = points[points["unit"] == unit]
        curves = fits[(fits["unit"] == unit) & np.isfinite(fits["ea_ev"].to_numpy(float))]
        fitted_levels = set(curves.loc[curves["rate"] == "gpp", "par_level"])
        on_curve = (mine["rate"] == "r") | mine["par_level"].isin(fitted_levels)
        for rate, colour, marker in (("gpp", _GPP, "o"), ("r", _R, "s")):
            part = mine[(mine["rate"] == rate).to_numpy() & on_curve.to_numpy()]
            ax.scatter(part["temperature_c"], part["value"], s=12, c=colour, marker=marker,
                       edgecolors="none", alpha=0.85)  # fmt: skip
        other = mine[~on_curve.to_numpy()]
        ax.scatter(other["temperature_c"], other["value"], s=12, facecolors="none",
                   edgecolors=_GPP, marker="o", lw=0.7)  # fmt: skip
        cross = crossings[crossings["unit"] == unit]
        for fit in curves.itertuples(index=False):
            lo, hi = fit.t_min_c, fit.t_max_c
            for c in cross.itertuples(index=False):
                if np.isfinite(c.t_cross_c) and abs(c.t_cross_c - hi) < 10:
                    lo, hi = min(lo, c.t_cross_c), max(hi, c.t_cross_c)
            t = np.linspace(lo, hi, 80)
            u = (1.0 / (fit.t_ref_c + 273.15) - 1.0 / (t + 273.15)) / k
            colour = _GPP if fit.rate == "gpp" else _R
            ax.plot(t, np.exp(fit.ln_rate_ref + fit.ea_ev * u), color=colour, lw=1.2,
                    ls="-" if fit.rate == "gpp" else "--")  # fmt: skip
        for c in cross.itertuples(index=False):
            if not np.isfinite(c.t_cross_c):
                continue
            ax.axvspan(c.ci_low_c, c.ci_high_c, color="#cccccc", alpha=0.5, lw=0)
            ax.axvline(c.t_cross_c, color=_INK, lw=0.8, ls=":")
        ax.set_title(str(unit), fontsize=8, color=_INK, loc="left")
        ax.set_ylabel("µmol O$_2$ m$^{-2}$ h$^{-1}$", fontsize=7)
    handles = [
        Line2D([], [], color=_GPP, marker="o", ls="-", ms=4, label="GPP"),
        Line2D([], [], color=_R, marker="s", ls="--", ms=4, label="R"),
        Line2D([], [], color=_GPP, marker="o", ls="", mfc="none", ms=4, label="GPP, other light"),
        Line2D([], [], color=_INK, ls=":", label="crossing (band: CI)"),
    ]
    fig.legend(handles=handles, loc="lower center", ncol=4, fontsize=7, frameon=False)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    return fig


def render_tracking(traces: pd.DataFrame, chambers: Sequence[str]) -> Figure:
    """Achieved versus programmed water temperature of each chamber.

    Parameters
    ----------
    traces
        ``chamber``, ``run_s`` (s since the run's start), ``temperature_c`` and
        ``temperature_setpoint_c`` (°C).
    chambers
        Chambers to draw, one panel each (at most :data:`MAX_PANELS`).

    Returns
    -------
    matplotlib.figure.Figure
        Measured temperature solid, setpoint dashed.
    """
    chambers = list(chambers)[:MAX_PANELS]
    if not chambers or traces.empty:
        return _empty("No temperature readings in this log")
    scale, label = _time_axis(float(np.nanmax(traces["run_s"].to_numpy(float))))
    fig, axes = _grid(len(chambers), 1.35, label)
    for ax, chamber in zip(axes, chambers, strict=True):
        part = traces[traces["chamber"] == chamber]
        x = part["run_s"] / scale
        ax.plot(x, part["temperature_setpoint_c"], color=_SETPOINT, lw=1.0, ls="--")
        ax.plot(x, part["temperature_c"], color=_INK, lw=0.7)
        ax.set_title(str(chamber), fontsize=8, color=_INK, loc="left")
        ax.set_ylabel("°C", fontsize=7)
    handles = [
        Line2D([], [], color=_INK, lw=0.8, label="achieved"),
        Line2D([], [], color=_SETPOINT, lw=1.0, ls="--", label="programmed"),
    ]
    fig.legend(handles=handles, loc="lower center", ncol=2, fontsize=7, frameon=False)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    return fig


def figure_png(fig: Figure) -> bytes:
    """Render a figure as PNG.

    Parameters
    ----------
    fig
        A figure from this module (size in inches).

    Returns
    -------
    bytes
        PNG data at :data:`DPI` dots per inch.
    """
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI)
    return buffer.getvalue()


def save_png(fig: Figure, path: str | Path) -> Path:
    """Write a figure as a PNG file.

    Parameters
    ----------
    fig
        A figure from this module (size in inches).
    path
        Output file (replaced if it exists).

    Returns
    -------
    Path
        The file written, at :data:`DPI` dots per inch.
    """
    path = Path(path)
    path.write_bytes(figure_png(fig))
    return path
