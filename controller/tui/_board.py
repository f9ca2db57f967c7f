"""The chamber board: one compact line per chamber, keyboard cursor, header line apart.

Rules of this module
--------------------
- The board is a line-API widget (:class:`textual.scroll_view.ScrollView`): it paints only the
  lines on screen, so 32 chambers updating every second cost a few dozen short strings.
- Its state is the tuple of :class:`~._snapshot.ChamberState` it was last given and the
  cursor; it never reads data itself. Selecting a chamber posts :class:`ChamberBoard.Opened`.
- Columns come from :func:`board_columns`, shared with :class:`BoardHeader`; at 80 columns
  every number fits, wider terminals gain setpoints beside PAR and flow and the alarm code.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import ClassVar

from rich.segment import Segment
from rich.style import Style
from textual import events
from textual.binding import Binding, BindingType
from textual.geometry import Region, Size
from textual.message import Message
from textual.reactive import reactive
from textual.scroll_view import ScrollView
from textual.strip import Strip
from textual.widget import Widget

from ._look import (
    PALETTE,
    alarm_badge,
    alarm_style,
    deviation_style,
    fmt,
    fmt_signed,
    incubation_badge,
)
from ._snapshot import ChamberState

__all__ = ["BoardHeader", "ChamberBoard", "Column", "board_columns", "render_cells"]

WIDE_AT = 100
"""Terminal columns from which the board shows setpoints and alarm codes."""


@dataclass(frozen=True, slots=True)
class Column:
    """One board column.

    Attributes
    ----------
    key
        What it shows.
    header
        Header text.
    width
        Characters (0: take what is left).
    """

    key: str
    header: str
    width: int


def board_columns(width: int, id_width: int) -> tuple[Column, ...]:
    """Columns for a board ``width`` characters wide.

    Parameters
    ----------
    width
        Board width, characters.
    id_width
        Width of the longest chamber id, characters.

    Returns
    -------
    tuple of Column
        In display order; the last (phase) takes the rest of the line.
    """
    idw = max(3, min(id_width, 10))
    wide = width >= WIDE_AT
    cols = [
        Column("cursor", "", 1),
        Column("id", "id", idw),
        Column("alarm", "state", 6),
        Column("temp", "°C", 5),
        Column("set", "set", 5),
        Column("dev", "Δ", 5),
        Column("par", "PAR" if not wide else "PAR/set", 4 if not wide else 9),
        Column("flow", "flow" if not wide else "flow/set", 4 if not wide else 9),
        Column("o2", "O₂µM", 5),
        Column("sat", "sat%", 4),
        Column("inc", "incub", 6),
    ]
    if wide:
        cols.append(Column("code", "alarm", 18))
    cols.append(Column("phase", "phase", 0))
    return tuple(cols)


def _pair(value: float | None, setpoint: float | None, width: int, decimals: int) -> str:
    half = (width - 1) // 2
    return f"{fmt(value, half, decimals)}/{fmt(setpoint, width - half - 1, decimals)}"


def render_cells(
    state: ChamberState, columns: tuple[Column, ...], *, selected: bool
) -> list[tuple[str, str]]:
    """The text and rich style of each column of one chamber's line.

    Parameters
    ----------
    state
        The chamber's state.
    columns
        From :func:`board_columns`.
    selected
        Whether the cursor is on this line.

    Returns
    -------
    list of (text, style)
        One per column, each exactly the column's width (the last column unpadded).
    """
    foam, mist = PALETTE["foam"], PALETTE["mist"]
    cells: list[tuple[str, str]] = []
    for col in columns:
        key, w = col.key, col.width
        if key == "cursor":
            text, style = ("▶" if selected else " "), PALETTE["sand"]
        elif key == "id":
            text, style = state.chamber[:w].ljust(w), f"bold {foam}"
        elif key == "alarm":
            text = alarm_badge(state.alarm_level, state.alarm_acked)
            style = alarm_style(state.alarm_level, state.alarm_acked)
        elif key == "temp":
            text, style = fmt(state.temperature_c, w, 2), foam
        elif key == "set":
            text, style = fmt(state.temperature_setpoint_c, w, 2), mist
        elif key == "dev":
            text, style = fmt_signed(state.deviation_c, w, 2), deviation_style(state.deviation_c)
        elif key == "par":
            if w > 4:
                text = _pair(state.par, state.par_setpoint, w, 0)
            else:
                text = fmt(state.par, w, 0)
            style = foam
        elif key == "flow":
            if w > 4:
                text = _pair(state.flow_cm_s, state.flow_setpoint_cm_s, w, 1)
            else:
                text = fmt(state.flow_cm_s, w, 1)
            style = foam
        elif key == "o2":
            text, style = fmt(state.o2_umol_l, w, 0), PALETTE["seaglass"]
        elif key == "sat":
            text, style = fmt(state.o2_sat_pct, w, 0), PALETTE["seaglass"]
        elif key == "inc":
            text = incubation_badge(state.incubation)
            style = f"bold {PALETTE['dusk']}" if text.startswith("●") else mist
        elif key == "code":
            text = (state.alarm_code or "")[:w].ljust(w)
            style = alarm_style(state.alarm_level, state.alarm_acked) if state.alarm_code else mist
        else:  # phase
            text, style = state.phase, mist
        cells.append((text, style))
    return cells


_LEFT_ALIGNED = frozenset({"cursor", "id", "alarm", "inc", "code", "phase"})


def _header(column: Column) -> str:
    """A column title, right-aligned over numbers, left-aligned over words."""
    if not column.width:
        return column.header
    if column.key in _LEFT_ALIGNED:
        return column.header.ljust(column.width)
    return column.header.rjust(column.width)


@lru_cache(maxsize=256)
def _style(text: str) -> Style:
    return Style.parse(text)


def _strip(cells: list[tuple[str, str]], width: int, base: str) -> Strip:
    segments: list[Segment] = []
    base_style = _style(base) if base else None
    for i, (text, style) in enumerate(cells):
        st = _style(style)
        if base_style is not None:
            st = base_style + st if "on " not in style else st
        segments.append(Segment(text, st))
        if i < len(cells) - 1:
            segments.append(Segment(" ", base_style))
    strip = Strip(segments)
    return strip.crop_extend(0, width, base_style)


class BoardHeader(Widget):
    """The board's column titles (one line), laid out like the board below it."""

    DEFAULT_CSS = """
    BoardHeader {
        height: 1;
        width: 1fr;
        color: $text-muted;
        text-style: bold;
    }
    """

    id_width: reactive[int] = reactive(3)
    """Width of the longest chamber id, characters."""

    def render_line(self, y: int) -> Strip:
        """The header line."""
        width = self.size.width
        cols = board_columns(width, self.id_width)
        cells = [(_header(c), "") for c in cols]
        return _strip(cells, width, "") if y == 0 else Strip.blank(width)


class ChamberBoard(ScrollView, can_focus=True):
    """All chambers, one line each; arrows move the cursor, Enter opens the detail view."""

    DEFAULT_CSS = """
    ChamberBoard {
        height: 1fr;
        width: 1fr;
        overflow-x: hidden;
        scrollbar-size-vertical: 1;
    }
    """

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("up,k", "move(-1)", "up", show=False),
        Binding("down,j", "move(1)", "down", show=False),
        Binding("pageup", "move(-10)", "page up", show=False),
        Binding("pagedown", "move(10)", "page down", show=False),
        Binding("home", "jump(0)", "first", show=False),
        Binding("end", "jump(-1)", "last", show=False),
        Binding("enter", "open", "detail"),
    ]

    class Opened(Message):
        """The operator asked for a chamber's detail view.

        Parameters
        ----------
        chamber
            Chamber identifier.
        """

        def __init__(self, chamber: str) -> None:
            super().__init__()
            self.chamber = chamber

    cursor: reactive[int] = reactive(0, repaint=False)
    """Index of the selected chamber, clamped to the chambers shown."""

    def __init__(
        self, *, name: str | None = None, id: str | None = None, classes: str | None = None
    ) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self._states: tuple[ChamberState, ...] = ()

    @property
    def states(self) -> tuple[ChamberState, ...]:
        """The chamber states shown."""
        return self._states

    @property
    def selected(self) -> str | None:
        """The chamber under the cursor, None when there is none."""
        if not self._states:
            return None
        return self._states[self.cursor].chamber

    def id_width(self) -> int:
        """Width of the longest chamber id, characters."""
        return max((len(s.chamber) for s in self._states), default=3)

    def show(self, states: tuple[ChamberState, ...]) -> None:
        """Show new chamber states (repaints only what changed).

        Parameters
        ----------
        states
            Every chamber's state, in display order.
        """
        old = self._states
        self._states = states
        if len(old) != len(states):
            self.virtual_size = Size(self.size.width, len(states))
            self.cursor = self.validate_cursor(self.cursor)
            self.refresh()
            return
        top = int(self.scroll_offset.y)
        for i, (a, b) in enumerate(zip(old, states, strict=True)):
            if a != b and top <= i < top + self.size.height:
                self.refresh(Region(0, i - top, self.size.width, 1))

    def select(self, chamber: str) -> None:
        """Move the cursor to a chamber (ignored when it is not shown).

        Parameters
        ----------
        chamber
            Chamber identifier.
        """
        for i, state in enumerate(self._states):
            if state.chamber == chamber:
                self.cursor = i

    def validate_cursor(self, value: int) -> int:
        """Clamp the cursor to the chambers shown."""
        return max(0, min(value, len(self._states) - 1)) if self._states else 0

    def watch_cursor(self, old: int, new: int) -> None:
        """Keep the cursor visible and repaint the two lines concerned."""
        self.scroll_to_region(Region(0, new, 1, 1), animate=False, immediate=True)
        self.refresh()

    def on_resize(self) -> None:
        """Re-lay the virtual canvas to the new width."""
        self.virtual_size = Size(self.size.width, len(self._states))

    def action_move(self, step: int) -> None:
        """Move the cursor by ``step`` lines."""
        self.cursor = self.validate_cursor(self.cursor + step)

    def action_jump(self, index: int) -> None:
        """Jump to the first (0) or last (-1) chamber."""
        self.cursor = self.validate_cursor(index if index >= 0 else len(self._states) - 1)

    def action_open(self) -> None:
        """Open the selected chamber's detail view."""
        if self.selected is not None:
            self.post_message(self.Opened(self.selected))

    def on_click(self, event: events.Click) -> None:
        """A click selects the line under the mouse (the board is keyboard-first)."""
        self.cursor = self.validate_cursor(int(self.scroll_offset.y) + event.y)

    def render_line(self, y: int) -> Strip:
        """One chamber's line (the line API)."""
        width = self.size.width
        row = int(self.scroll_offset.y) + y
        if row >= len(self._states):
            return Strip.blank(width)
        selected = row == self.cursor
        cols = board_columns(width, self.id_width())
        cells = render_cells(self._states[row], cols, selected=selected)
        base = f"on {PALETTE['shoal']}" if selected and self.has_focus else ""
        if selected and not self.has_focus:
            base = f"on {PALETTE['water']}"
        return _strip(cells, width, base)

    def on_focus(self) -> None:
        """Repaint the cursor line in its focused colour."""
        self.refresh()

    def on_blur(self) -> None:
        """Repaint the cursor line in its unfocused colour."""
        self.refresh()
