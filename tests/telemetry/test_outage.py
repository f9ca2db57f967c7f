"""Broker outages: the control loop keeps its beat, the buffer keeps what matters, and
telemetry resumes.

The controllers here are the control loop in miniature: fixed-period ticks on a real-time
clock (tick k due at start + k·period, as in ``controller.runtime``), one sample row per
chamber per tick handed to the publisher with ``offer``. Real time is unavoidable: the
point is what a real network outage does to a real event loop.
"""

from __future__ import annotations

import asyncio
from collections.abc import Sequence

from controller.clock import RealClock
from controller.storage import AlarmRecord, EventKind, EventRecord
from controller.telemetry import (
    AlarmUpdate,
    ConnectionUpdate,
    EventUpdate,
    SampleUpdate,
    StatusUpdate,
    TelemetryPublisher,
    TelemetryWatcher,
)

from ._brokers import AmqttBroker, CutProxy, MosquittoBroker
from ._helpers import (
    START,
    SignallingClock,
    alarm,
    connected,
    event,
    next_update,
    quick_config,
    running,
    sample,
)

Broker = MosquittoBroker | AmqttBroker

#: Control tick period of the miniature controllers, s.
PERIOD_S = 0.02
#: Ticks the broker stays away, dimensionless.
OUTAGE_TICKS = 25
#: Largest tick lateness accepted, s: generous for a shared 2-core machine that also runs
#: the broker (measured here: 5-30 ms, the worst during the broker's restart). A loop that
#: waited for the network would be late by the whole outage (OUTAGE_TICKS × PERIOD_S =
#: 0.5 s) or by the request timeout (2 s), far beyond it.
LATENESS_BOUND_S = 0.15
#: Longest single offer() accepted, s. It only appends to a deque (about 20 µs here); the
#: bound leaves room for the interpreter handing the GIL to another thread (5 ms switch
#: interval) on a loaded machine, and is still far below any network wait.
OFFER_BOUND_S = 0.05


class MiniController:
    """Fixed-period ticks on a real clock feeding a publisher; measures its own punctuality.

    Parameters
    ----------
    publisher
        Where each tick's rows are offered.
    chambers
        Chamber ids, one sample row each per tick.
    clock
        Real-time clock.
    """

    def __init__(
        self, publisher: TelemetryPublisher, chambers: Sequence[str], clock: RealClock
    ) -> None:
        self.publisher = publisher
        self.chambers = tuple(chambers)
        self.clock = clock
        self.lateness_s: list[float] = []
        self.offer_s: list[float] = []
        self.ticks = 0
        self._tick = asyncio.Condition()

    async def run(self) -> None:
        clock, t0 = self.clock, self.clock.now_s()
        k = 0
        while True:
            due = t0 + k * PERIOD_S
            await clock.sleep_until(due)
            now = clock.now_s()
            self.lateness_s.append(now - due)
            rows = [sample(c, k, period_s=PERIOD_S) for c in self.chambers]
            self.publisher.offer(rows)
            self.offer_s.append(clock.now_s() - now)
            k += 1
            self.ticks = k
            async with self._tick:
                self._tick.notify_all()

    async def reach(self, ticks: int, timeout_s: float = 10.0) -> None:
        """Wait until ``ticks`` ticks have run."""
        async with asyncio.timeout(timeout_s), self._tick:
            await self._tick.wait_for(lambda: self.ticks >= ticks)


async def test_two_controllers_one_watcher_and_a_broker_restart_leave_the_ticks_on_time(
    broker: Broker,
) -> None:
    clock = RealClock(START)
    publishers = {
        cid: TelemetryPublisher(quick_config(broker.url(), cid), clock=clock)
        for cid in ("rack-a", "rack-b")
    }
    controllers = {
        "rack-a": MiniController(publishers["rack-a"], ["A1", "A2"], clock),
        "rack-b": MiniController(publishers["rack-b"], ["B1"], clock),
    }
    a, b = controllers["rack-a"], controllers["rack-b"]
    async with TelemetryWatcher(broker.url(), reconnect_min_s=0.05) as watcher:
        await connected(watcher)
        async with (
            running(publishers["rack-a"].run()),
            running(publishers["rack-b"].run()),
            running(a.run()),
            running(b.run()),
        ):
            # one watcher sees both controllers
            seen: set[tuple[str, str]] = set()
            while len(seen) < 3:
                update = await next_update(
                    watcher, lambda u: u if isinstance(u, SampleUpdate) else None
                )
                seen.add((update.controller, update.sample.chamber))
            assert seen == {("rack-a", "A1"), ("rack-a", "A2"), ("rack-b", "B1")}
            assert watcher.statuses["rack-a"].online and watcher.statuses["rack-b"].online

            # the broker goes away mid-run, for a while, and comes back
            await asyncio.to_thread(broker.stop)
            outage_from = {cid: c.ticks for cid, c in controllers.items()}
            lost = await next_update(
                watcher, lambda u: u if isinstance(u, ConnectionUpdate) else None
            )
            assert not lost.connected
            await a.reach(outage_from["rack-a"] + OUTAGE_TICKS)
            await b.reach(outage_from["rack-b"] + OUTAGE_TICKS)
            assert not any(p.connected for p in publishers.values())
            await asyncio.to_thread(broker.start)
            back_from = {cid: c.ticks for cid, c in controllers.items()}

            # telemetry resumes: both online again (retained status re-published) and
            # samples of ticks after the restart from both
            online: set[str] = set()
            fresh: set[str] = set()
            while len(online) < 2 or len(fresh) < 2:
                update = await next_update(watcher, lambda u: u)
                if isinstance(update, StatusUpdate) and update.status.online:
                    online.add(update.controller)
                elif isinstance(update, SampleUpdate):
                    tick = round(update.sample.t_s / PERIOD_S)
                    if tick >= back_from[update.controller]:
                        fresh.add(update.controller)
            stopped_at = {cid: c.ticks for cid, c in controllers.items()}
    # the control loops kept their beat before, during and after the outage
    for cid, controller in controllers.items():
        ticks = controller.lateness_s[: stopped_at[cid]]
        outage = ticks[outage_from[cid] : back_from[cid]]
        assert len(outage) >= OUTAGE_TICKS
        print(
            "LATENESS",
            cid,
            max(ticks),
            max(outage),
            sorted(ticks)[int(0.99 * len(ticks))],
            max(controller.offer_s),
            len(ticks),
        )
        assert max(ticks) < LATENESS_BOUND_S, (cid, max(ticks))
        assert max(controller.offer_s) < OFFER_BOUND_S, (cid, max(controller.offer_s))
    assert all(p.stats().connections >= 2 for p in publishers.values())


async def test_an_outage_drops_the_oldest_samples_but_keeps_every_alarm_and_event(
    broker: Broker,
) -> None:
    proxy = CutProxy(broker.host, broker.port)
    await proxy.start()
    clock = SignallingClock()
    config = quick_config(f"mqtt://127.0.0.1:{proxy.port}", buffer_samples=10)
    publisher = TelemetryPublisher(config, clock=clock)
    async with TelemetryWatcher(broker.url(), reconnect_min_s=0.05) as watcher:
        await connected(watcher)
        async with running(publisher.run()):
            await next_update(
                watcher, lambda u: u if isinstance(u, StatusUpdate) and u.status.online else None
            )
            await proxy.go_down()  # the controller's network goes away
            await clock.next_sleep()  # the publisher noticed and backs off
            offered: list[AlarmRecord | EventRecord] = []
            for k in range(50):
                publisher.offer([sample("A1", k)])
                if k in (5, 25, 45):
                    offered.append(alarm("A1", float(k), code=f"alarm_{k}"))
                    publisher.offer(offered[-1])
            offered.append(event(EventKind.PHASE_CHANGE, 49.0, phase="heatwave"))
            publisher.offer(offered[-1])
            stats = publisher.stats()
            assert (stats.samples_queued, stats.samples_dropped) == (10, 40)
            assert (stats.records_queued, stats.records_dropped) == (4, 0)
            await proxy.start()  # back
            records: list[AlarmRecord | EventRecord] = []
            ticks: list[int] = []
            drops: int | None = None
            while len(records) < 4 or len(ticks) < 10 or drops is None:
                update = await next_update(watcher, lambda u: u)
                if isinstance(update, AlarmUpdate):
                    records.append(update.alarm)
                elif isinstance(update, EventUpdate):
                    records.append(update.event)
                elif isinstance(update, SampleUpdate):
                    ticks.append(round(update.sample.t_s))
                elif isinstance(update, StatusUpdate) and update.status.online:
                    drops = update.status.dropped_samples
        await proxy.close()
    assert records == offered  # every alarm and event, in order
    assert ticks == list(range(40, 50))  # the newest ten samples, in order
    assert drops == 40  # the status tells how many were dropped
