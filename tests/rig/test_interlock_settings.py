"""``[chambers.interlocks]``: overrides of the derived interlock limits and policies, refused
at their key when they contradict the chamber's limits, refused when a run is planned when
they contradict the run, and in force in a simulated run (a heater stuck on trips at the
overridden temperature, not at the derived one)."""

from __future__ import annotations

from pathlib import Path

import pytest

from controller.clock import Clock, run_with_clock
from controller.control import Condition, ConditionPolicy, Level, default_policies
from controller.errors import SquallError
from controller.files import FileProblems, load_model
from controller.rig import ChamberInterlocks, Fault, FaultKind, Rig
from controller.runtime import RunSettings, SimulatedRun, plan_control
from controller.storage import RunLogReader

pytestmark = pytest.mark.timeout(120)

RIG = """name = "interlock test rack"
[sim]
room_temperature_c = 18.0
physics_step_s = 1.0
seed = 2

[[baths]]
id = "tank"
water_volume_l = 30.0

[[chambers]]
id = "A1"
water_volume_l = 8.0
sediment_area_m2 = 0.03
bath = "tank"

[[chambers]]
id = "A2"
water_volume_l = 8.0
sediment_area_m2 = 0.03
bath = "tank"

[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03

[chambers.limits]
min_temperature_c = 10.0
max_temperature_c = 23.0
max_ramp_c_per_h = 3.0

[chambers.sim]
initial_temperature_c = 20.0

[chambers.sim.sensors]
temperature_noise_c = 0.01
temperature_tau_s = 5.0

[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = 400.0
chiller_max_w = 300.0
dead_time_s = 10.0
{table}"""

PROTOCOL = """format = "squall-protocol/1"
title = "Hold"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"
[groups.all]
role = "treatment"
chambers = ["B"]
[[phases]]
name = "hold"
duration = "60min"
  [phases.programs]
  temperature = [ { kind = "hold", value = 20.0 } ]
"""


def write(tmp_path: Path, table: str) -> Path:
    path = tmp_path / "rig.toml"
    path.write_text(RIG.format(table=table))
    return path


def load(tmp_path: Path, table: str) -> Rig:
    return load_model(write(tmp_path, table), Rig)


def refused(tmp_path: Path, table: str) -> SquallError:
    with pytest.raises(FileProblems) as caught:
        load(tmp_path, table)
    return caught.value


def line_of(tmp_path: Path, needle: str) -> int:
    lines = (tmp_path / "rig.toml").read_text().splitlines()
    return next(i for i, line in enumerate(lines, 1) if line.startswith(needle))


# ------------------------------------------------------------------ refused in the file


@pytest.mark.parametrize(
    ("table", "key", "words"),
    [
        # trip limits must enclose the operating limits (10 … 23 °C)
        ("over_temperature_c = 23.0", "over_temperature_c", "limits.max_temperature_c (23"),
        ("under_temperature_c = 10.5", "under_temperature_c", "limits.min_temperature_c (10"),
        # the plausible range must enclose the operating range and the trips
        ("sensor_max_c = 22.0", "sensor_max_c", "limits.max_temperature_c"),
        ("sensor_min_c = 11.0", "sensor_min_c", "limits.min_temperature_c"),
        ("over_temperature_c = 25.0\nsensor_max_c = 24.0", "sensor_max_c", "over_temperature_c"),
        ("sensor_min_c = 9.0\nunder_temperature_c = 8.0", "under_temperature_c", "sensor_min_c"),
        # a ramp at the chamber's limit must not set the rate check off
        ("max_rate_c_per_h = 3.0", "max_rate_c_per_h", "max_ramp_c_per_h (3"),
        ("stale_after_s = 0.0", "stale_after_s", "greater than 0"),
    ],
)
def test_a_setting_that_contradicts_the_chamber_is_refused_at_its_key(
    tmp_path: Path, table: str, key: str, words: str
) -> None:
    err = refused(tmp_path, "[chambers.interlocks]\n" + table + "\n")
    assert err.field == f"chambers.2.interlocks.{key}"
    assert err.line == line_of(tmp_path, key)
    assert words in err.message


@pytest.mark.parametrize("condition", ["e_stop", "low_level", "over_temperature"])
def test_protective_conditions_stay_trips(tmp_path: Path, condition: str) -> None:
    table = f'[chambers.interlocks.conditions]\n{condition} = {{ level = "warning" }}\n'
    err = refused(tmp_path, table)
    assert err.field == f"chambers.2.interlocks.conditions.{condition}.level"
    assert err.line == line_of(tmp_path, condition) and "must stay a trip" in err.message


def test_an_unknown_condition_or_level_is_refused_with_a_suggestion(tmp_path: Path) -> None:
    err = refused(tmp_path, "[chambers.interlocks.conditions]\nrate_of_chang = {}\n")
    assert err.field == "chambers.2.interlocks.conditions.rate_of_chang"
    assert "rate_of_change" in err.message
    err = refused(tmp_path, '[chambers.interlocks.conditions]\nsensor_stale = { level = "trp" }\n')
    assert err.field == "chambers.2.interlocks.conditions.sensor_stale.level"
    assert "trip" in err.message


def test_the_rig_schema_shows_the_interlock_settings() -> None:
    defs = Rig.model_json_schema()["$defs"]
    assert "interlocks" in defs["Chamber"]["properties"]
    keys = set(defs["ChamberInterlocks"]["properties"])
    assert {"over_temperature_c", "sensor_max_c", "max_rate_c_per_h", "conditions"} <= keys
    assert "stale_after_s" in keys and "comm_loss_after_s" in keys


# ------------------------------------------------------------------------- planning


def test_every_setting_reaches_the_plan_and_the_rest_stay_derived(tmp_path: Path) -> None:
    rig = load(
        tmp_path,
        """[chambers.interlocks]
over_temperature_c = 23.5
sensor_max_c = 40.0
max_rate_c_per_h = 12.0
rate_window_s = 120.0
hysteresis_c = 0.1
stale_after_s = 45.0
frozen_after_s = 600.0
frozen_epsilon_c = 0.002
comm_loss_after_s = 25.0
safe_pump_pct = 50.0
""",
    )
    given = plan_control(rig, ["B"], RunSettings(period_s=10.0)).chambers["B"].interlocks
    plain = (
        plan_control(load(tmp_path, ""), ["B"], RunSettings(period_s=10.0)).chambers["B"].interlocks
    )
    assert (given.max_temperature_c, given.sensor_max_c) == (23.5, 40.0)
    assert (given.max_rate_c_per_h, given.rate_window_s) == (12.0, 120.0)
    assert (given.temperature_hysteresis_c, given.stale_after_s) == (0.1, 45.0)
    assert (given.frozen_after_s, given.frozen_epsilon_c) == (600.0, 0.002)
    assert (given.comm_loss_after_s, given.safe_outputs().pump_pct) == (25.0, 50.0)
    # not given: as derived (10 °C limit − 1 °C margin; plausible range from −5 °C)
    assert given.min_temperature_c == plain.min_temperature_c == 9.0
    assert given.sensor_min_c == plain.sensor_min_c == -5.0
    assert plain.max_temperature_c == 24.0 and plain.sensor_max_c == 60.0


def test_policies_come_from_the_file_and_the_run_overrides_them(tmp_path: Path) -> None:
    rig = load(
        tmp_path,
        """[chambers.interlocks.conditions]
rate_of_change = { level = "trip" }
sensor_stale = { latched = true }
under_temperature = { level = "alarm", latched = false }
""",
    )
    policies = plan_control(rig, ["B"], RunSettings()).chambers["B"].interlocks.policies
    defaults = default_policies()
    assert policies[Condition.RATE_OF_CHANGE].level is Level.TRIP
    assert policies[Condition.RATE_OF_CHANGE].latch is defaults[Condition.RATE_OF_CHANGE].latch
    assert policies[Condition.SENSOR_STALE] == ConditionPolicy(level=Level.TRIP, latch=True)
    assert policies[Condition.UNDER_TEMPERATURE] == ConditionPolicy(level=Level.ALARM, latch=False)
    assert policies[Condition.LOW_LEVEL] == defaults[Condition.LOW_LEVEL]  # keeps its safe state
    run = {Condition.RATE_OF_CHANGE: ConditionPolicy(level=Level.WARNING, latch=False)}
    policies = plan_control(rig, ["B"], RunSettings(policies=run)).chambers["B"].interlocks.policies
    assert policies[Condition.RATE_OF_CHANGE].level is Level.WARNING
    assert policies[Condition.UNDER_TEMPERATURE].level is Level.ALARM


@pytest.mark.parametrize(
    ("table", "key", "period_s"),
    [
        ("stale_after_s = 30.0", "stale_after_s", 20.0),  # 1.5 ticks
        ("comm_loss_after_s = 15.0", "comm_loss_after_s", 10.0),
        ("frozen_after_s = 50.0", "frozen_after_s", 20.0),
        ("rate_window_s = 5.0", "rate_window_s", 10.0),
    ],
)
def test_a_time_limit_shorter_than_the_run_allows_is_refused_when_planning(
    tmp_path: Path, table: str, key: str, period_s: float
) -> None:
    rig = load(tmp_path, "[chambers.interlocks]\n" + table + "\n")
    plan_control(rig, ["B"], RunSettings(period_s=period_s / 4))  # fine at a faster tick
    with pytest.raises(SquallError) as caught:
        plan_control(rig, ["B"], RunSettings(period_s=period_s))
    assert caught.value.field == f"chambers.2.interlocks.{key}"
    assert "tick" in caught.value.message


def test_a_plausible_range_inside_the_derived_trip_is_refused_when_planning(
    tmp_path: Path,
) -> None:
    rig = load(tmp_path, "[chambers.interlocks]\nsensor_max_c = 25.0\n")
    assert plan_control(rig, ["B"], RunSettings()).chambers["B"].interlocks.sensor_max_c == 25.0
    with pytest.raises(SquallError) as caught:  # a 3 °C margin puts the trip at 26 °C
        plan_control(rig, ["B"], RunSettings(trip_margin_c=3.0))
    assert caught.value.field == "chambers.2.interlocks.sensor_max_c"
    assert "over_temperature_c" in caught.value.message


def test_chambers_of_one_bath_may_differ(tmp_path: Path) -> None:
    """Each chamber of a bath is judged on its own probe and limits (one trip makes the
    bath's heating safe), so their settings need not agree."""
    text = RIG.format(table="").replace(
        'bath = "tank"\n\n[[chambers]]\nid = "A2"',
        'bath = "tank"\n\n[chambers.interlocks]\nover_temperature_c = 36.5\n\n'
        '[[chambers]]\nid = "A2"',
    )
    path = tmp_path / "rig.toml"
    path.write_text(text)
    rig = load_model(path, Rig)
    plan = plan_control(rig, ["A1", "A2"], RunSettings())
    assert plan.chambers["A1"].interlocks.max_temperature_c == 36.5
    assert plan.chambers["A2"].interlocks.max_temperature_c == 36.0  # 35 °C + 1 °C margin
    assert isinstance(rig.chambers[0].interlocks, ChamberInterlocks)


# ------------------------------------------------------------------- in a simulated run


def stuck_heater_trip(tmp_path: Path, tag: str, table: str) -> tuple[float, float, float]:
    """Weld chamber B's heater at 20 min; return the configured trip, the temperature of the
    tripping reading and the largest reading before it (°C)."""
    folder = tmp_path / tag
    folder.mkdir()
    (folder / "rig.toml").write_text(RIG.format(table=table))
    (folder / "protocol.toml").write_text(PROTOCOL)
    run = SimulatedRun.prepare(
        folder / "protocol.toml",
        folder / "rig.toml",
        folder / "run.sqlite",
        settings=RunSettings(period_s=10.0),
    )
    run.rack.inject(Fault(kind=FaultKind.HEATER_STUCK_ON, chamber="B", at_s=1200.0))

    async def main(clock: Clock) -> None:
        del clock
        await run.loop().run()

    try:
        run_with_clock(run.clock, main)
    finally:
        if not run.writer.closed:
            run.writer.close()
    with RunLogReader(run.writer.path) as reader:
        samples, alarms = reader.samples("B"), reader.alarms()
    trips = alarms[(alarms.action == "raise") & (alarms.code == "over-temperature")]
    assert len(trips) and trips.iloc[0].level == "trip"
    t_trip = float(trips.iloc[0].t_s)
    at_trip = float(samples[samples.t_s == t_trip].temperature_c.iloc[0])
    before = float(samples[samples.t_s < t_trip].temperature_c.max())
    after = samples[samples.t_s > t_trip]
    assert (after.heater_pct == 0.0).all() and (after.lamp_pct == 0.0).all()  # made safe
    return run.plan.chambers["B"].interlocks.max_temperature_c, at_trip, before


def test_a_stuck_heater_trips_at_the_overridden_temperature(tmp_path: Path) -> None:
    limit, at_trip, before = stuck_heater_trip(
        tmp_path, "override", "[chambers.interlocks]\nover_temperature_c = 23.4\n"
    )
    derived, at_derived, before_derived = stuck_heater_trip(tmp_path, "derived", "")
    assert limit == 23.4 and derived == 24.0  # 23 °C limit + the 1 °C default margin
    # each run trips on its first reading at or above its own limit; the welded heater warms
    # the water by about 400 W / (8 L · 4 kJ L⁻¹ K⁻¹) · 10 s ≈ 0.12 °C per tick
    assert before < 23.4 <= at_trip < 23.4 + 0.2
    assert before_derived < 24.0 <= at_derived < 24.0 + 0.2
