"""The operator tasks of the run: what people must do next, and when (key ``o``).

Rules of this module
--------------------
- The screen shows the tasks the app holds (:attr:`SquallApp.tasks`): derived in the
  background from the protocol and rig a log keeps, or the task lists controllers publish
  on the broker. It reads nothing itself.
- "Now" is the run's time as the snapshot tells it (newest sample live, the position in a
  replay), so a simulated or replayed run shows the tasks of its own time.
- Tasks whose time set aside is over are counted, not listed; the one in progress is marked
  ``▶ now``, the next ones show how far ahead they are.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.reactive import reactive
from textual.widget import Widget

from ._look import PALETTE, clock_utc, fmt_age
from ._screens import ViewScreen
from ._snapshot import Snapshot, TaskEntry

__all__ = ["TasksScreen", "TasksView", "task_lines"]


def task_lines(
    tasks: Sequence[TaskEntry] | None, now_utc_s: float | None, note: str = ""
) -> list[tuple[str, str]]:
    """The task list as lines of text with their style names.

    Parameters
    ----------
    tasks
        The run's tasks by start time; None while they are being derived.
    now_utc_s
        The run's time, UTC POSIX s (None before the first sample: every task is ahead).
    note
        Why there are no tasks, if known.

    Returns
    -------
    list of (str, str)
        ``(text, style)`` per line; styles are ``head``, ``now``, ``next``, ``later`` and
        ``quiet``.
    """
    if tasks is None:
        return [("working out the run's operator tasks…", "quiet")]
    now = now_utc_s if now_utc_s is not None else float("-inf")
    done = [t for t in tasks if t.end_utc_s <= now]
    ahead = [t for t in tasks if t.end_utc_s > now]
    lines: list[tuple[str, str]] = []
    head = f"operator tasks · {len(ahead)} to come"
    if done:
        head += f" · {len(done)} done"
    if now_utc_s is not None:
        head += f" · run time {clock_utc(now_utc_s)}"
    lines.append((head, "head"))
    if not tasks:
        lines.append((note or "this run has no operator tasks", "quiet"))
        return lines
    for i, task in enumerate(ahead):
        if task.start_utc_s <= now:
            when, style = "▶ now", "now"
        else:
            when = f"in {fmt_age(task.start_utc_s - now)}" if now_utc_s is not None else ""
            style = "next" if i == 0 else "later"
        chambers = ", ".join(task.chambers)
        lines.append(
            (
                f" {when:<16} {clock_utc(task.start_utc_s):<21} {task.minutes:>4.0f} min  "
                f"{task.kind:<12} {task.title}" + (f"  [{chambers}]" if chambers else ""),
                style,
            )
        )
    if not ahead:
        lines.append(("every task of this run is done", "quiet"))
    return lines


class TasksView(Widget):
    """The task list of the run, one task a line."""

    DEFAULT_CSS = """
    TasksView {
        height: 1fr;
        width: 1fr;
        padding: 0 1;
    }
    """

    tasks: reactive[tuple[TaskEntry, ...] | None] = reactive(None)
    """The run's tasks (None while being derived)."""
    now_utc_s: reactive[float | None] = reactive(None)
    """The run's time, UTC POSIX s."""
    note: reactive[str] = reactive("")
    """Why there are no tasks."""

    def render(self) -> Text:
        """The list as rich text."""
        styles = {
            "head": f"bold {PALETTE['foam']}",
            "now": f"bold {PALETTE['sand']}",
            "next": PALETTE["foam"],
            "later": PALETTE["foam"],
            "quiet": PALETTE["mist"],
        }
        out = Text(no_wrap=True, overflow="ellipsis")
        for text, style in task_lines(self.tasks, self.now_utc_s, self.note):
            out.append(text + "\n", style=styles[style])
        return out


class TasksScreen(ViewScreen):
    """What the operators must do around this run."""

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "back", "back")]

    def compose_body(self) -> ComposeResult:
        """The task list."""
        yield TasksView()

    def show(self, snapshot: Snapshot) -> None:
        """Show the tasks against the run's time."""
        super().show(snapshot)
        view = self.query_one(TasksView)
        view.tasks = self.squall.tasks
        view.note = self.squall.tasks_note
        view.now_utc_s = snapshot.run.utc_s

    def action_back(self) -> None:
        """Back to the previous screen."""
        self.app.pop_screen()
