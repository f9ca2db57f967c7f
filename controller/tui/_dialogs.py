"""Modal dialogs: confirm a command, write a note, read the key list.

Rules of this module
--------------------
- A dialog returns its answer through ``dismiss`` (textual's screen result); it never sends
  anything itself. The app decides what to do with the answer.
- Confirmation defaults to "no": Escape or ``n`` cancel, only ``y`` or the confirm button
  confirm. A dangerous command names what it will do in the question itself.
"""

from __future__ import annotations

from typing import ClassVar

from textual import on
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Input, Label, Static

__all__ = ["ConfirmDialog", "HelpDialog", "NoteDialog"]


class ConfirmDialog(ModalScreen[bool]):
    """Ask yes or no; the result is True only for an explicit yes.

    Parameters
    ----------
    question
        What will happen, as a question.
    detail
        One more line of explanation ("" for none).
    confirm_label
        Text of the confirm button.
    danger
        Style the confirm button as dangerous.
    """

    DEFAULT_CSS = """
    ConfirmDialog {
        align: center middle;
        background: $background 60%;
    }
    ConfirmDialog > Vertical {
        width: 64;
        max-width: 100%;
        height: auto;
        border: heavy $warning;
        background: $surface;
        padding: 0 1;
    }
    ConfirmDialog .question { text-style: bold; width: 1fr; }
    ConfirmDialog .detail { color: $text-muted; width: 1fr; }
    ConfirmDialog Horizontal { height: auto; align-horizontal: right; margin-top: 1; }
    ConfirmDialog Button { margin-left: 2; min-width: 14; }
    """

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("y", "answer(True)", "yes"),
        Binding("n,escape", "answer(False)", "no"),
    ]

    def __init__(
        self, question: str, detail: str = "", *, confirm_label: str = "yes", danger: bool = False
    ) -> None:
        super().__init__()
        self._question = question
        self._detail = detail
        self._confirm_label = confirm_label
        self._danger = danger

    def compose(self) -> ComposeResult:
        """Question, detail, buttons (cancel focused)."""
        with Vertical():
            yield Label(self._question, classes="question")
            if self._detail:
                yield Static(self._detail, classes="detail")
            with Horizontal():
                yield Button("n: no, keep as is", id="no")
                yield Button(
                    f"y: {self._confirm_label}",
                    id="yes",
                    variant="error" if self._danger else "warning",
                )

    def on_mount(self) -> None:
        """Focus the safe choice."""
        self.query_one("#no", Button).focus()

    def action_answer(self, yes: bool) -> None:
        """Close with the answer."""
        self.dismiss(yes)

    @on(Button.Pressed)
    def _pressed(self, event: Button.Pressed) -> None:
        self.dismiss(event.button.id == "yes")


class NoteDialog(ModalScreen[str | None]):
    """Type a note for the run's audit trail; Enter sends, Escape cancels (result None)."""

    DEFAULT_CSS = """
    NoteDialog {
        align: center middle;
        background: $background 60%;
    }
    NoteDialog > Vertical {
        width: 70;
        max-width: 100%;
        height: auto;
        border: heavy $primary;
        background: $surface;
        padding: 0 1;
    }
    NoteDialog .hint { color: $text-muted; }
    """

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "cancel", "cancel")]

    def compose(self) -> ComposeResult:
        """Prompt, input, hint."""
        with Vertical():
            yield Label("Note for the audit trail (time and user are added):")
            yield Input(placeholder="e.g. sampled C1–C4 for nutrients", id="note", max_length=500)
            yield Static("enter: write note   escape: cancel", classes="hint")

    def on_mount(self) -> None:
        """Focus the input."""
        self.query_one(Input).focus()

    @on(Input.Submitted)
    def _submitted(self, event: Input.Submitted) -> None:
        text = event.value.strip()
        self.dismiss(text or None)

    def action_cancel(self) -> None:
        """Close without a note."""
        self.dismiss(None)


HELP_TEXT = """\
[b]Everywhere[/b]
  ?            this help                     q        quit the view (the run goes on)
  a            alarm list                    t        protocol timeline
  o            operator tasks still to come  escape   back to the chamber board
[b]Chamber board[/b]
  ↑ ↓ / k j    move between chambers         enter    chamber detail with charts
  page keys    jump ten chambers             home end first / last chamber
[b]Chamber detail[/b]
  ← →          previous / next chamber       z        chart span 1h → 6h → 24h
[b]Alarm list[/b]
  ↑ ↓          choose an alarm               enter    acknowledge it (asks first)
[b]Commands[/b] (only when this view may command the controller)
  h            hold the protocol clock       r        resume after a hold
  X            abort the run (asks first)    n        write a note to the audit trail
[b]Replay[/b]
  space        play / pause                  + -      twice / half the speed
  [ ]          back / ahead one hour         { }      back / ahead one day
  home end     (board) first / last chamber  < >      start / end of the log

Symbols: filled shape + CAPITALS = needs attention (■ TRIP ◆ ALRM ▲ WARN);
hollow + lower case = acknowledged (□ trip ◇ alrm △ warn); · ok = no alarm.
● shut = incubation closed (O₂ flux measured), ○ open = flushed.
Charts: ⣿ measured, ╌ setpoint, ▀ on the axis = closed window."""


class HelpDialog(ModalScreen[None]):
    """The key list and the meaning of every symbol."""

    DEFAULT_CSS = """
    HelpDialog {
        align: center middle;
        background: $background 60%;
    }
    HelpDialog > Vertical {
        width: 84;
        max-width: 100%;
        height: auto;
        max-height: 100%;
        border: heavy $primary;
        background: $surface;
        padding: 0 1;
        overflow-y: auto;
    }
    """

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape,question_mark,q", "close", "close")]

    def compose(self) -> ComposeResult:
        """The help text."""
        with Vertical():
            yield Static(HELP_TEXT, id="help-text")

    def action_close(self) -> None:
        """Close the help."""
        self.dismiss(None)
