"""Publisher to watcher through a real broker on loopback: schemas, status, last will."""

from __future__ import annotations

import pytest

from controller.clock import RealClock
from controller.storage import AlarmRecord, EventKind, EventRecord, SampleRow
from controller.telemetry import (
    AlarmUpdate,
    ControllerState,
    EventUpdate,
    SampleUpdate,
    StatusUpdate,
    TelemetryPublisher,
    TelemetryWatcher,
)

from ._brokers import AmqttBroker, MosquittoBroker
from ._helpers import START, alarm, connected, event, next_update, quick_config, running, sample

Broker = MosquittoBroker | AmqttBroker


async def test_records_reach_the_watcher_unchanged_and_status_follows_the_run(
    broker: Broker,
) -> None:
    publisher = TelemetryPublisher(quick_config(broker.url()), clock=RealClock(START))
    watcher = TelemetryWatcher(broker.url(), reconnect_min_s=0.05)
    async with watcher:
        await connected(watcher)
        async with running(publisher.run()):
            first = await next_update(
                watcher, lambda u: u.status if isinstance(u, StatusUpdate) else None
            )
            assert first.online and first.state is ControllerState.IDLE
            publisher.describe_run(
                run_id="run-7",
                protocol="Heatwave",
                chambers=["A1", "B"],
                duration_s=3600.0,
                period_s=1.0,
            )
            sent: list[SampleRow | AlarmRecord | EventRecord] = [
                event(EventKind.RUN_START, 0.0),
                sample("A1", 1),
                sample("B", 1),
                alarm("B", 1.0),
            ]
            publisher.offer(sent[0])
            publisher.offer([sent[1], sent[2]])  # one tick's rows
            publisher.offer(sent[3])
            got: list[SampleRow | AlarmRecord | EventRecord] = []
            statuses = []
            while len(got) < len(sent) or not statuses:
                update = await next_update(watcher, lambda u: u)
                if isinstance(update, SampleUpdate):
                    assert update.controller == "rack-a"
                    got.append(update.sample)
                elif isinstance(update, AlarmUpdate):
                    got.append(update.alarm)
                elif isinstance(update, EventUpdate):
                    got.append(update.event)
                elif isinstance(update, StatusUpdate):
                    if update.status.state is ControllerState.RUNNING:
                        statuses.append(update.status)
            # records arrive equal to what was offered, alarms and events first
            assert got[:2] == [sent[0], sent[3]]
            assert sorted(got[2:], key=repr) == [sent[1], sent[2]]
            running_status = statuses[0]
            assert running_status.run_id == "run-7"
            assert running_status.chambers == ("A1", "B")
            assert running_status.phase == "baseline"
            assert watcher.samples[("rack-a", "B")] == sent[2]
            publisher.offer(event(EventKind.RUN_STOP, 5.0))
        # a clean stop leaves a retained farewell saying how the run ended
        farewell = await next_update(
            watcher,
            lambda u: u.status if isinstance(u, StatusUpdate) and not u.status.online else None,
        )
        assert farewell.state is ControllerState.FINISHED


async def test_iteration_ends_when_the_watch_stops_and_a_watch_can_start_again(
    broker: Broker,
) -> None:
    watcher = TelemetryWatcher(broker.url(), reconnect_min_s=0.05)
    with pytest.raises(RuntimeError, match="async with"):
        await anext(watcher)
    async with watcher:
        await connected(watcher)
        assert watcher.connected
    assert not watcher.connected
    assert [u async for u in watcher] == []  # stopped: nothing more, no waiting
    async with watcher:  # the same watcher may watch again
        await connected(watcher)
