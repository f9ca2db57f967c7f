"""Two simulated controllers publish to one broker; one ``squall watch`` sees both; the broker
goes away and comes back mid-run without touching the control loops' tick timing.

The controllers are ``squall run --sim --speed N`` as its command wires them (the rig's
``[telemetry]`` table, :func:`telemetry_link` and its runner), each in a thread with its own
event loop. The watch side is the Textual app over a :class:`BrokerSource` (its bridge
worker runs the telemetry watcher), driven headless by Pilot. Waits are for conditions (a
sample arrived, a number of ticks passed), never fixed sleeps.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from pathlib import Path

from textual.pilot import Pilot

from controller.storage import RunEndReason
from controller.telemetry import ControllerState, TelemetryWatcher
from controller.tui import ChamberBoard, SquallApp
from controller.tui._broker import BrokerSource

from ._brokers import AmqttBroker, MosquittoBroker
from ._runs import SimController, telemetry_table

SPEED = 20.0
"""Simulated seconds per real second: 10 s ticks, two a second."""
PHASE_TICKS = 10
"""Ticks each controller runs before, during and after the outage, dimensionless."""
WAIT_S = 20.0
"""Longest real wait for any one condition, s."""


async def until(pilot: Pilot[None], what: str, condition: Callable[[], bool]) -> None:
    """Let the app run until ``condition()`` holds (checked every 20 ms), at most WAIT_S."""
    deadline = time.monotonic() + WAIT_S
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        await pilot.pause(0.02)


def ticks_since(controller: SimController, real_s: float) -> int:
    return sum(1 for t in list(controller.ticks) if t.real_s >= real_s)


def p90(values: list[float]) -> float:
    return sorted(values)[int(0.9 * (len(values) - 1))]


async def test_one_watch_sees_two_controllers_through_a_broker_restart(
    tmp_path: Path, broker: MosquittoBroker | AmqttBroker
) -> None:
    url = broker.url()
    controllers = [
        SimController(tmp_path / cid, cid, telemetry_table(url, cid), speed=SPEED)
        for cid in ("rack-a", "rack-b")
    ]
    watcher = TelemetryWatcher(url, reconnect_min_s=0.05, reconnect_max_s=0.3)
    source = BrokerSource(url, watcher=watcher)
    app = SquallApp(source, poll_s=0.1, refine_timeline=False)
    keys = ["rack-a/A1", "rack-a/A2", "rack-b/A1", "rack-b/A2"]

    def newest(key: str) -> float:
        snap = app.snapshot
        state = None if snap is None else snap.chamber(key)
        return -1.0 if state is None or state.utc_s is None else state.utc_s

    try:
        async with app.run_test(size=(100, 30)) as pilot:
            await until(pilot, "the watcher's connection", lambda: watcher.connected)
            for c in controllers:
                c.start()
            # both controllers' chambers reach the board
            await until(pilot, "samples of both controllers", lambda: min(map(newest, keys)) > 0)
            board = app.screen.query_one(ChamberBoard)
            await until(pilot, "the board's rows", lambda: len(board.states) == 4)
            assert [s.chamber for s in board.states] == keys
            statuses = watcher.statuses
            assert {statuses[c].state for c in ("rack-a", "rack-b")} == {ControllerState.RUNNING}
            t_before = time.monotonic()
            await until(
                pilot,
                "ticks before the outage",
                lambda: min(ticks_since(c, t_before) for c in controllers) >= PHASE_TICKS,
            )

            broker.stop()
            t_stop = time.monotonic()
            seen_at_stop = {k: newest(k) for k in keys}
            await until(
                pilot,
                "ticks during the outage",
                lambda: min(ticks_since(c, t_stop) for c in controllers) >= PHASE_TICKS,
            )
            for c in controllers:  # the publishers noticed and buffer meanwhile
                stats = c.link.publisher.stats()
                assert not stats.connected and stats.samples_queued > 0
            broker.start()
            t_restart = time.monotonic()

            # telemetry resumes: samples logged after the restart arrive for every chamber
            def tick_utc(c: SimController, real_s: float) -> float:
                return next(t.utc_s for t in list(c.ticks) if t.real_s >= real_s)

            await until(
                pilot,
                "ticks after the restart",
                lambda: min(ticks_since(c, t_restart) for c in controllers) >= PHASE_TICKS,
            )
            after_utc = {c.controller_id: tick_utc(c, t_restart) for c in controllers}
            await until(
                pilot,
                "samples from after the restart",
                lambda: all(newest(k) >= after_utc[k.split("/")[0]] for k in keys),
            )
            assert all(newest(k) > seen_at_stop[k] for k in keys)
            await until(pilot, "the watcher's statuses", lambda: len(watcher.statuses) == 2)
            t_end = time.monotonic()
            for c in controllers:
                c.abort()
            summaries = [c.join() for c in controllers]
            await until(
                pilot,
                "the farewell statuses",
                lambda: all(s.state is ControllerState.ABORTED for s in watcher.statuses.values()),
            )
    finally:
        for c in controllers:
            c.abort()
    assert all(s is not None and s.end_reason is RunEndReason.ABORTED for s in summaries)

    # the control loops kept their rhythm whatever the broker did (real-time lateness, s)
    for c in controllers:
        before = c.lateness_s(t_before, t_stop)
        during = c.lateness_s(t_stop, t_restart)
        after = c.lateness_s(t_restart, t_end)
        print(
            f"{c.controller_id} tick lateness, ms (median / p90 / max): "
            + "; ".join(
                f"{name} {1e3 * statistics.median(v):.1f} / {1e3 * p90(v):.1f} / "
                f"{1e3 * max(v):.1f} (n={len(v)})"
                for name, v in (("before", before), ("during", during), ("after", after))
            )
        )
        assert min(len(before), len(during), len(after)) >= PHASE_TICKS
        calm = max(p90(before), p90(after))
        assert p90(during) <= calm + 0.05
        assert statistics.median(during) <= max(statistics.median(before), 0.01) + 0.02
        assert max(during) < 0.5  # no tick waited for the broker's timeouts
        assert c.summary is not None and c.summary.ticks.missed == 0
