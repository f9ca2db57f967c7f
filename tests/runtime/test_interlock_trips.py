"""One test per interlock: a fault injected in the simulator trips its condition within the
configured time, the outputs reach their safe state, and the run log records it.

Every run uses the one-chamber test rig (chamber B, 8 L, 400 W heater) with a 10 s tick on
the virtual clock. "Configured time" is the interlock setting of the chamber's plan:
temperature limits trip on the first tick whose reading reaches the limit, the time-based
conditions after their configured duration plus at most one tick.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from controller.control import Condition, ConditionPolicy, InterlockLimits, Level, Outputs
from controller.rig import Fault, FaultKind
from controller.runtime import RunSettings, SimulatedRun
from controller.storage import RunEndReason, RunLogReader

from ._sim import Files, drive

PERIOD_S = 10.0


def prepare(
    files: Files, *, policies: Mapping[Condition, ConditionPolicy] | None = None, **kw: Any
) -> SimulatedRun:
    proto, rig, log = files(**kw)
    settings = RunSettings(period_s=PERIOD_S, policies=policies or {})
    return SimulatedRun.prepare(proto, rig, log, settings=settings)


def log_of(run: SimulatedRun) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Samples of chamber B and the alarm records of a finished run."""
    with RunLogReader(run.writer.path) as reader:
        info = reader.info()
        assert info.end is not None and info.end.end_reason is RunEndReason.COMPLETED
        return reader.samples("B"), reader.alarms()


def raised(alarms: pd.DataFrame, code: str) -> pd.Series:
    """The first 'raise' record of ``code``."""
    hits = alarms[(alarms.action == "raise") & (alarms.code == code)]
    assert len(hits), f"no {code} alarm in the log: {alarms[['t_s', 'action', 'code']]}"
    return hits.iloc[0]


def limits_of(run: SimulatedRun) -> InterlockLimits:
    return run.plan.chambers["B"].interlocks


def assert_row_safe(row: pd.Series, safe: Outputs) -> None:
    assert (row.heater_pct, row.chiller_pct, row.lamp_pct, row.pump_pct) == (
        safe.heater_pct,
        safe.chiller_pct,
        safe.lamp_pct,
        safe.pump_pct,
    )


def row_at(samples: pd.DataFrame, t_s: float) -> pd.Series:
    return samples[samples.t_s == t_s].iloc[0]


def test_heater_stuck_on_trips_over_temperature_on_the_first_reading_at_the_limit(
    files: Files,
) -> None:
    run = prepare(files, t_max=22.0, hours=1.0)
    limits = limits_of(run)
    run.rack.inject(Fault(kind=FaultKind.HEATER_STUCK_ON, chamber="B", at_s=1200.0))
    drive(run)
    samples, alarms = log_of(run)
    first_hot = samples[samples.temperature_c >= limits.max_temperature_c].iloc[0]
    trip = raised(alarms, "over-temperature")
    assert trip.t_s == first_hot.t_s  # configured: the first tick reading >= the limit
    assert trip.level == "trip" and trip.chamber == "B"
    assert first_hot.alarm == "over-temperature"
    assert_row_safe(first_hot, limits.safe_outputs())
    assert run.io.last_written["B"] == limits.safe_outputs()
    actual = run.rack.outputs("B")
    assert actual.heater_pct == 100.0  # the welded relay: only a hardware cut-off helps
    assert (actual.chiller_pct, actual.lamp_pct) == (0.0, 0.0)


def test_heater_stuck_off_in_a_cold_room_trips_under_temperature(files: Files) -> None:
    run = prepare(files, room_c=5.0, initial_c=14.0, temperature_c=14.0, t_min=12.0, hours=1.5)
    limits = limits_of(run)
    run.rack.inject(Fault(kind=FaultKind.HEATER_STUCK_OFF, chamber="B", at_s=600.0))
    drive(run)
    samples, alarms = log_of(run)
    first_cold = samples[samples.temperature_c <= limits.min_temperature_c].iloc[0]
    trip = raised(alarms, "under-temperature")
    assert trip.t_s == first_cold.t_s
    assert_row_safe(first_cold, limits.safe_outputs())
    assert run.rack.outputs("B").lamp_pct == 0.0
    assert run.rack.outputs("B").pump_pct == limits.safe_pump_pct


def test_probe_dropout_trips_sensor_stale_after_the_stale_time_and_recovers(
    files: Files,
) -> None:
    run = prepare(files, hours=1.0)
    limits = limits_of(run)
    run.rack.inject(
        Fault(
            kind=FaultKind.DROPOUT, chamber="B", sensor="temperature", at_s=1200.0, duration_s=600.0
        )
    )
    drive(run)
    samples, alarms = log_of(run)
    trip = raised(alarms, "sensor-stale")
    assert 1200.0 + limits.stale_after_s - PERIOD_S <= trip.t_s
    assert trip.t_s <= 1200.0 + limits.stale_after_s + PERIOD_S
    assert samples[(samples.t_s >= 1200.0) & (samples.t_s < 1800.0)].temperature_c.isna().all()
    assert_row_safe(row_at(samples, trip.t_s), limits.safe_outputs())
    cleared = alarms[(alarms.action == "clear") & (alarms.code == "sensor-stale")]
    assert len(cleared) == 1 and 1800.0 <= cleared.iloc[0].t_s <= 1800.0 + PERIOD_S
    # control resumes once the probe answers again (non-latching): the lamp is back on
    assert samples.iloc[-1].lamp_pct > 0.0 and pd.isna(samples.iloc[-1].alarm)


def test_stuck_probe_trips_sensor_frozen_after_the_frozen_time(files: Files) -> None:
    run = prepare(files, hours=0.75)
    limits = limits_of(run)
    run.rack.inject(Fault(kind=FaultKind.STUCK, chamber="B", sensor="temperature", at_s=600.0))
    drive(run)
    samples, alarms = log_of(run)
    trip = raised(alarms, "sensor-frozen")
    assert 600.0 + limits.frozen_after_s - PERIOD_S <= trip.t_s
    assert trip.t_s <= 600.0 + limits.frozen_after_s + PERIOD_S
    assert_row_safe(row_at(samples, trip.t_s), limits.safe_outputs())
    assert run.io.last_written["B"] == limits.safe_outputs()


@pytest.mark.parametrize("level", [Level.ALARM, Level.TRIP])
def test_runaway_heating_raises_rate_of_change_within_two_windows(
    files: Files, level: Level
) -> None:
    policy = ConditionPolicy(level=level, latch=True)
    run = prepare(files, t_max=35.0, hours=1.0, policies={Condition.RATE_OF_CHANGE: policy})
    limits = limits_of(run)
    run.rack.inject(Fault(kind=FaultKind.HEATER_STUCK_ON, chamber="B", at_s=600.0))
    drive(run)
    samples, alarms = log_of(run)
    alarm = raised(alarms, "rate-of-change")
    assert 600.0 < alarm.t_s <= 600.0 + 2 * limits.rate_window_s + PERIOD_S
    assert alarm.level == level.value
    assert "over-temperature" not in set(alarms.code[alarms.t_s <= alarm.t_s])
    row = row_at(samples, alarm.t_s)
    assert row.alarm == "rate-of-change"
    if level is Level.TRIP:
        assert_row_safe(row, limits.safe_outputs())
    else:  # an alarm reports; control goes on
        assert row.lamp_pct > 0.0


def test_leak_trips_low_level_once_the_level_switch_opens_and_stops_the_pump(
    files: Files,
) -> None:
    run = prepare(files, hours=0.5)
    limits = limits_of(run)
    leak_l_h = 12.0
    run.rack.inject(Fault(kind=FaultKind.LEAK, chamber="B", at_s=600.0, magnitude=leak_l_h))
    drive(run)
    samples, alarms = log_of(run)
    # the rig's level switch opens after 5 % of the 8 L is lost
    opens_s = 600.0 + 0.05 * 8.0 / leak_l_h * 3600.0
    trip = raised(alarms, "low-level")
    assert opens_s <= trip.t_s <= opens_s + PERIOD_S
    safe = limits.policies[Condition.LOW_LEVEL].safe
    assert safe is not None and safe.pump_pct == 0.0
    assert_row_safe(row_at(samples, trip.t_s), safe)
    assert run.rack.outputs("B").pump_pct == 0.0


def test_bus_silence_trips_comm_loss_and_the_module_watchdog_makes_outputs_safe(
    files: Files,
) -> None:
    run = prepare(files, hours=1.0)
    limits = limits_of(run)
    run.rack.inject(
        Fault(
            kind=FaultKind.COMM_TIMEOUT, chamber="B", sensor="modbus", at_s=1200.0, duration_s=600.0
        )
    )
    seen: dict[str, Outputs] = {}

    def look(r: SimulatedRun) -> None:
        o = r.rack.outputs("B")
        seen["during"] = Outputs(
            heater_pct=o.heater_pct,
            chiller_pct=o.chiller_pct,
            lamp_pct=o.lamp_pct,
            pump_pct=o.pump_pct,
        )

    drive(run, at=[(1200.0 + 3 * PERIOD_S + 5.0, look)])
    samples, alarms = log_of(run)
    trip = raised(alarms, "comm-loss")
    assert 1200.0 < trip.t_s <= 1200.0 + limits.comm_loss_after_s + PERIOD_S
    assert_row_safe(row_at(samples, trip.t_s), limits.safe_outputs())
    # the controller cannot reach the module: its own watchdog drove the safe state
    assert seen["during"] == limits.safe_outputs()
    assert [c for _, c in run.io.watchdog_trips] == ["B"]
    cleared = alarms[(alarms.action == "clear") & (alarms.code == "comm-loss")]
    assert len(cleared) == 1 and cleared.iloc[0].t_s <= 1800.0 + 2 * PERIOD_S
    assert samples.iloc[-1].lamp_pct > 0.0


def test_e_stop_trips_on_the_next_tick_and_stays_latched_after_release(files: Files) -> None:
    run = prepare(files, hours=0.5)
    limits = limits_of(run)
    drive(
        run,
        at=[
            (605.0, lambda r: r.io.press_e_stop("B")),
            (900.0, lambda r: r.io.release_e_stop("B")),
        ],
    )
    samples, alarms = log_of(run)
    trip = raised(alarms, "e-stop")
    assert 605.0 < trip.t_s <= 605.0 + PERIOD_S
    assert_row_safe(row_at(samples, trip.t_s), limits.safe_outputs())
    # latched: released at 900 s but still holding (it needs an operator's acknowledgement)
    assert samples.iloc[-1].alarm == "e-stop"
    assert run.io.last_written["B"] == limits.safe_outputs()


def test_probe_spikes_beyond_plausible_trip_out_of_range_on_that_reading(files: Files) -> None:
    run = prepare(files, hours=0.5)
    limits = limits_of(run)
    run.rack.inject(
        Fault(kind=FaultKind.SPIKES, chamber="B", sensor="temperature", at_s=600.0, magnitude=100.0)
    )
    drive(run)
    samples, alarms = log_of(run)
    wild = samples[
        (samples.temperature_c <= limits.sensor_min_c)
        | (samples.temperature_c >= limits.sensor_max_c)
    ]
    trip = raised(alarms, "sensor-out-of-range")
    assert trip.t_s == wild.iloc[0].t_s >= 600.0
    assert_row_safe(row_at(samples, trip.t_s), limits.safe_outputs())
    # a wild reading is never taken for a real over- or under-temperature
    assert not {"over-temperature", "under-temperature"} & set(alarms.code)


def test_every_interlock_condition_has_a_fault_test_here() -> None:
    source = Path(__file__).read_text(encoding="utf-8")
    missing = [c.value for c in Condition if f'raised(alarms, "{c.value}")' not in source]
    assert missing == []
