"""The operator tasks view (key o): the tasks derived from the protocol and rig a log keeps,
against the run's own time; and the task lists controllers publish on a broker."""

from __future__ import annotations

from pathlib import Path

import pytest

from controller.runtime import RunSettings, SimulatedRun
from controller.telemetry import TaskInfo, TaskList, TasksUpdate
from controller.tui import OverviewScreen, ReplaySource, SquallApp, TaskEntry, TasksScreen
from controller.tui._broker import BrokerSource
from controller.tui._tasks_view import TasksView, task_lines

from ._rig import protocol_text, rig_text

CHAMBERS = ("T1", "T2")
START = 1_814_421_600.0  # 2027-07-01T06:00:00Z, the protocol's begins
MAINTENANCE = '\n[maintenance]\ntimezone = "UTC"\ndaily_check_at = 06:30:00\n'
SAMPLING = '\n[[sampling]]\nat = "watch+10min"\nwhat = "water for nutrients"\nminutes = 20\n'


@pytest.fixture(scope="module")
def tasks_log(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A finished 2-hour simulated run whose protocol samples and whose rig checks daily."""
    folder = tmp_path_factory.mktemp("taskslog")
    (folder / "rig.toml").write_text(rig_text(CHAMBERS) + MAINTENANCE)
    (folder / "protocol.toml").write_text(protocol_text(CHAMBERS) + SAMPLING)
    run = SimulatedRun.prepare(
        folder / "protocol.toml",
        folder / "rig.toml",
        folder / "run.sqlite",
        settings=RunSettings(period_s=60.0),
    )
    run.run()
    return folder / "run.sqlite"


def view_lines(app: SquallApp) -> list[str]:
    return app.screen.query_one(TasksView).render().plain.splitlines()


async def test_the_tasks_of_a_replayed_run_follow_the_replay_position(tasks_log: Path) -> None:
    source = ReplaySource(tasks_log, speed=60.0, real_clock=lambda: 0.0)
    app = SquallApp(source, poll_s=3600.0, refine_timeline=False)
    async with app.run_test(size=(120, 30)) as pilot:
        await app.workers.wait_for_complete()
        await pilot.press("o")
        await pilot.pause()
        assert isinstance(app.screen, TasksScreen)
        lines = view_lines(app)
        # 06:00 start, 06:30 daily check, 07:10 sampling, 08:00 end: all ahead at 06:00
        assert lines[0].startswith("operator tasks · 4 to come · run time 2027-07-01 06:00")
        order = ("run-start", "daily-check", "sampling", "run-end")
        assert [next(k for k in order if f" {k} " in line) for line in lines[1:]] == list(order)
        assert "▶ now" in lines[1] and "in 30 min" in lines[2]
        sampling = next(line for line in lines if "sampling" in line)
        assert "in 1 h 10 min" in sampling and "water for nutrients" in sampling
        assert "[T1, T2]" in sampling and "20 min" in sampling
        await pilot.press("right_square_bracket")  # an hour on: start and daily check done
        await pilot.pause()
        lines = view_lines(app)
        assert "2 to come · 2 done" in lines[0]
        assert "in 10 min" in next(line for line in lines if "sampling" in line)
        await pilot.press("escape")
        await pilot.pause()
        assert isinstance(app.screen, OverviewScreen)


def test_task_lines_say_when_tasks_are_pending_missing_or_all_done() -> None:
    assert task_lines(None, START) == [("working out the run's operator tasks…", "quiet")]
    none = task_lines((), START, "no operator tasks: rig:1: chambers: required")
    assert none[-1] == ("no operator tasks: rig:1: chambers: required", "quiet")
    old = TaskEntry(uid="a", kind="run-end", title="End", start_utc_s=START, minutes=30.0)
    done = task_lines((old,), START + 3600.0)
    assert done[0][0].startswith("operator tasks · 0 to come · 1 done")
    assert done[-1] == ("every task of this run is done", "quiet")


async def test_published_task_lists_of_two_controllers_are_shown_together() -> None:
    class Fed(BrokerSource):
        bridge = None  # type: ignore[assignment]

    source = Fed("mqtt://127.0.0.1:1883")

    def listed(cid: str, k: int) -> TasksUpdate:
        info = TaskInfo(
            uid=f"{cid}-{k}",
            kind="calibration",
            title=f"Calibrate optodes ({cid})",
            start_utc_s=START + 600.0 * k,
            minutes=30.0,
            chambers=("C1",),
        )
        return TasksUpdate(controller=cid, tasks=TaskList(controller=cid, tasks=(info,)))

    source.feed(listed("lab-b", 1))
    source.feed(listed("lab-a", 2))
    app = SquallApp(source, poll_s=3600.0, refine_timeline=False)
    async with app.run_test(size=(120, 24)) as pilot:
        await pilot.press("o")
        await pilot.pause()
        lines = view_lines(app)
        assert lines[0].startswith("operator tasks · 2 to come")
        assert "(lab-b)" in lines[1] and "[lab-b/C1]" in lines[1]
        assert "(lab-a)" in lines[2] and "[lab-a/C1]" in lines[2]
        source.feed(TasksUpdate(controller="lab-b", tasks=TaskList(controller="lab-b")))
        app.poll_now()
        await pilot.pause()
        assert view_lines(app)[0].startswith("operator tasks · 1 to come")
