"""Pilot tests: the views driven by keyboard at 80×24, with real logs and a stand-in
controller (RecordingChannel) that writes what a controller would into the watched log, so
every command's effect comes back through the data path the views really use.

Sources get hand-moved clocks and the apps poll only when a test calls ``poll_now``: nothing
waits on real time."""

from __future__ import annotations

from pathlib import Path

import pytest
from textual.geometry import Region
from textual.widgets import Footer, Input

from controller.storage import RunLogReader
from controller.tui import (
    AlarmScreen,
    ChamberBoard,
    CommandKind,
    ConfirmDialog,
    DetailScreen,
    HelpDialog,
    LogSource,
    NoCommands,
    NoteDialog,
    OverviewScreen,
    RecordingChannel,
    ReplaySource,
    RunStatus,
    SquallApp,
    SyntheticRun,
    TimelineScreen,
)
from controller.tui._bars import AlarmLine, RunBar
from controller.tui._board import BoardHeader

from .conftest import MakeSynthetic, with_trip

SIZE = (80, 24)
NEVER = 3600.0  # poll period for tests: they call poll_now themselves


class Clock:
    """A hand-moved clock (s)."""

    def __init__(self, t: float = 1000.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def live_app(run: SyntheticRun, commands: RecordingChannel | None = None) -> SquallApp:
    source = LogSource(run.writer.path, real_clock=Clock(), wall_clock=Clock())
    return SquallApp(source, commands, poll_s=NEVER, refine_timeline=False)


def channel_for(run: SyntheticRun) -> RecordingChannel:
    return RecordingChannel(writer=run.writer, times=lambda: run.times, user="ana")


def board_line(app: SquallApp, chamber: str) -> str:
    board = app.screen.query_one(ChamberBoard)
    row = [s.chamber for s in board.states].index(chamber)
    return board.render_line(row - int(board.scroll_offset.y)).text


async def test_navigating_chambers_by_keyboard_opens_their_detail(sim_log: Path) -> None:
    app = SquallApp(LogSource(sim_log, real_clock=Clock()), poll_s=NEVER, refine_timeline=False)
    async with app.run_test(size=SIZE) as pilot:
        board = app.screen.query_one(ChamberBoard)
        assert board.selected == "P1"
        await pilot.press("down", "down", "up", "down")
        assert board.selected == "P3"
        await pilot.press("enter")
        await pilot.pause()
        screen = app.screen
        assert isinstance(screen, DetailScreen) and screen.chamber == "P3"
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert screen.loaded and len(screen.trace) > 100  # hours of 20 s ticks
        await pilot.press("right")  # P3 → P1, wrapping round
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert screen.chamber == "P1" and screen.trace.chamber == "P1"
        await pilot.press("left", "left")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert screen.chamber == "P2"
        await pilot.press("z")
        assert screen.span_s == 24 * 3600.0
        await pilot.press("escape")
        assert isinstance(app.screen, OverviewScreen)
        assert app.screen.query_one(ChamberBoard).selected == "P2"  # where we left off


async def test_the_overview_fits_80_by_24_without_clipping(synthetic: MakeSynthetic) -> None:
    run = with_trip(synthetic(chambers=32))
    app = live_app(run)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        screen = app.screen
        whole = Region(0, 0, *SIZE)
        for widget_type, height in ((RunBar, 2), (BoardHeader, 1), (AlarmLine, 1), (Footer, 1)):
            region = screen.query_one(widget_type).region
            assert region.height == height and region.width == SIZE[0], widget_type
            assert whole.contains_region(region)
        board = screen.query_one(ChamberBoard)
        assert board.region.height >= 15 and whole.contains_region(board.region)
        regions = [screen.query_one(t).region for t in (RunBar, BoardHeader, ChamberBoard)]
        regions += [screen.query_one(AlarmLine).region, screen.query_one(Footer).region]
        assert sum(r.height for r in regions) == SIZE[1]  # stacked, nothing overlaps or hides
        line = board_line(app, "C01")
        assert len(line) == SIZE[0]
        # every number column is whole on an 80-column line: id, state, °C, set, Δ, PAR ...
        assert "23.00" in line or "20.00" in line
        header = screen.query_one(BoardHeader).render_line(0).text
        assert header.split()[:4] == ["id", "state", "°C", "set"] and "phase" in header
        await pilot.press("end")  # the 32nd chamber scrolls into view
        assert board.selected == "C32"
        assert board.region.height > 0 and "C32" in board_line(app, "C32")


async def test_alarm_state_reads_without_colour(synthetic: MakeSynthetic) -> None:
    run = with_trip(synthetic(chambers=4))
    app = live_app(run)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        tripped, quiet = board_line(app, "C03"), board_line(app, "C01")
        assert "■ TRIP" in tripped and "TRIP" not in quiet and "ok" in quiet
        assert ("● shut" in tripped) or ("○ open" in tripped)  # incubation as symbol + word
        alarm_line = app.screen.query_one(AlarmLine).render().plain
        assert "need attention" in alarm_line and "C03 over-temperature" in alarm_line


async def test_acknowledging_an_alarm_asks_first_and_reaches_the_log(
    synthetic: MakeSynthetic,
) -> None:
    run = with_trip(synthetic(chambers=4))
    channel = channel_for(run)
    app = live_app(run, channel)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("a")
        assert isinstance(app.screen, AlarmScreen)
        await pilot.pause()
        assert app.screen.selected is not None and app.screen.selected.code == "over-temperature"
        await pilot.press("enter")
        await pilot.pause()
        assert isinstance(app.screen, ConfirmDialog)
        await pilot.press("n")  # changed my mind: nothing is sent
        await pilot.pause()
        assert channel.commands == [] and isinstance(app.screen, AlarmScreen)
        await pilot.press("enter")
        await pilot.pause()
        await pilot.press("y")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert [(c.kind, c.alarm_code, c.chamber) for c in channel.commands] == [
            (CommandKind.ACK, "over-temperature", "C03")
        ]
        shown = app.screen.query_one(AlarmLine).render().plain
        assert "no alarm needs attention" in shown and "1 active, acknowledged" in shown
        assert app.snapshot is not None
        c03 = app.snapshot.chamber("C03")
        assert c03 is not None and c03.alarm_acked
        await pilot.press("escape")
        assert "□ trip" in board_line(app, "C03")  # hollow + lower case: acknowledged
    with RunLogReader(run.writer.path) as reader:
        acks = reader.alarms()
    assert list(acks[acks.action == "ack"].user) == ["ana"]


async def test_hold_and_resume_with_confirmation(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=6)
    run.run_ticks(30)
    channel = channel_for(run)
    app = live_app(run, channel)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        assert app.check_action("hold", ()) and not app.check_action("resume", ())
        await pilot.press("h")
        await pilot.pause()
        assert isinstance(app.screen, ConfirmDialog)
        await pilot.press("escape")  # cancel: no hold
        await pilot.pause()
        assert channel.commands == []
        await pilot.press("h")
        await pilot.pause()
        await pilot.press("y")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert channel.held and app.snapshot is not None
        assert app.snapshot.run.status is RunStatus.HELD
        assert "HELD" in app.screen.query_one(RunBar).render().plain
        assert app.check_action("resume", ()) and not app.check_action("hold", ())
        await pilot.press("h")  # not offered while held
        await pilot.pause()
        assert not isinstance(app.screen, ConfirmDialog)
        await pilot.press("r")
        await pilot.pause()
        assert isinstance(app.screen, ConfirmDialog)
        await pilot.press("y")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert [c.kind for c in channel.commands] == [CommandKind.HOLD, CommandKind.RESUME]
        assert app.snapshot.run.status is RunStatus.RUNNING
        assert [label for label, result in app.sent if result.ok] == ["hold", "resume"]
    with RunLogReader(run.writer.path) as reader:
        kinds = list(reader.events().kind)
        audit = reader.audit()
    assert kinds[-2:] == ["hold", "hold_end"]
    assert list(audit.command) == ["hold", "resume"] and set(audit.user) == {"ana"}


async def test_abort_needs_an_explicit_yes(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=2)
    run.run_ticks(5)
    channel = channel_for(run)
    app = live_app(run, channel)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("X")
        await pilot.pause()
        dialog = app.screen
        assert isinstance(dialog, ConfirmDialog)
        assert dialog.focused is not None and dialog.focused.id == "no"  # the safe default
        await pilot.press("enter")  # Enter on the focused button: "no"
        await pilot.pause()
        assert channel.commands == []
        await pilot.press("X")
        await pilot.pause()
        await pilot.press("y")
        await app.workers.wait_for_complete()
        assert channel.aborted


async def test_a_note_goes_to_the_audit_trail(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=2)
    run.run_ticks(5)
    channel = channel_for(run)
    app = live_app(run, channel)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("n")
        await pilot.pause()
        assert isinstance(app.screen, NoteDialog)
        await pilot.press(*"sampled C1-C2 for nutrients")
        assert app.screen.query_one(Input).value == "sampled C1-C2 for nutrients"
        await pilot.press("enter")
        await app.workers.wait_for_complete()
        await pilot.pause()
        await pilot.press("n")
        await pilot.pause()
        await pilot.press("escape")  # cancelled: nothing sent
        await pilot.pause()
    assert [(c.kind, c.text) for c in channel.commands] == [
        (CommandKind.NOTE, "sampled C1-C2 for nutrients")
    ]
    with RunLogReader(run.writer.path) as reader:
        audit = reader.audit()
    assert list(audit.text) == ["sampled C1-C2 for nutrients"]


async def test_a_read_only_view_offers_no_commands(synthetic: MakeSynthetic) -> None:
    run = with_trip(synthetic(chambers=3))
    source = LogSource(run.writer.path, real_clock=Clock())
    app = SquallApp(source, NoCommands("no socket"), poll_s=NEVER, refine_timeline=False)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        for action in ("hold", "resume", "abort", "note"):
            assert not app.check_action(action, ())
        await pilot.press("h", "n", "X")
        await pilot.pause()
        assert isinstance(app.screen, OverviewScreen)
        await pilot.press("a", "enter")
        await pilot.pause()
        assert isinstance(app.screen, AlarmScreen)  # no confirmation, no acknowledgement
        assert "read only: no socket" in str(app.screen.query_one("#alarm-hint").render())


async def test_replay_keys_play_pause_seek_and_change_speed(synthetic: MakeSynthetic) -> None:
    run = with_trip(synthetic(chambers=4, period_s=60.0), ticks=1400)
    run.finish()
    clock = Clock()
    source = ReplaySource(run.writer.path, speed=60.0, real_clock=clock)
    app = SquallApp(source, poll_s=NEVER, refine_timeline=False)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        assert app.snapshot is not None and app.snapshot.run.elapsed_s == 0.0
        clock.t += 10.0  # ten real seconds at 60x: ten minutes of the run
        app.poll_now()
        await pilot.pause()
        assert app.snapshot.run.elapsed_s == pytest.approx(600.0)
        bar = app.screen.query_one(RunBar)
        assert "elapsed 00:10:00" in bar.render().plain and "REPLAY ×60" in bar.render().plain
        await pilot.press("space")  # pause
        clock.t += 10.0
        app.poll_now()
        await pilot.pause()
        assert app.snapshot.run.elapsed_s == pytest.approx(600.0) and not app.snapshot.run.playing
        await pilot.press("right_square_bracket")  # +1 h
        assert app.snapshot.run.elapsed_s == pytest.approx(4200.0)
        assert "elapsed 01:10:00" in app.screen.query_one(RunBar).render().plain
        await pilot.press("left_curly_bracket")  # -1 d: clamped to the start
        assert app.snapshot.run.elapsed_s == 0.0
        await pilot.press("plus", "plus")
        assert source.speed == 240.0
        await pilot.press("space")
        clock.t += 5.0
        app.poll_now()
        await pilot.pause()
        assert app.snapshot.run.elapsed_s == pytest.approx(1200.0)
        await pilot.press("greater_than_sign")
        assert app.snapshot.run.status is RunStatus.FINISHED
        await pilot.press("down", "down", "enter")  # the detail view works in replay too
        await pilot.pause()
        screen = app.screen
        assert isinstance(screen, DetailScreen) and screen.loaded and len(screen.trace) == 360
        for action in ("hold", "note", "abort"):
            assert not app.check_action(action, ())


async def test_the_timeline_marks_the_current_phase(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=2, period_s=600.0, duration_s=86400.0)
    run.run_ticks(50)  # 8 h 10 min into a one-day protocol: the heatwave
    app = live_app(run)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("t")
        await pilot.pause()
        assert isinstance(app.screen, TimelineScreen)
        text = app.screen.query_one("TimelineView").render().plain
        assert "✓ done" in text and "▶ now" in text and "· later" in text
        now_line = next(line for line in text.splitlines() if "▶ now" in line)
        assert now_line.rstrip().endswith("heatwave")
        assert "15:50:00 left" in text  # 24 h - 8 h 10 min


async def test_quitting_the_view_leaves_the_log_writable(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=2)
    run.run_ticks(3)
    app = live_app(run)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("q")
    run.run_ticks(2)  # the run goes on after the view is gone
    with RunLogReader(run.writer.path) as reader:
        assert reader.last_rowid() == 2 * 5


async def test_help_lists_every_key_and_symbol(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=2)
    run.run_ticks(2)
    app = live_app(run)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("question_mark")
        await pilot.pause()
        assert isinstance(app.screen, HelpDialog)
        text = str(app.screen.query_one("#help-text").render())
        for words in ("acknowledge", "hold the protocol clock", "play / pause", "● shut"):
            assert words in text
        await pilot.press("escape")
        await pilot.pause()
        assert isinstance(app.screen, OverviewScreen)
