"""Screens built from the widgets: chamber board (overview), alarm list, protocol timeline.

Rules of this module
--------------------
- Every screen is a :class:`ViewScreen`: run bar on top, its body, alarm line and key footer
  below. The app hands each new snapshot to the active screen (:meth:`ViewScreen.show`);
  a screen coming back to the top pulls the newest one itself, so hidden screens cost
  nothing while data flows.
- Screens post requests (open a chamber, acknowledge an alarm) as messages or app actions;
  they never send commands themselves.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, ClassVar, cast

from rich.text import Text
from textual import on
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.message import Message
from textual.reactive import reactive
from textual.screen import Screen
from textual.widget import Widget
from textual.widgets import DataTable, Footer, Static

from ._bars import AlarmLine, RunBar, progress_bar
from ._board import BoardHeader, ChamberBoard
from ._look import PALETTE, alarm_badge, clock_utc, fmt_duration
from ._snapshot import AlarmEntry, RunState, Snapshot
from ._timeline import Timeline

if TYPE_CHECKING:
    from ._app import SquallApp

__all__ = ["AlarmScreen", "OverviewScreen", "TimelineScreen", "TimelineView", "ViewScreen"]


class ViewScreen(Screen[None]):
    """Base of the app's screens: run bar, body, alarm line, footer."""

    ready = False
    """Whether the screen's widgets exist (set on mount); the app shows snapshots only then."""

    @property
    def squall(self) -> SquallApp:
        """The app, typed."""
        return cast("SquallApp", self.app)

    def on_mount(self) -> None:
        """The widgets exist now: show the newest snapshot."""
        self.ready = True
        snapshot = self.squall.snapshot
        if snapshot is not None:
            self.show(snapshot)

    def compose(self) -> ComposeResult:
        """Run bar, the screen's body, alarm line, footer."""
        yield RunBar()
        yield from self.compose_body()
        yield AlarmLine()
        yield Footer()

    def compose_body(self) -> ComposeResult:
        """The screen's own widgets (overridden)."""
        yield from ()

    def on_screen_resume(self) -> None:
        """Show the newest snapshot when coming back to the top."""
        snapshot = self.squall.snapshot
        if snapshot is not None and self.ready:
            self.show(snapshot)

    def show(self, snapshot: Snapshot) -> None:
        """Show a snapshot (run bar and alarm line here; bodies extend this).

        Parameters
        ----------
        snapshot
            The newest snapshot.
        """
        self.query_one(RunBar).run = snapshot.run
        self.query_one(AlarmLine).alarms = snapshot.alarms


class OverviewScreen(ViewScreen):
    """Every chamber on one board."""

    def compose_body(self) -> ComposeResult:
        """Column titles and the board."""
        yield BoardHeader()
        yield ChamberBoard(id="board")

    def on_mount(self) -> None:
        """Focus the board."""
        self.query_one(ChamberBoard).focus()

    def on_screen_resume(self) -> None:
        """Put the cursor on the chamber last looked at in detail (the base class shows the
        newest snapshot; Textual calls both handlers)."""
        chamber = self.squall.last_chamber
        if chamber is not None:
            self.query_one(ChamberBoard).select(chamber)

    def show(self, snapshot: Snapshot) -> None:
        """Run bar, alarm line and every chamber's line."""
        super().show(snapshot)
        board = self.query_one(ChamberBoard)
        board.show(snapshot.chambers)
        self.query_one(BoardHeader).id_width = board.id_width()

    @on(ChamberBoard.Opened)
    def _open(self, event: ChamberBoard.Opened) -> None:
        self.squall.open_detail(event.chamber)


def _when(utc_s: float | None) -> str:
    return clock_utc(utc_s).replace(" UTC", "") if utc_s is not None else "-"


class AlarmScreen(ViewScreen):
    """Every alarm of the run; Enter acknowledges the selected one (after confirmation)."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("enter", "ack", "acknowledge"),
        Binding("escape", "back", "back"),
    ]

    class AckRequested(Message):
        """The operator wants to acknowledge an alarm.

        Parameters
        ----------
        alarm
            The alarm.
        """

        def __init__(self, alarm: AlarmEntry) -> None:
            super().__init__()
            self.alarm = alarm

    def __init__(self) -> None:
        super().__init__()
        self._alarms: tuple[AlarmEntry, ...] = ()

    def compose_body(self) -> ComposeResult:
        """The alarm table and a hint line."""
        table: DataTable[str] = DataTable(id="alarms", cursor_type="row", zebra_stripes=True)
        yield table
        yield Static("", id="alarm-hint")

    def on_mount(self) -> None:
        """Set up the columns."""
        table = self.query_one(DataTable)
        for label in ("state", "chamber", "alarm", "raised (UTC)", "cleared", "ack by", "reason"):
            table.add_column(label, key=label)
        table.focus()

    @property
    def alarms(self) -> tuple[AlarmEntry, ...]:
        """The alarms listed, in table order."""
        return self._alarms

    def show(self, snapshot: Snapshot) -> None:
        """Refill the table when the alarms changed, keeping the cursor on its alarm."""
        super().show(snapshot)
        hint = self.query_one("#alarm-hint", Static)
        can = self.squall.commands.can_command
        hint.update(
            "enter: acknowledge the selected alarm   escape: back"
            if can
            else f"read only: {self.squall.commands.why_not}"
        )
        if snapshot.alarms == self._alarms:
            return
        table = self.query_one(DataTable)
        chosen = self.selected
        self._alarms = snapshot.alarms
        table.clear()
        for alarm in self._alarms:
            state = alarm_badge(alarm.level, alarm.acked)
            if not alarm.active:
                state = "✓ clear"
            table.add_row(
                state,
                alarm.chamber or "rig",
                alarm.code,
                _when(alarm.raised_utc_s),
                _when(alarm.cleared_utc_s) if alarm.cleared_utc_s is not None else "active",
                alarm.acked_by or "-",
                alarm.reason,
            )
        if chosen is not None and chosen in self._alarms:
            table.move_cursor(row=self._alarms.index(chosen))

    @property
    def selected(self) -> AlarmEntry | None:
        """The alarm under the cursor, None when the list is empty."""
        if not self._alarms:
            return None
        row = self.query_one(DataTable).cursor_row
        return self._alarms[row] if 0 <= row < len(self._alarms) else None

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Offer acknowledging only when commands are allowed."""
        if action == "ack":
            return self.squall.commands.can_command
        return True

    def action_ack(self) -> None:
        """Ask the app to acknowledge the selected alarm."""
        alarm = self.selected
        if alarm is None:
            self.notify("no alarm to acknowledge", severity="warning")
            return
        if alarm.acked:
            self.notify(f"{alarm.code} is already acknowledged by {alarm.acked_by}")
            return
        self.post_message(self.AckRequested(alarm))

    def action_back(self) -> None:
        """Back to the previous screen."""
        self.app.pop_screen()

    @on(DataTable.RowSelected)
    def _row_selected(self, event: DataTable.RowSelected) -> None:
        if self.check_action("ack", ()):
            self.action_ack()


class TimelineView(Widget):
    """The protocol's phases on one bar with a ``▼`` at now, then phases and events listed."""

    DEFAULT_CSS = """
    TimelineView {
        height: 1fr;
        width: 1fr;
        padding: 0 1;
    }
    """

    timeline: reactive[Timeline | None] = reactive(None)
    """The protocol's timeline."""
    run: reactive[RunState | None] = reactive(None)
    """Where the run stands."""

    def render(self) -> Text:
        """The timeline as rich text."""
        tl, run = self.timeline, self.run
        mist, foam, sand = PALETTE["mist"], PALETTE["foam"], PALETTE["sand"]
        if tl is None or run is None:
            return Text("reading the protocol…", style=mist)
        width = max(10, self.size.width - 2)
        out = Text(no_wrap=True, overflow="ellipsis")
        out.append(tl.title or run.run_id, style=f"bold {foam}")
        out.append(f"\nelapsed {fmt_duration(run.elapsed_s)}", style=foam)
        out.append(f" of {fmt_duration(tl.duration_s)}", style=mist)
        out.append(f" · {fmt_duration(run.remaining_s)} left", style=sand)
        if run.progress is not None:
            out.append(f" · {run.progress * 100:.1f} % done", style=mist)
        out.append("\n")
        if tl.duration_s:
            marker = [" "] * width
            pos = min(width - 1, int(run.elapsed_s / tl.duration_s * width))
            marker[pos] = "▼"
            out.append("".join(marker) + "\n", style=sand)
            ruler = [" "] * width
            for span in tl.phases:
                a = min(width - 1, int(span.t0_s / tl.duration_s * width))
                ruler[a] = "┃"
            out.append("".join(ruler) + "\n", style=mist)
            out.append(progress_bar(run.progress, width) + "\n", style=PALETTE["seaglass"])
        out.append("\nphases\n", style=f"bold {mist}")
        for span in tl.phases:
            if run.elapsed_s >= span.t1_s:
                mark, style = "✓ done ", mist
            elif run.elapsed_s >= span.t0_s:
                mark, style = "▶ now  ", f"bold {sand}"
            else:
                mark, style = "· later", foam
            out.append(
                f" {mark} {fmt_duration(span.t0_s):>10} → {fmt_duration(span.t1_s):>10}  "
                f"{span.name}\n",
                style=style,
            )
        if tl.events:
            out.append("\nevents\n", style=f"bold {mist}")
            for span in tl.events:
                here = span.t0_s <= run.elapsed_s < span.t1_s
                out.append(
                    f" {'▶' if here else '·'} {span.kind:<10} {fmt_duration(span.t0_s):>10} → "
                    f"{fmt_duration(span.t1_s):>10}  {span.name}\n",
                    style=f"bold {sand}" if here else foam,
                )
        if tl.note:
            out.append(f"\n({tl.note})", style=mist)
        return out


class TimelineScreen(ViewScreen):
    """Where the run stands in its protocol."""

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "back", "back")]

    def compose_body(self) -> ComposeResult:
        """The timeline view."""
        yield TimelineView()

    def show(self, snapshot: Snapshot) -> None:
        """Move the now marker."""
        super().show(snapshot)
        view = self.query_one(TimelineView)
        view.timeline = self.squall.timeline
        view.run = snapshot.run

    def action_back(self) -> None:
        """Back to the previous screen."""
        self.app.pop_screen()
