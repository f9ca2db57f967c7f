"""Helpers of the telemetry tests: quick configs, records, tasks and bounded waits."""

from __future__ import annotations

import asyncio
import contextlib
import re
from collections.abc import AsyncIterator, Callable, Coroutine
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TypeVar

from controller.clock import RealClock
from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    EventKind,
    EventRecord,
    IncubationState,
    SampleRow,
)
from controller.telemetry import (
    ConnectionUpdate,
    TelemetryConfig,
    TelemetryUpdate,
    TelemetryWatcher,
)

U = TypeVar("U")

#: Wall time of clock time 0 in these tests (an invented date).
START = datetime(2027, 7, 1, 6, 0, tzinfo=UTC)
#: Longest wait for any expected message, s (real time; loopback answers in milliseconds).
WAIT_S = 10.0


def quick_config(url: str, controller_id: str = "rack-a", **changes: Any) -> TelemetryConfig:
    """Telemetry settings with short waits, for tests on loopback."""
    data: dict[str, Any] = {
        "broker": url,
        "controller_id": controller_id,
        "reconnect_min_s": 0.05,
        "reconnect_max_s": 0.2,
        "timeout_s": 2.0,
        "keepalive_s": 5,
        **changes,
    }
    return TelemetryConfig.model_validate(data)


def sample(chamber: str, k: int, *, phase: str = "baseline", period_s: float = 1.0) -> SampleRow:
    """An invented sample row of tick ``k``."""
    t = k * period_s
    return SampleRow(
        t_s=t,
        utc_s=START.timestamp() + t,
        elapsed_s=t,
        chamber=chamber,
        phase=phase,
        temperature_c=20.0 + 0.001 * k,
        temperature_setpoint_c=20.0,
        par=300.0,
        par_setpoint=300.0,
        flow_cm_s=4.0,
        flow_setpoint_cm_s=4.0,
        o2_umol_l=250.0 + 0.1 * k,
        o2_sat_pct=101.5,
        heater_pct=12.5,
        chiller_pct=0.0,
        lamp_pct=40.0,
        pump_pct=30.0,
        incubation=IncubationState.OPEN,
        alarm=None,
    )


def alarm(chamber: str, t_s: float, code: str = "over_temperature") -> AlarmRecord:
    """An invented alarm raised at clock time ``t_s``."""
    return AlarmRecord(
        t_s=t_s,
        utc_s=START.timestamp() + t_s,
        action=AlarmAction.RAISE,
        level=AlarmLevel.TRIP,
        code=code,
        reason="water 27.4 °C above the 27.0 °C trip limit",
        chamber=chamber,
    )


def event(kind: EventKind, t_s: float, phase: str | None = None) -> EventRecord:
    """An invented run event at clock time ``t_s``."""
    return EventRecord(
        t_s=t_s, utc_s=START.timestamp() + t_s, kind=kind, elapsed_s=t_s, phase=phase
    )


class SignallingClock(RealClock):
    """A real-time clock that reports every ``sleep`` (the publisher's back-off after a
    failed or lost connection) in :attr:`sleeps`, so a test can wait for one."""

    def __init__(self) -> None:
        super().__init__(START)
        self.sleeps: asyncio.Queue[float] = asyncio.Queue()

    async def sleep(self, dt_s: float) -> None:
        self.sleeps.put_nowait(dt_s)
        await super().sleep(dt_s)

    async def next_sleep(self, timeout_s: float = WAIT_S) -> float:
        """Wait for the next back-off sleep to start; return its length, s."""
        async with asyncio.timeout(timeout_s):
            return await self.sleeps.get()


@contextlib.asynccontextmanager
async def running(coro: Coroutine[Any, Any, None]) -> AsyncIterator[asyncio.Task[None]]:
    """Run ``coro`` as a task for the body of the block; cancel and await it after."""
    task = asyncio.get_running_loop().create_task(coro)
    try:
        yield task
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task


async def next_update(
    watcher: TelemetryWatcher,
    match: Callable[[TelemetryUpdate], U | None],
    *,
    timeout_s: float = WAIT_S,
) -> U:
    """The first update for which ``match`` returns something (other updates are skipped)."""
    async with asyncio.timeout(timeout_s):
        async for update in watcher:
            found = match(update)
            if found is not None:
                return found
    raise AssertionError("the watcher stopped")


async def connected(watcher: TelemetryWatcher) -> None:
    """Wait until the watcher is connected and subscribed."""
    await next_update(
        watcher, lambda u: u if isinstance(u, ConnectionUpdate) and u.connected else None
    )


#: The telemetry page of the hardware notes.
DOC = Path(__file__).resolve().parents[2] / "hardware-notes" / "mqtt-topics.md"


def doc_text() -> str:
    """Text of hardware-notes/mqtt-topics.md."""
    return DOC.read_text(encoding="utf-8")


def doc_acl() -> str:
    """The ACL file the page recommends (the code block after its file name)."""
    found = re.search(r"`/etc/mosquitto/squall.acl`:\n\n```text\n(.*?)```", doc_text(), re.S)
    assert found is not None, "the ACL example is missing from mqtt-topics.md"
    return found.group(1)
