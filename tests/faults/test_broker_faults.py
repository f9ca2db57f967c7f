"""The MQTT broker goes away mid-run and comes back: telemetry is on, control must not care.

The control loop runs on the real clock here (a 0.5 s tick on the in-process simulated
rack), with the run's telemetry link publishing to a broker on loopback: the real Mosquitto
when installed, else the amqtt fallback (``tests/telemetry/_brokers.py``, whose brokers can
be stopped and started again on the same port). Real time is the point: what a real network
outage does to a real event loop. A watcher on the broker shows telemetry flowing before the
outage and again after it.
"""

from __future__ import annotations

import asyncio
import time
from pathlib import Path

import pytest
from telemetry._brokers import close_broker, make_broker

from controller.clock import RealClock
from controller.runtime import (
    ControlLoop,
    RunSettings,
    SimulatedIO,
    create_run_log,
    load_run_inputs,
    plan_control,
)
from controller.runtime._telemetry_link import telemetry_link
from controller.storage import ClockKind
from controller.telemetry import SampleUpdate, TelemetryWatcher
from simulator import Rack

from ._harness import CHAMBER, FaultRecord, RecordBook, check_log, protocol_text, rig_text

pytestmark = pytest.mark.timeout(120)

PERIOD_S = 0.5
"""Control tick, s (real time): a Python process as big as the controller has garbage
collection pauses of 0.1–0.2 s on a loaded machine (measured here), so a shorter tick would
test the collector rather than the network."""
RUN_S = 60.0
"""Protocol length, s: an upper bound; an operator's abort ends the run once telemetry has
flowed again for a few ticks after the outage (how long that takes depends on the load)."""
OUTAGE_S = 2.0
"""How long the broker stays away, s."""
LATENESS_BOUND_S = PERIOD_S
"""Largest tick lateness accepted, s: one tick, room for a shared, loaded 2-core machine,
garbage collection and the run log's fsync per commit (the measured lateness is in the
table). A loop that
waited on the network would be late by the whole outage (2 s) or by the
publisher's request timeout (2 s)."""
WAIT_S = 20.0
"""Longest wait for the broker or the watcher, s."""


def telemetry_table(url: str) -> str:
    """The rig's [telemetry] table: quick reconnects, as a test on loopback can afford."""
    return (
        f'\n[telemetry]\nbroker = "{url}"\ncontroller_id = "saltmarrow-faults"\n'
        "reconnect_min_s = 0.05\nreconnect_max_s = 0.2\ntimeout_s = 2.0\n"
    )


async def test_a_broker_outage_leaves_the_ticks_on_time_and_telemetry_resumes(
    tmp_path: Path, records: RecordBook
) -> None:
    broker = await asyncio.to_thread(make_broker, tmp_path / "broker")
    try:
        (tmp_path / "rig.toml").write_text(rig_text(extra=telemetry_table(broker.url())))
        (tmp_path / "protocol.toml").write_text(
            protocol_text(hours=RUN_S / 3600.0, begins="on-launch")
        )
        inputs = load_run_inputs(tmp_path / "protocol.toml", tmp_path / "rig.toml")
        compiled, rig = inputs.compiled, inputs.rig
        settings = RunSettings(period_s=PERIOD_S, read_timeout_s=0.1, write_timeout_s=0.1)
        plan = plan_control(rig, compiled.chambers, settings, inputs.incubation)
        clock = RealClock(compiled.start_utc)
        safe = {CHAMBER: plan.chambers[CHAMBER].interlocks.safe_outputs()}
        io = SimulatedIO(
            Rack(rig, seed=7, start_utc=compiled.start_utc),
            clock,
            watchdog_s=3 * PERIOD_S,
            safe=safe,
        )
        commit_s = settings.commit_interval_for(1.0)
        writer = create_run_log(
            inputs,
            plan,
            tmp_path / "run.sqlite",
            clock_kind=ClockKind.REAL,
            commit_interval_s=commit_s,
        )
        loop = ControlLoop(io=io, clock=clock, compiled=compiled, plan=plan, writer=writer)
        link = telemetry_link(
            rig.telemetry,
            clock=clock,
            run_id="faults",
            protocol="Fault matrix",
            chambers=[CHAMBER],
            duration_s=compiled.duration_s,
            period_s=PERIOD_S,
        )
        assert link is not None
        seen: list[tuple[float, float]] = []  # (real time, sample UTC) of every sample
        marks: dict[str, float] = {}

        async def watch(watcher: TelemetryWatcher) -> None:
            async for update in watcher:
                if isinstance(update, SampleUpdate):
                    seen.append((time.monotonic(), update.sample.utc_s))

        started = time.monotonic()

        async def samples_after(mark_s: float, count: int) -> None:
            async with asyncio.timeout(WAIT_S):
                while sum(1 for real, _ in seen if real > mark_s) < count:
                    await asyncio.sleep(PERIOD_S)

        async def outage() -> None:
            await samples_after(0.0, 3)  # telemetry flows
            marks["down"] = time.monotonic()
            await asyncio.to_thread(broker.stop)
            await asyncio.sleep(OUTAGE_S)  # real time: the outage itself
            await asyncio.to_thread(broker.start)
            marks["up"] = time.monotonic()
            await samples_after(marks["up"], 3)  # and flows again
            marks["flowing"] = time.monotonic()
            loop.abort("fault-matrix")

        async with TelemetryWatcher(broker.url(), reconnect_min_s=0.05) as watcher:
            watching = asyncio.ensure_future(watch(watcher))
            outaging = asyncio.ensure_future(outage())
            try:
                summary = await link.run(loop, lambda lp: lp.run())
                await asyncio.wait_for(outaging, WAIT_S)
            finally:
                for task in (watching, outaging):
                    task.cancel()
                await asyncio.gather(watching, outaging, return_exceptions=True)
        stats = link.publisher.stats()
    finally:
        if not writer.closed:
            writer.close()
        await asyncio.to_thread(close_broker, broker)
    log = check_log(tmp_path / "run.sqlite", PERIOD_S)
    ticks = summary.ticks
    record = records.add(
        FaultRecord(
            fault="broker-outage",
            injected=f"the MQTT broker ({broker.kind}) stopped for {OUTAGE_S:g} s mid-run and "
            "started again; control on the real clock with a 0.5 s tick, telemetry on",
            expected="no tick missed or late by a tick (the loop never waits for the "
            "network); the run log complete; telemetry reconnects and flows again",
            alarm=None,
            safe_after_s=None,
            safe_bound_s=None,
            integrity=log.integrity,
            contiguous=log.contiguous and log.finished,
            lost_s=max(0, ticks.ticks - log.ticks) * PERIOD_S,
            lost_bound_s=commit_s,
            wall_s=round(marks["flowing"] - started, 1),
            note=f"{ticks.ticks} ticks, none missed; tick lateness max "
            f"{ticks.max_lateness_s * 1e3:.0f} ms, p99 {ticks.p99_lateness_s * 1e3:.0f} ms; "
            f"{stats.connections} broker sessions, no sample dropped",
        )
    )
    assert ticks.missed == 0, ticks
    assert ticks.max_lateness_s < LATENESS_BOUND_S, ticks
    record.check(alarm=None)
    assert summary.alarms == ()
    assert summary.detail == "aborted by fault-matrix"  # ended by the test, not by a failure
    # the outage happened during the run, and telemetry came back before it ended
    assert "flowing" in marks and stats.connections >= 2
    # the publisher's buffer kept the outage's rows (four ticks of one chamber) to send later
    assert stats.samples_dropped == 0 and stats.samples_queued == 0
