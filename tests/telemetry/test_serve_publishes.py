"""``squall serve`` publishes its runs over MQTT as ``squall run`` does: an unattended
schedule is watched from another machine like a single run (samples, events, status, and
the operator tasks carrying the experiment's id); as fast as possible it says why not."""

from __future__ import annotations

import asyncio
import threading
from datetime import UTC, datetime
from pathlib import Path

from controller.runtime import RunSettings
from controller.schedule import ExperimentState, ScheduleStore
from controller.schedule._serve import ServeConfig, ServeResult, serve
from controller.storage import RunLogReader
from controller.telemetry import (
    ControllerState,
    SampleUpdate,
    StatusUpdate,
    TasksUpdate,
    TelemetryWatcher,
)

from ._brokers import AmqttBroker, MosquittoBroker
from ._helpers import connected, next_update
from ._runs import protocol_text, telemetry_table

REPO = Path(__file__).resolve().parents[2]
START = datetime(2026, 12, 1, 0, 0, tzinfo=UTC)  # the example rig's calibrations are fresh


def _scheduled(tmp_path: Path, url: str) -> tuple[Path, Path, str]:
    rig = tmp_path / "rack8.toml"
    text = (REPO / "rigs" / "saltmarrow-rack8.toml").read_text(encoding="utf-8")
    rig.write_text(text + "\n" + telemetry_table(url, "rack-8"), encoding="utf-8")
    protocol = tmp_path / "hold.toml"
    protocol.write_text(protocol_text(("C5", "C6"), "20min"), encoding="utf-8")
    schedule = tmp_path / "runs" / "schedule.sqlite"
    with ScheduleStore(schedule) as store:
        exp = store.add(rig_path=rig, protocol_path=protocol, start_utc=START, owner="ana")
    return rig, schedule, exp.id


def _config(rig: Path, schedule: Path, speed: float | None) -> ServeConfig:
    return ServeConfig(
        rig_path=rig,
        schedule_path=schedule,
        sim=True,
        speed=speed,
        start_utc=START,
        settings=RunSettings(period_s=10.0),
    )


async def test_a_served_run_is_published_row_for_row_with_its_experiments_tasks(
    tmp_path: Path, broker: MosquittoBroker | AmqttBroker
) -> None:
    rig, schedule, exp_id = _scheduled(tmp_path, broker.url())
    lines: list[str] = []
    results: list[ServeResult] = []
    samples, task_lists = [], []
    watcher = TelemetryWatcher(broker.url(), reconnect_min_s=0.05)
    async with watcher:
        await connected(watcher)
        thread = threading.Thread(
            target=lambda: results.append(serve(_config(rig, schedule, 300.0), notify=lines.append))
        )
        thread.start()
        try:
            while True:
                update = await next_update(watcher, lambda u: u, timeout_s=60.0)
                if isinstance(update, SampleUpdate):
                    samples.append(update.sample)
                elif isinstance(update, TasksUpdate):
                    task_lists.append(update.tasks)
                elif isinstance(update, StatusUpdate) and not update.status.online:
                    farewell = update.status
                    break
        finally:
            await asyncio.to_thread(thread.join, 60.0)
    assert [r.outcomes for r in results] == [((exp_id, ExperimentState.DONE),)]
    assert any(f"{exp_id} publishing as rack-8 to mqtt://" in line for line in lines)
    assert farewell.state is ControllerState.FINISHED and farewell.chambers == ("C5", "C6")
    with ScheduleStore(schedule) as store:
        log = store.get(exp_id).log_path
    assert log is not None
    with RunLogReader(log) as reader:
        logged = reader.tail(0)
        assert farewell.run_id == reader.meta().run_id
    assert len(logged) >= 200 and len(samples) == len(logged)  # nothing lost on loopback
    first = task_lists[0]
    assert [t.kind for t in first.tasks] == ["run-start", "run-end"]
    assert {t.experiment_id for t in first.tasks} == {exp_id}


def test_a_serve_as_fast_as_possible_says_it_does_not_publish(tmp_path: Path) -> None:
    rig, schedule, exp_id = _scheduled(tmp_path, "mqtt://127.0.0.1:1")  # nothing listens
    lines: list[str] = []
    result = serve(_config(rig, schedule, None), notify=lines.append)
    assert result.outcomes == ((exp_id, ExperimentState.DONE),)
    assert any(
        f"{exp_id} telemetry is not published by a simulated run at --speed max" in line
        for line in lines
    )
    assert not any("publishing as" in line for line in lines)

