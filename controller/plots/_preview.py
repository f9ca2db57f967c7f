"""The protocol preview figure: setpoints per group, phases and events, for a methods section.

Rules
-----
- Input is plain data (:class:`PreviewData`), built by the caller from a compiled protocol, so
  this module knows nothing about protocols or compilers and is easy to test.
- Uses :class:`matplotlib.figure.Figure` with the Agg canvas directly: no pyplot, no global
  state, no display needed. The figure has a fixed size in pixels (``FIGSIZE_IN`` × ``DPI``).
- One panel per variable present; one line per group. Treatments and controls differ by line
  style as well as colour (the figure must survive grey-scale printing): controls are dashed
  or dotted in greys, treatments solid or dash-dotted in colour. Replicate chambers whose
  setpoints differ from the group's first chamber are drawn thin in the same style.
- A timeline strip on top names the phases (also shaded in every panel) and draws each event
  as a bar with the groups it applies to; sampling times are small ticks on the strip.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Rectangle
from matplotlib.ticker import MaxNLocator

__all__ = [
    "DPI",
    "FIGSIZE_IN",
    "PANELS",
    "EventBar",
    "GroupLines",
    "PreviewData",
    "render_preview",
]

FIGSIZE_IN = (7.2, 8.4)
"""Figure width and height, inches."""
DPI = 150
"""Resolution of saved raster figures, dots per inch (1080 × 1260 px)."""

PANELS: tuple[tuple[str, str], ...] = (
    ("temperature_c", "Temperature (°C)"),
    ("par", "PAR (µmol photons m$^{-2}$ s$^{-1}$)"),
    ("flow_cm_s", "Flow (cm s$^{-1}$)"),
)
"""Variable key and axis label of each panel, top to bottom."""

_TREATMENT_COLOURS = ("#1f8a7a", "#d9901a", "#6a4c8c", "#2f5d8a", "#7a8c2e", "#c2462e")
_KIND_COLOURS = {
    "heatwave": ("#c2462e", "#d9901a"),
    "cold-spell": ("#2f6fa8", "#4aa3c8"),
    "storm": ("#4c5b78", "#1f8a7a"),
    "compound": ("#7b3f8c", "#a8385f"),
}
_TREATMENT_STYLES: tuple[Any, ...] = ("-", (0, (6, 1.6, 1.2, 1.6)), (0, (9, 2.5)), "-")
_CONTROL_COLOURS = ("#2b2b2b", "#7d7d7d", "#4a4a4a")
_CONTROL_STYLES: tuple[Any, ...] = ((0, (4, 2.2)), (0, (1.2, 1.6)), (0, (4, 1.5, 1.2, 1.5)))
_EVENT_COLOURS = {"heatwave": "#c2462e", "cold-spell": "#3577a8", "storm": "#56607a"}
_PHASE_SHADES = ("#f2efe6", "#ffffff")
_INK = "#222222"


@dataclass(frozen=True)
class GroupLines:
    """What to draw for one group.

    Attributes
    ----------
    name
        Group name in the protocol.
    label
        Legend label (the group's label, or its name).
    role
        ``"treatment"`` or ``"control"``.
    chambers
        Chamber ids of the group.
    lines
        Variable key (``temperature_c``, ``par``, ``flow_cm_s``) → one or more
        ``(t_s, value)`` pairs: the group's first chamber, then any replicate that differs.
        Times in s from the start; values in the variable's unit (°C, µmol photons m-2 s-1,
        cm s-1).
    event_kind
        What the group is exposed to, for its colour: ``heatwave``, ``cold-spell``,
        ``storm``, ``compound`` (several kinds) or ``None``.
    """

    name: str
    label: str
    role: str
    chambers: tuple[str, ...]
    lines: Mapping[str, Sequence[tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]]]
    event_kind: str | None = None


@dataclass(frozen=True)
class EventBar:
    """An event on the timeline: ``name`` of ``kind`` on ``groups`` from ``t0_s`` to ``t1_s``."""

    name: str
    kind: str
    groups: tuple[str, ...]
    t0_s: float
    t1_s: float


@dataclass(frozen=True)
class PreviewData:
    """Everything the preview figure shows.

    Attributes
    ----------
    title
        Protocol title.
    duration_s
        Length of the experiment, s.
    groups
        Lines per group, in legend order.
    phases
        ``(name, t0_s, t1_s)`` of each phase, s.
    events
        Event bars.
    sampling_s
        Sampling times, s from the start.
    footnote
        One line under the figure (e.g. what day 0 is).
    """

    title: str
    duration_s: float
    groups: tuple[GroupLines, ...]
    phases: tuple[tuple[str, float, float], ...]
    events: tuple[EventBar, ...] = ()
    sampling_s: tuple[float, ...] = ()
    footnote: str = ""
    panels: tuple[tuple[str, str], ...] = field(default=PANELS)


def _styles(groups: Sequence[GroupLines]) -> dict[str, tuple[str, Any]]:
    """Colour and line style of each group.

    Controls are grey and dashed or dotted; treatments are solid or dash-dotted, warm for
    heatwaves, blue for cold spells, slate for storms, purple for compound exposure.
    """
    styles: dict[str, tuple[str, Any]] = {}
    n_control = n_treatment = 0
    used: dict[str, int] = {}
    for group in groups:
        if group.role == "control":
            styles[group.name] = (
                _CONTROL_COLOURS[n_control % len(_CONTROL_COLOURS)],
                _CONTROL_STYLES[n_control % len(_CONTROL_STYLES)],
            )
            n_control += 1
            continue
        palette = _KIND_COLOURS.get(group.event_kind or "", _TREATMENT_COLOURS)
        key = group.event_kind or ""
        colour = palette[used.get(key, 0) % len(palette)]
        used[key] = used.get(key, 0) + 1
        styles[group.name] = (colour, _TREATMENT_STYLES[n_treatment % len(_TREATMENT_STYLES)])
        n_treatment += 1
    return styles


def _chamber_range(chambers: Sequence[str]) -> str:
    if len(chambers) <= 2:
        return ", ".join(chambers)
    return f"{chambers[0]}–{chambers[-1]}" if len(chambers) > 3 else ", ".join(chambers)


def _lanes(events: Sequence[EventBar]) -> list[int]:
    """Lane (row) of each event so that overlapping bars do not cover each other."""
    ends: list[float] = []
    lanes: list[int] = []
    for event in events:
        for lane, end in enumerate(ends):
            if event.t0_s >= end:
                ends[lane] = event.t1_s
                lanes.append(lane)
                break
        else:
            ends.append(event.t1_s)
            lanes.append(len(ends) - 1)
    return lanes


def _draw_timeline(ax: Axes, data: PreviewData, days: float) -> None:
    """Phase names on the top row, event bars below, sampling ticks at the bottom."""
    order = sorted(range(len(data.events)), key=lambda k: data.events[k].t0_s)
    events = [data.events[k] for k in order]
    lanes = _lanes(events)
    n_lanes = max(lanes, default=-1) + 1
    top = n_lanes + 1.0
    ax.set_ylim(-0.35, top + 0.05)
    ax.set_xlim(0, days)
    ax.axis("off")
    for k, (name, t0, t1) in enumerate(data.phases):
        ax.add_patch(
            Rectangle(
                (t0 / 86400, n_lanes),
                (t1 - t0) / 86400,
                1.0,
                facecolor=_PHASE_SHADES[k % 2],
                edgecolor="#c9c3b3",
                linewidth=0.6,
            )
        )
        ax.text(
            (t0 + t1) / 2 / 86400,
            n_lanes + 0.5,
            name,
            ha="center",
            va="center",
            fontsize=7.5,
            color=_INK,
            clip_on=True,
        )
    for event, lane in zip(events, lanes, strict=True):
        y = n_lanes - 1 - lane
        colour = _EVENT_COLOURS.get(event.kind, "#555555")
        x0, width = event.t0_s / 86400, (event.t1_s - event.t0_s) / 86400
        ax.add_patch(
            Rectangle((x0, y + 0.18), width, 0.64, facecolor=colour, alpha=0.22, edgecolor=colour)
        )
        ax.text(
            x0 + 0.01 * days,
            y + 0.5,
            f"{event.name} ({', '.join(event.groups)})",
            ha="left",
            va="center",
            fontsize=7,
            color=colour,
            fontweight="bold",
        )
    for t_s in data.sampling_s:
        ax.plot([t_s / 86400], [-0.15], marker="v", markersize=4, color=_INK, clip_on=False)


def _draw_panel(
    ax: Axes,
    key: str,
    label: str,
    data: PreviewData,
    styles: Mapping[str, tuple[str, Any]],
    days: float,
) -> None:
    for k, (_, t0, t1) in enumerate(data.phases):
        ax.axvspan(t0 / 86400, t1 / 86400, color=_PHASE_SHADES[k % 2], zorder=0, linewidth=0)
    for event in data.events:
        colour = _EVENT_COLOURS.get(event.kind, "#555555")
        for t in (event.t0_s, event.t1_s):
            ax.axvline(t / 86400, color=colour, linewidth=0.6, linestyle=(0, (2, 2)), zorder=1)
    for group in data.groups:
        colour, style = styles[group.name]
        for index, (t_s, values) in enumerate(group.lines.get(key, ())):
            ax.plot(
                np.asarray(t_s) / 86400,
                values,
                color=colour,
                linestyle=style,
                linewidth=1.5 if index == 0 else 0.7,
                alpha=1.0 if index == 0 else 0.8,
                zorder=5 if group.role == "control" else 4,
            )
    ax.set_ylabel(label, fontsize=8)
    ax.set_xlim(0, days)
    ax.tick_params(labelsize=7.5, direction="out", length=3)
    ax.grid(axis="y", color="#dddddd", linewidth=0.5, zorder=0)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    if key != "temperature_c":
        ax.set_ylim(bottom=0)
    ax.margins(x=0)


def render_preview(data: PreviewData, path: Path) -> Path:
    """Draw the preview figure and save it.

    Parameters
    ----------
    data
        What to draw.
    path
        Output file; the format follows its suffix (``.png``, ``.pdf``, ``.svg``).

    Returns
    -------
    Path
        ``path``.
    """
    present = [
        (key, label)
        for key, label in data.panels
        if any(group.lines.get(key) for group in data.groups)
    ]
    days = max(data.duration_s / 86400, 1e-6)
    styles = _styles(data.groups)
    figure = Figure(figsize=FIGSIZE_IN, dpi=DPI, facecolor="white")
    FigureCanvasAgg(figure)
    n_lanes = max(_lanes(sorted(data.events, key=lambda e: e.t0_s)), default=-1) + 1
    ratios = [0.45 + 0.32 * n_lanes] + [3.0 if k == "temperature_c" else 2.2 for k, _ in present]
    grid = figure.add_gridspec(
        len(ratios),
        1,
        height_ratios=ratios,
        hspace=0.12,
        left=0.12,
        right=0.97,
        top=0.93,
        bottom=0.165,
    )
    timeline = figure.add_subplot(grid[0])
    _draw_timeline(timeline, data, days)
    axes: list[Axes] = []
    for row, (key, label) in enumerate(present, start=1):
        ax = figure.add_subplot(grid[row], sharex=axes[0] if axes else None)
        _draw_panel(ax, key, label, data, styles, days)
        axes.append(ax)
    if axes:
        for ax in axes[:-1]:
            ax.tick_params(labelbottom=False)
        axes[-1].set_xlabel("Time since start (d)", fontsize=8.5)
        axes[-1].xaxis.set_major_locator(MaxNLocator(nbins=14, integer=True, min_n_ticks=3))
    figure.suptitle(data.title, fontsize=10, color=_INK, x=0.12, ha="left")
    handles: list[Any] = [
        Line2D(
            [],
            [],
            color=styles[g.name][0],
            linestyle=styles[g.name][1],
            linewidth=1.5,
            label=f"{g.label} ({g.role}; {_chamber_range(g.chambers)})",
        )
        for g in data.groups
    ]
    kinds = sorted({event.kind for event in data.events})
    handles += [
        Patch(facecolor=_EVENT_COLOURS.get(k, "#555555"), alpha=0.3, label=k) for k in kinds
    ]
    if data.sampling_s:
        handles.append(
            Line2D([], [], color=_INK, marker="v", linestyle="none", markersize=4, label="sampling")
        )
    figure.legend(
        handles=handles,
        loc="lower center",
        ncol=2 if len(handles) > 3 else len(handles),
        fontsize=7.5,
        frameon=False,
        bbox_to_anchor=(0.55, 0.038),
    )
    if data.footnote:
        figure.text(
            0.02,
            0.006,
            "\n".join(textwrap.wrap(data.footnote, width=125)),
            fontsize=6.5,
            color="#555555",
            ha="left",
            va="bottom",
        )
    path = Path(path)
    figure.savefig(path, dpi=DPI, facecolor="white")
    return path
