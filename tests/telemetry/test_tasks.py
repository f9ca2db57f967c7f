"""The task list payload: tasks that are over drop out, a long list is trimmed to one payload
and counts what it left out, and a watcher reads it (only on its own controller's topic)."""

from __future__ import annotations

from controller.telemetry import (
    TaskInfo,
    TaskList,
    TasksUpdate,
    TelemetryWatcher,
    encode_model,
    task_list,
)

from ._helpers import START

T0 = START.timestamp()


def task(k: int, *, minutes: float = 30.0, detail: str = "") -> TaskInfo:
    return TaskInfo(
        uid=f"task-{k}",
        kind="sampling",
        title=f"Sample A1-A4 ({k})",
        start_utc_s=T0 + 3600.0 * k,
        minutes=minutes,
        chambers=("A1", "A2", "A3", "A4"),
        detail=detail,
    )


def test_tasks_that_are_over_drop_out() -> None:
    tasks = [task(k) for k in range(4)]
    # one hour and a quarter in: task 0 (06:00-06:30) is over, task 1 (07:00) still to come
    listed = task_list("rack-a", "run-1", tasks, T0 + 4500.0)
    assert [t.uid for t in listed.tasks] == ["task-1", "task-2", "task-3"]
    assert listed.more == 0 and listed.run_id == "run-1" and listed.utc_s == T0 + 4500.0
    # a task in progress stays until its time set aside is over
    assert task_list("rack-a", None, tasks, T0 + 1700.0).tasks[0].uid == "task-0"


def test_a_long_list_is_trimmed_to_the_payload_limit_and_says_how_many_are_left_out() -> None:
    tasks = [task(k, detail="x" * 1500) for k in range(100)]
    listed = task_list("rack-a", "run-1", tasks, T0 - 1.0, limit=20_000)
    assert len(encode_model(listed)) <= 20_000
    assert 0 < len(listed.tasks) < 100 and listed.more == 100 - len(listed.tasks)
    assert [t.uid for t in listed.tasks] == [f"task-{k}" for k in range(len(listed.tasks))]


def test_a_watcher_reads_a_task_list_on_its_controllers_topic_only() -> None:
    watcher = TelemetryWatcher("mqtt://127.0.0.1:1")  # never connected
    listed = TaskList(controller="rack-a", run_id="run-1", tasks=(task(1),))
    update = watcher.handle_message("squall/rack-a/tasks", encode_model(listed))
    assert update == TasksUpdate(controller="rack-a", tasks=listed)
    assert watcher.tasks["rack-a"] == listed
    assert watcher.handle_message("squall/rack-b/tasks", encode_model(listed)) is None
    assert watcher.rejected == 1 and "rack-b" not in watcher.tasks
