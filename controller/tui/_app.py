"""The Textual app: a pure view over a data source, sending commands through a channel.

Rules of this module
--------------------
- The app owns one :class:`~._sources.DataSource` and one
  :class:`~._commands.CommandChannel`. A timer asks the source for news (``poll``) and posts
  each new snapshot as a :class:`SquallApp.SnapshotReady` message, which the app hands to the
  screen on top. A source fed by pushes (MQTT telemetry) also has an async ``bridge()``,
  which the app runs as a worker for as long as it runs.
- Widgets hold reactive state and never read data or call drivers; screens never send
  commands. Commands go through the app after a confirmation, and the answer comes back as a
  notification; the change itself shows up through the data, as everything else does.
- Commands are offered only when the channel says this user may command (``can_command``);
  otherwise their keys are hidden. Replay keys show only in replay.
- A source that can load in the background (a replay: ``background_loader``) gets a worker
  thread for it after the first paint, so keys are answered while a long log loads.
- Quitting closes the view and the source's reader, nothing else: the run goes on.
- Start-up: only what the board needs is imported before the first paint (the detail
  screen, its charts and numpy come when a chamber is opened).
"""

from __future__ import annotations

import contextlib
import logging
import threading
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import TYPE_CHECKING, ClassVar

from textual import work
from textual.app import App
from textual.binding import Binding, BindingType
from textual.message import Message
from textual.theme import Theme
from textual.worker import Worker, WorkerState

from ._commands import CommandChannel, CommandResult, NoCommands
from ._dialogs import ConfirmDialog, HelpDialog, NoteDialog
from ._look import PALETTE
from ._screens import AlarmScreen, OverviewScreen, TimelineScreen, ViewScreen
from ._snapshot import RunMode, RunStatus, Snapshot, TaskEntry
from ._sources import DataSource
from ._timeline import Timeline

if TYPE_CHECKING:
    from ._replay import ReplaySource

__all__ = ["LIVE_POLL_S", "REPLAY_FRAME_S", "THEME", "SquallApp"]

_log = logging.getLogger(__name__)

LIVE_POLL_S = 1.0
"""How often a live view asks its source for news, s."""
REPLAY_FRAME_S = 0.1
"""Time between replay frames, s."""

THEME = Theme(
    name="squall-tidepool",
    primary=PALETTE["seaglass"],
    secondary=PALETTE["dusk"],
    accent=PALETTE["sand"],
    warning=PALETTE["amber"],
    error=PALETTE["coral"],
    success=PALETTE["kelp"],
    foreground=PALETTE["foam"],
    background=PALETTE["deep"],
    surface=PALETTE["water"],
    panel=PALETTE["shoal"],
    dark=True,
    variables={
        "footer-key-foreground": PALETTE["sand"],
        "block-cursor-background": PALETTE["shoal"],
        "block-cursor-foreground": PALETTE["foam"],
        "block-cursor-text-style": "bold",
    },
)
"""The project's own colour theme ("tidepool")."""


class SquallApp(App[None]):
    """Watch or replay a run.

    Parameters
    ----------
    source
        Where the data comes from (a live log, a replay, later a broker).
    commands
        Where operator commands go; default none (read-only view).
    poll_s
        Seconds between polls of the source; default :data:`LIVE_POLL_S` live and
        :data:`REPLAY_FRAME_S` in replay. Tests pass a long period and call
        :meth:`poll_now` instead, so nothing waits on real time.
    refine_timeline
        Read the protocol (phases, duration, events) in a background thread after the first
        paint (True, the default: the first paint does not wait for the protocol models, and
        quitting does not wait for them either), or before the first snapshot (False:
        deterministic, for tests and screenshots).
    """

    CSS_PATH = str(Path(__file__).with_name("squall.tcss"))  # absolute: subclasses live elsewhere
    TITLE = "squall"
    ENABLE_COMMAND_PALETTE = False

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("a", "alarms", "alarms"),
        Binding("t", "timeline", "timeline"),
        Binding("o", "tasks", "tasks", show=False),  # in the help: footers stay in 80 columns
        Binding("h", "hold", "hold"),
        Binding("r", "resume", "resume"),
        Binding("X", "abort", "abort"),
        Binding("n", "note", "note"),
        Binding("space", "play_pause", "play/pause"),
        Binding("plus,equals_sign", "speed(2.0)", "faster", show=False),
        Binding("minus", "speed(0.5)", "slower", show=False),
        Binding("left_square_bracket", "seek(-3600)", "-1h", show=False),
        Binding("right_square_bracket", "seek(3600)", "+1h", show=False),
        Binding("left_curly_bracket", "seek(-86400)", "-1d", show=False),
        Binding("right_curly_bracket", "seek(86400)", "+1d", show=False),
        Binding("less_than_sign", "seek_end(0.0)", "start", show=False),
        Binding("greater_than_sign", "seek_end(1.0)", "end", show=False),
        Binding("question_mark", "help", "help"),
        Binding("q", "quit", "quit"),
    ]

    class SnapshotReady(Message):
        """A source produced a new snapshot.

        Parameters
        ----------
        snapshot
            The snapshot.
        """

        def __init__(self, snapshot: Snapshot) -> None:
            super().__init__()
            self.snapshot = snapshot

    def __init__(
        self,
        source: DataSource,
        commands: CommandChannel | None = None,
        *,
        poll_s: float | None = None,
        refine_timeline: bool = True,
    ) -> None:
        super().__init__()
        self.source = source
        self.commands: CommandChannel = commands or NoCommands(
            "replays are read only"
            if source.mode is RunMode.REPLAY
            else "no control socket to command this run"
        )
        if poll_s is None:
            poll_s = REPLAY_FRAME_S if source.mode is RunMode.REPLAY else LIVE_POLL_S
        self.poll_s = float(poll_s)
        self.snapshot: Snapshot | None = None
        self.timeline: Timeline = source.timeline
        self.sent: list[tuple[str, CommandResult]] = []
        self.tasks: tuple[TaskEntry, ...] | None = None
        """The run's operator tasks by start time; None until known."""
        self.tasks_note = ""
        """Why the run has no operator tasks, if known."""
        self._refine = refine_timeline
        self._status: RunStatus | None = None
        self._chamber: str | None = None
        self.register_theme(THEME)
        self.theme = THEME.name

    # -- life cycle -----------------------------------------------------------------------

    async def on_mount(self) -> None:
        """Open the source, show the board, start polling."""
        if not self._refine:
            self.timeline = self.source.refine_timeline()
            derive = getattr(self.source, "derive_tasks", None)
            if derive is not None:
                self.tasks = derive()
                self.tasks_note = str(getattr(self.source, "tasks_note", ""))
        first = self.source.open()
        self.snapshot = first
        await self.push_screen(OverviewScreen())
        self._deliver(first)
        self.set_interval(self.poll_s, self.poll_now, name="poll-source")
        bridge = getattr(self.source, "bridge", None)
        if bridge is not None:  # a pushed source (telemetry): its task feeds it
            self.run_worker(bridge(), name="bridge", group="bridge", exclusive=True)
        loader = getattr(self.source, "background_loader", None)
        if loader is not None:  # a long log: read the rest while the view answers keys
            self.run_worker(loader(), name="load", group="load", thread=True, exit_on_error=False)
        if self._refine:
            self.call_after_refresh(self._refine_timeline)

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        """When the background load ends, show it (or why it failed)."""
        worker = event.worker
        if worker.group != "load" or not self.is_running:
            return
        if event.state is WorkerState.ERROR:
            self.notify(f"loading the log stopped: {worker.error}", severity="error")
        if event.state in (WorkerState.SUCCESS, WorkerState.ERROR):
            self.poll_now()

    def on_unmount(self) -> None:
        """Close the source (the run goes on)."""
        self.source.close()

    def _refine_timeline(self) -> None:
        """Compile the protocol in a daemon thread: pure work, abandoned if the view quits
        first (a worker thread of the app would hold up the exit until it ended)."""
        threading.Thread(target=self._refine_in_thread, name="squall-timeline", daemon=True).start()

    def _refine_in_thread(self) -> None:
        try:
            timeline = self.source.refine_timeline()
        except Exception:  # the quick timeline stays; the view goes on
            _log.exception("placing the protocol's events failed")
        else:
            self._hand_over(self._timeline_arrived, timeline)
        derive = getattr(self.source, "derive_tasks", None)
        if derive is None:
            return
        try:
            tasks = derive()
        except Exception:  # no task list; the view goes on
            _log.exception("deriving the run's operator tasks failed")
            tasks = ()
        note = str(getattr(self.source, "tasks_note", ""))
        self._hand_over(self._tasks_arrived, tasks, note)

    def _hand_over(self, callback: Callable[..., None], *args: object) -> None:
        """Run ``callback(*args)`` in the app's loop from the background thread, unless the
        app has gone (its loop may close at any moment while it exits)."""
        if not self.is_running:
            return
        with contextlib.suppress(RuntimeError):
            self.call_from_thread(callback, *args)

    def _tasks_arrived(self, tasks: tuple[TaskEntry, ...], note: str) -> None:
        self.tasks, self.tasks_note = tasks, note
        screen = self.screen
        if self.snapshot is not None and isinstance(screen, ViewScreen) and screen.ready:
            screen.show(self.snapshot)

    def _timeline_arrived(self, timeline: Timeline) -> None:
        self.timeline = timeline
        self.poll_now()  # the source now knows the duration: a new snapshot shows it

    # -- data flow ------------------------------------------------------------------------

    def poll_now(self) -> None:
        """Ask the source for news once (the timer calls this; so may tests)."""
        snapshot = self.source.poll()
        if snapshot is not None:
            self.post_message(self.SnapshotReady(snapshot))

    def on_squall_app_snapshot_ready(self, message: SnapshotReady) -> None:
        """Hand a new snapshot to the screen on top."""
        self._deliver(message.snapshot)

    def _deliver(self, snapshot: Snapshot) -> None:
        self.snapshot = snapshot
        published = getattr(self.source, "tasks", None)
        if published is not None and getattr(self.source, "derive_tasks", None) is None:
            self.tasks = published()  # a broker: the controllers' retained task lists
        if snapshot.run.status is not self._status:
            self._status = snapshot.run.status
            self.refresh_bindings()
        if not self.is_running:
            return  # shutting down: widgets are pruned before the timers stop
        screen = self.screen
        if isinstance(screen, ViewScreen) and screen.ready:
            screen.show(snapshot)

    # -- navigation -----------------------------------------------------------------------

    @property
    def last_chamber(self) -> str | None:
        """The chamber last opened or stepped to in the detail view."""
        return self._chamber

    def remember_chamber(self, chamber: str) -> None:
        """Keep the board's cursor on the chamber last looked at.

        Parameters
        ----------
        chamber
            Chamber identifier.
        """
        self._chamber = chamber

    def open_detail(self, chamber: str) -> None:
        """Show a chamber's detail screen.

        Parameters
        ----------
        chamber
            Chamber identifier.
        """
        from ._detail import DetailScreen

        self._chamber = chamber
        self.push_screen(DetailScreen(chamber))

    def action_alarms(self) -> None:
        """Show the alarm list."""
        if not isinstance(self.screen, AlarmScreen):
            self.push_screen(AlarmScreen())

    def action_timeline(self) -> None:
        """Show the protocol timeline."""
        if not isinstance(self.screen, TimelineScreen):
            self.push_screen(TimelineScreen())

    def action_tasks(self) -> None:
        """Show the run's operator tasks."""
        from ._tasks_view import TasksScreen

        if not isinstance(self.screen, TasksScreen):
            self.push_screen(TasksScreen())

    def action_help(self) -> None:
        """Show the key list."""
        self.push_screen(HelpDialog())

    # -- which keys are offered -----------------------------------------------------------

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Offer commands only when allowed and sensible; replay keys only in replay."""
        status = self.snapshot.run.status if self.snapshot is not None else None
        can = self.commands.can_command
        if action == "hold":
            return can and status is RunStatus.RUNNING
        if action == "resume":
            return can and status is RunStatus.HELD
        if action == "abort":
            return can and status not in (RunStatus.FINISHED, None)
        if action == "note":
            return can
        if action in ("play_pause", "speed", "seek", "seek_end"):
            return self.source.mode is RunMode.REPLAY
        return True

    # -- commands -------------------------------------------------------------------------

    def _confirm_then(
        self,
        dialog: ConfirmDialog,
        label: str,
        send: Callable[[], Awaitable[CommandResult]],
    ) -> None:
        def answered(yes: bool | None) -> None:
            if yes:
                self._send(label, send)

        self.push_screen(dialog, answered)

    @work(exclusive=False, group="commands")
    async def _send(self, label: str, send: Callable[[], Awaitable[CommandResult]]) -> None:
        result = await send()
        self.sent.append((label, result))
        if result.ok:
            self.notify(result.message or f"{label}: done", title=label)
        else:
            self.notify(result.message or f"{label}: refused", title=label, severity="error")
        self.poll_now()

    def action_hold(self) -> None:
        """Hold the protocol clock (after confirmation)."""
        self._confirm_then(
            ConfirmDialog(
                "Hold the protocol clock?",
                "Setpoints stay where they are now until you resume (key r).",
                confirm_label="hold",
            ),
            "hold",
            self.commands.hold,
        )

    def action_resume(self) -> None:
        """Resume after a hold (after confirmation)."""
        self._confirm_then(
            ConfirmDialog(
                "Resume the protocol clock?",
                "The protocol goes on from where it was held.",
                confirm_label="resume",
            ),
            "resume",
            self.commands.resume,
        )

    def action_abort(self) -> None:
        """Abort the run (after confirmation)."""
        self._confirm_then(
            ConfirmDialog(
                "ABORT the run?",
                "Every output goes to its safe state and the run log is closed. "
                "This cannot be undone.",
                confirm_label="abort the run",
                danger=True,
            ),
            "abort",
            self.commands.abort,
        )

    def action_note(self) -> None:
        """Write a note to the audit trail."""

        def written(text: str | None) -> None:
            if text:
                self._send("note", lambda: self.commands.note(text))

        self.push_screen(NoteDialog(), written)

    def on_alarm_screen_ack_requested(self, message: AlarmScreen.AckRequested) -> None:
        """Acknowledge an alarm (after confirmation)."""
        alarm = message.alarm
        where = alarm.chamber or "the rig"
        self._confirm_then(
            ConfirmDialog(
                f"Acknowledge {alarm.code} on {where}?",
                alarm.reason,
                confirm_label="acknowledge",
            ),
            "ack",
            lambda: self.commands.ack(alarm.code, alarm.chamber),
        )

    # -- replay controls ------------------------------------------------------------------

    def _replay(self) -> ReplaySource | None:
        if self.source.mode is not RunMode.REPLAY:
            return None
        from ._replay import ReplaySource

        source = self.source
        return source if isinstance(source, ReplaySource) else None

    def _after_control(self) -> None:
        snapshot = self.source.poll()
        if snapshot is not None:
            self._deliver(snapshot)

    def action_play_pause(self) -> None:
        """Play or pause the replay."""
        if (replay := self._replay()) is not None:
            replay.toggle()
            self._after_control()

    def action_speed(self, factor: float) -> None:
        """Multiply the replay speed."""
        if (replay := self._replay()) is not None:
            replay.set_speed(replay.speed * factor)
            self._after_control()

    def action_seek(self, delta_s: float) -> None:
        """Move the replay position by ``delta_s`` seconds of run time."""
        if (replay := self._replay()) is not None:
            replay.seek_by(delta_s)
            self._after_control()

    def action_seek_end(self, fraction: float) -> None:
        """Move the replay position to the start (0) or the end (1) of the log."""
        if (replay := self._replay()) is not None:
            replay.seek_fraction(fraction)
            self._after_control()
