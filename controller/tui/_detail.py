"""The chamber detail screen: current values and charts of the last hours.

Rules of this module
--------------------
- The screen shows one chamber at a time; ← and → move to the neighbours on the board.
- History comes from the data source: a live source reads hours of one chamber from the log
  in a worker thread (the screen stays responsive), then new samples are appended as they
  arrive; a replay source slices what it holds, at every frame.
- Two charts: temperature (measured against setpoint) and oxygen (µmol L⁻¹ with closed
  incubation windows marked). The span cycles through :data:`SPANS_S` with ``z``.
"""

from __future__ import annotations

import math
import time
from typing import ClassVar

import numpy as np
from rich.text import Text
from textual import work
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.reactive import reactive
from textual.widget import Widget

from controller.storage import IncubationState

from ._look import (
    PALETTE,
    alarm_badge,
    alarm_style,
    deviation_style,
    fmt,
    fmt_signed,
    incubation_badge,
)
from ._plot import PlotData, PlotSeries, TracePlot, span_label
from ._screens import ViewScreen
from ._snapshot import ChamberState, RunMode, Snapshot, Trace

__all__ = ["REPLAY_CHART_S", "SPANS_S", "ChamberCard", "DetailScreen", "append_state", "plot_data"]

SPANS_S = (3600.0, 6 * 3600.0, 24 * 3600.0)
"""Chart spans the ``z`` key cycles through, s."""
REPLAY_CHART_S = 0.25
"""Least real time between chart redraws while a replay plays, s (frames come every 0.1 s;
at 3600× a 6 h chart moves about a column per frame, so 4 redraws a second look smooth and
cost less than half)."""


def append_state(trace: Trace, state: ChamberState, keep_s: float) -> Trace:
    """A trace with a newer sample appended, oldest samples beyond ``keep_s`` dropped.

    Parameters
    ----------
    trace
        The trace so far.
    state
        The chamber's newest state; ignored unless newer than the trace's last sample.
    keep_s
        How much history to keep, s.

    Returns
    -------
    Trace
        The same trace when nothing was appended, else a new one.
    """
    if state.utc_s is None or (len(trace) and state.utc_s <= trace.utc_s[-1]):
        return trace

    def add(values: np.ndarray, value: float | None) -> np.ndarray:
        return np.append(values, np.nan if value is None else value)

    grown = Trace(
        chamber=trace.chamber,
        utc_s=np.append(trace.utc_s, state.utc_s),
        temperature_c=add(trace.temperature_c, state.temperature_c),
        temperature_setpoint_c=add(trace.temperature_setpoint_c, state.temperature_setpoint_c),
        o2_umol_l=add(trace.o2_umol_l, state.o2_umol_l),
        o2_sat_pct=add(trace.o2_sat_pct, state.o2_sat_pct),
        closed=np.append(trace.closed, state.incubation is IncubationState.CLOSED),
    )
    return grown.window(state.utc_s, keep_s)


def plot_data(trace: Trace, end_utc_s: float, span_s: float) -> tuple[PlotData, PlotData]:
    """The temperature and oxygen charts of a trace.

    Parameters
    ----------
    trace
        The chamber's history.
    end_utc_s
        Right edge of the charts, UTC POSIX s.
    span_s
        Width of the charts, s.

    Returns
    -------
    tuple of PlotData
        (temperature, oxygen).
    """
    temperature = PlotData(
        title="temperature °C",
        utc_s=trace.utc_s,
        series=(
            PlotSeries("setpoint", trace.temperature_setpoint_c, "dash", PALETTE["sand"]),
            PlotSeries("measured", trace.temperature_c, "dots", PALETTE["foam"]),
        ),
        end_utc_s=end_utc_s,
        span_s=span_s,
        min_range=0.5,
    )
    oxygen = PlotData(
        title="O₂ µmol/L",
        utc_s=trace.utc_s,
        series=(PlotSeries("measured", trace.o2_umol_l, "dots", PALETTE["seaglass"]),),
        shaded=trace.closed,
        end_utc_s=end_utc_s,
        span_s=span_s,
        min_range=10.0,
    )
    return temperature, oxygen


class ChamberCard(Widget):
    """Two lines: the chamber's name, state and every current value with its setpoint."""

    DEFAULT_CSS = """
    ChamberCard {
        height: 2;
        width: 1fr;
        background: $surface;
    }
    """

    state: reactive[ChamberState | None] = reactive(None)
    """The chamber shown."""
    span_s: reactive[float] = reactive(SPANS_S[1])
    """Chart span, s."""

    def render(self) -> Text:
        """The card as rich text."""
        s = self.state
        mist, foam = PALETTE["mist"], PALETTE["foam"]
        if s is None:
            return Text("no chamber", style=mist)
        top = Text(no_wrap=True, overflow="ellipsis")
        top.append(f" {s.chamber} ", style=f"bold {PALETTE['deep']} on {PALETTE['seaglass']}")
        top.append(" ")
        top.append(
            alarm_badge(s.alarm_level, s.alarm_acked),
            style=alarm_style(s.alarm_level, s.alarm_acked),
        )
        if s.alarm_code:
            top.append(f" {s.alarm_code}", style=alarm_style(s.alarm_level, True))
        inc = incubation_badge(s.incubation)
        top.append(f"  {inc}", style=f"bold {PALETTE['dusk']}" if inc.startswith("●") else mist)
        top.append(f"  phase {s.phase or '-'}", style=mist)
        top.append(f"  charts: last {span_label(self.span_s)}", style=mist)
        bottom = Text(no_wrap=True, overflow="ellipsis")
        bottom.append(" T ", style=mist)
        bottom.append(fmt(s.temperature_c, 5, 2).strip(), style=f"bold {foam}")
        bottom.append(f"/{fmt(s.temperature_setpoint_c, 5, 2).strip()}°C ", style=mist)
        bottom.append(fmt_signed(s.deviation_c, 5, 2).strip(), style=deviation_style(s.deviation_c))
        bottom.append("  PAR ", style=mist)
        bottom.append(fmt(s.par, 4, 0).strip(), style=foam)
        bottom.append(f"/{fmt(s.par_setpoint, 4, 0).strip()}", style=mist)
        bottom.append("  flow ", style=mist)
        bottom.append(fmt(s.flow_cm_s, 4, 1).strip(), style=foam)
        bottom.append(f"/{fmt(s.flow_setpoint_cm_s, 4, 1).strip()}cm/s", style=mist)
        bottom.append("  O₂ ", style=mist)
        bottom.append(fmt(s.o2_umol_l, 5, 1).strip(), style=f"bold {PALETTE['seaglass']}")
        bottom.append("µmol/L ", style=mist)
        bottom.append(fmt(s.o2_sat_pct, 4, 0).strip() + "%sat", style=PALETTE["seaglass"])
        return Text("\n").join([top, bottom])


class DetailScreen(ViewScreen):
    """One chamber: card and two charts.

    Parameters
    ----------
    chamber
        The chamber to show first.
    """

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("left", "step(-1)", "prev chamber"),
        Binding("right", "step(1)", "next chamber"),
        Binding("z", "span", "span"),
        Binding("escape", "back", "board"),
    ]

    chamber: reactive[str] = reactive("", init=False)
    """The chamber shown."""
    span_s: reactive[float] = reactive(SPANS_S[1], init=False)
    """Chart span, s."""

    def __init__(self, chamber: str) -> None:
        super().__init__()
        self._trace: Trace = Trace(chamber=chamber)
        self._loaded = False
        self._drawn_at = -math.inf
        self.set_reactive(DetailScreen.chamber, chamber)

    @property
    def trace(self) -> Trace:
        """The history shown (for tests and the bench)."""
        return self._trace

    @property
    def loaded(self) -> bool:
        """Whether the history of the current chamber has arrived."""
        return self._loaded

    def compose_body(self) -> ComposeResult:
        """Card and charts."""
        yield ChamberCard()
        yield TracePlot(id="temperature-plot")
        yield TracePlot(id="oxygen-plot")

    def on_mount(self) -> None:
        """Load the first chamber's history."""
        self._reload()

    def watch_chamber(self) -> None:
        """A new chamber: reload its history."""
        self._reload()

    def watch_span_s(self) -> None:
        """A new span: reload the history."""
        self.query_one(ChamberCard).span_s = self.span_s
        self._reload()

    def _reload(self) -> None:
        self._loaded = False
        self._trace = Trace(chamber=self.chamber)
        for plot in self.query(TracePlot):
            plot.data = None
        source = self.squall.source
        if source.mode is RunMode.REPLAY:
            self._trace = source.history(self.chamber, self.span_s)
            self._loaded = True
            self._redraw()
        else:
            self._load_history(self.chamber, self.span_s)

    @work(thread=True, exclusive=True, group="history")
    def _load_history(self, chamber: str, span_s: float) -> None:
        trace = self.squall.source.history(chamber, span_s)
        self.app.call_from_thread(self._history_arrived, chamber, span_s, trace)

    def _history_arrived(self, chamber: str, span_s: float, trace: Trace) -> None:
        if chamber != self.chamber or span_s != self.span_s:
            return  # a stale answer for a chamber or span no longer shown
        self._trace = trace
        self._loaded = True
        snapshot = self.squall.snapshot
        if snapshot is not None:
            self.show(snapshot)
        else:
            self._redraw()

    def show(self, snapshot: Snapshot) -> None:
        """Card and charts of the chamber shown."""
        super().show(snapshot)
        state = snapshot.chamber(self.chamber)
        self.query_one(ChamberCard).state = state
        if not self._loaded:
            return
        if snapshot.run.mode is RunMode.REPLAY:
            self._trace = self.squall.source.history(self.chamber, self.span_s)
            now = time.monotonic()
            if snapshot.run.playing and now - self._drawn_at < REPLAY_CHART_S:
                return  # the card follows every frame; the charts a few times a second
            self._drawn_at = now
        elif state is not None:
            self._trace = append_state(self._trace, state, self.span_s)
        self._redraw(snapshot.run.utc_s)

    def _redraw(self, end_utc_s: float | None = None) -> None:
        trace = self._trace
        if end_utc_s is None:
            end_utc_s = float(trace.utc_s[-1]) if len(trace) else 0.0
        if len(trace):
            end_utc_s = max(end_utc_s, float(trace.utc_s[-1]))
        temperature, oxygen = plot_data(trace, end_utc_s, self.span_s)
        self.query_one("#temperature-plot", TracePlot).data = temperature
        self.query_one("#oxygen-plot", TracePlot).data = oxygen

    def action_step(self, step: int) -> None:
        """Show the previous (-1) or next (+1) chamber of the board."""
        chambers = self.squall.source.chambers
        if self.chamber in chambers:
            i = (chambers.index(self.chamber) + step) % len(chambers)
            self.chamber = chambers[i]
            self.squall.remember_chamber(self.chamber)

    def action_span(self) -> None:
        """Cycle the chart span."""
        i = SPANS_S.index(self.span_s) if self.span_s in SPANS_S else 0
        self.span_s = SPANS_S[(i + 1) % len(SPANS_S)]

    def action_back(self) -> None:
        """Back to the board."""
        self.app.pop_screen()
