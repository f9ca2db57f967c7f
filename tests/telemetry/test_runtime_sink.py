"""The runtime's telemetry hook: a simulated run feeds a TelemetryPublisher through its
LogSink (``attach_telemetry``) and progress reports, and a failing sink costs nothing.

No broker is involved: the publisher only fills its buffer and derives its status.
"""

from __future__ import annotations

from pathlib import Path

from controller.clock import Clock, run_with_clock
from controller.runtime import RunSummary, SimulatedRun
from controller.storage import RunLogReader
from controller.telemetry import ControllerState, TelemetryPublisher

from ._helpers import quick_config

RIG = """
name = "telemetry test rack"

[sim]
room_temperature_c = 18.0
physics_step_s = 1.0
seed = 5

[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0

[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = 400.0
chiller_max_w = 300.0
dead_time_s = 10.0
"""

PROTOCOL = """
format = "squall-protocol/1"
title = "Telemetry test"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = ["B"]

[[phases]]
name = "baseline"
duration = "30min"
  [phases.programs]
  temperature = [ { kind = "hold", value = 20.0 } ]

[[phases]]
name = "warming"
duration = "30min"
  [phases.programs]
  temperature = [ { kind = "ramp", to = 20.5, rate_per_h = 1.0 } ]
"""


class Broken:
    """A telemetry sink whose every offer fails."""

    def __init__(self) -> None:
        self.offers = 0

    def offer(self, item: object) -> None:
        self.offers += 1
        raise RuntimeError("encoder bug")


def test_a_simulated_run_feeds_every_row_event_and_tick_to_the_publisher(tmp_path: Path) -> None:
    (tmp_path / "rig.toml").write_text(RIG)
    (tmp_path / "protocol.toml").write_text(PROTOCOL)
    run = SimulatedRun.prepare(
        tmp_path / "protocol.toml", tmp_path / "rig.toml", tmp_path / "run.sqlite"
    )
    publisher = TelemetryPublisher(quick_config("mqtt://127.0.0.1:1"), clock=run.clock)
    publisher.describe_run(
        run_id="run", protocol="Telemetry test", chambers=["B"], duration_s=3600.0,
        period_s=run.plan.settings.period_s,
    )  # fmt: skip
    loop = run.loop(progress=publisher.on_tick)
    loop.sink.attach_telemetry(publisher)

    async def main(_clock: Clock) -> RunSummary:
        return await loop.run()

    summary = run_with_clock(run.clock, main)
    with RunLogReader(tmp_path / "run.sqlite") as reader:
        events, alarms = reader.events(), reader.alarms()
    stats = publisher.stats()
    assert stats.samples_queued == summary.rows_written > 0
    assert stats.records_queued == len(events) + len(alarms)
    status = publisher.status()
    assert status.state is ControllerState.FINISHED  # from the run_stop event
    assert status.phase == "warming" and status.chambers == ("B",)
    assert status.elapsed_s is not None and status.elapsed_s > 3000.0


def test_a_failing_telemetry_sink_never_reaches_the_loop_nor_the_log(tmp_path: Path) -> None:
    (tmp_path / "rig.toml").write_text(RIG)
    (tmp_path / "protocol.toml").write_text(PROTOCOL)
    run = SimulatedRun.prepare(
        tmp_path / "protocol.toml", tmp_path / "rig.toml", tmp_path / "run.sqlite"
    )
    loop = run.loop()
    broken = Broken()
    loop.sink.attach_telemetry(broken)

    async def main(_clock: Clock) -> RunSummary:
        return await loop.run()

    summary = run_with_clock(run.clock, main)
    assert summary.end_reason.value == "completed"
    assert summary.rows_written == 360 and summary.rows_lost == 0
    # every tick's rows plus the start, phase-change and stop events were offered
    assert broken.offers == loop.sink.telemetry_failures >= 360 + 3
