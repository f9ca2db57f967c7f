"""Lamp and pump drive curves in the rig file: refused unless invertible (each problem at its
row), inverted for the feed-forward, and in a simulated run they put a curved lamp and a pump
with a dead band where the protocol asks, which the straight-line map does not.

The simulated lamp follows PAR(d) = P·(1 − e^(−k·d/100))/(1 − e^(−k)) and the pump
flow = F·(d − d0)/(100 − d0) above its dead band d0 (``controller.rig.LampSim``, ``PumpSim``);
the tables below are that lamp and pump "measured" at a few drives, as the quantum-sensor
procedure of ``hardware-notes/calibration.md`` does.
"""

from __future__ import annotations

import asyncio
import contextlib
import io
import math
import re
import tomllib
from pathlib import Path

import numpy as np
import pytest

from controller.clock import Clock, run_with_clock
from controller.control import PidParams, PidState, pid_step
from controller.files import FileProblems, load_model
from controller.rig import ChamberLamp, ChamberPump, DriveCurve, Rig
from controller.runtime import ChamberReadings, RunSettings, SimulatedRun, plan_control
from controller.runtime._decide import Decider, Target

pytestmark = pytest.mark.timeout(120)

LAMP_FULL, LAMP_K = 700.0, 1.2
PUMP_FULL, PUMP_DEAD = 14.0, 8.0


def sim_lamp(drive_pct: float) -> float:
    """PAR of the simulator's warm, new lamp at a drive, µmol photons m⁻² s⁻¹."""
    return LAMP_FULL * (1 - math.exp(-LAMP_K * drive_pct / 100)) / (1 - math.exp(-LAMP_K))


def sim_pump(drive_pct: float) -> float:
    """Flow of the simulator's pump at a drive, cm s⁻¹."""
    return max(0.0, PUMP_FULL * (drive_pct - PUMP_DEAD) / (100 - PUMP_DEAD))


LAMP_ROWS = [(d, round(sim_lamp(d), 1)) for d in (0, 10, 20, 30, 40, 50, 60, 70, 80, 90, 100)]
PUMP_ROWS = [(0.0, 0.0), (PUMP_DEAD, 0.0), (50.0, sim_pump(50.0)), (100.0, PUMP_FULL)]


def rig_text(*, lamp_table: bool, pump_table: bool, faults: str = "") -> str:
    lamp = f"drive_pct_par = {[list(r) for r in LAMP_ROWS]}\n" if lamp_table else ""
    pump = f"drive_pct_flow_cm_s = {[list(r) for r in PUMP_ROWS]}\n" if pump_table else ""
    return f"""name = "curve test rack"
[sim]
room_temperature_c = 20.0
physics_step_s = 1.0
seed = 4
{faults}
[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0
[chambers.limits]
max_par = {LAMP_FULL}
max_flow_cm_s = {PUMP_FULL}
[chambers.lamp]
{lamp}
[chambers.pump]
{pump}
[chambers.sim.lamp]
par_at_full_drive = {LAMP_FULL}
curve_shape = {LAMP_K}
warmup_tau_s = 30.0
ageing_pct_per_1000_h = 0.0
[chambers.sim.pump]
dead_band_pct = {PUMP_DEAD}
flow_at_full_drive_cm_s = {PUMP_FULL}
[chambers.sim.sensors]
par_noise_pct = 0.5
flow_noise_cm_s = 0.05
"""


PROTOCOL = """format = "squall-protocol/1"
title = "Light and flow hold"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"
[groups.all]
role = "treatment"
chambers = ["B"]
[[phases]]
name = "hold"
duration = "40min"
  [phases.programs]
  temperature = [ { kind = "hold", value = 20.0 } ]
  light = [ { kind = "hold", value = 300.0 } ]
  flow = [ { kind = "hold", value = 4.0 } ]
"""

#: Both sensors silent for the whole run: the lamp and pump run on feed-forward alone.
BLIND = """
[[sim.faults]]
kind = "dropout"
chamber = "B"
sensor = "par"
[[sim.faults]]
kind = "dropout"
chamber = "B"
sensor = "flow"
"""


def load_rig(tmp_path: Path, text: str) -> Rig:
    path = tmp_path / "rig.toml"
    path.write_text(text)
    return load_model(path, Rig)


def problem(tmp_path: Path, table: str) -> tuple[int, str, str]:
    """Load a one-chamber rig whose [chambers.lamp] holds ``table``; return the first
    problem's line, field and message."""
    text = rig_text(lamp_table=False, pump_table=False).replace(
        "[chambers.lamp]\n", f"[chambers.lamp]\n{table}\n"
    )
    with pytest.raises(FileProblems) as caught:
        load_rig(tmp_path, text)
    err = caught.value
    assert err.file == str(tmp_path / "rig.toml") and err.line is not None
    return err.line, err.field or "", err.message


def line_of(tmp_path: Path, needle: str) -> int:
    lines = (tmp_path / "rig.toml").read_text().splitlines()
    return next(i for i, line in enumerate(lines, 1) if needle in line)


# ------------------------------------------------------------------ tables in the file


@pytest.mark.parametrize(
    ("rows", "bad_row", "field", "words"),
    [
        ("[5, 0], [100, 700]", "[5, 0]", "drive_pct_par.0.0", "first row must be at 0 %"),
        ("[0, 0], [50, 400], [90, 700]", "[90, 700]", "drive_pct_par.2.0", "last row"),
        ("[0, 0], [50, 400], [50, 450], [100, 700]", "[50, 450]", "drive_pct_par.2.0", "above"),
        ("[0, 0], [50, 400], [60, 390], [100, 700]", "[60, 390]", "drive_pct_par.2.1", "rise"),
        ("[0, 0], [50, 400], [60, 400], [100, 700]", "[60, 400]", "drive_pct_par.2.1", "flat"),
        ("[0, 0], [50, 400], [100, 6000]", "[100, 6000]", "drive_pct_par.2.1", "5000"),
        ("[0, 0], [100, 0]", "[100, 0]", "drive_pct_par.1.1", "above that at 0 %"),
    ],
)
def test_a_bad_lamp_table_is_refused_at_its_row(
    tmp_path: Path, rows: str, bad_row: str, field: str, words: str
) -> None:
    table = "drive_pct_par = [\n" + "".join(f"  {r},\n" for r in re.findall(r"\[[^]]*\]", rows))
    line, where, message = problem(tmp_path, table + "]")
    assert where == f"chambers.0.lamp.{field}"
    assert line == line_of(tmp_path, bad_row)
    assert words in message


def test_a_table_of_one_row_is_refused_at_the_table(tmp_path: Path) -> None:
    line, where, message = problem(tmp_path, "drive_pct_par = [[0, 0]]")
    assert where == "chambers.0.lamp.drive_pct_par"
    assert line == line_of(tmp_path, "drive_pct_par") and "two rows" in message


def test_a_pump_table_may_start_flat_but_not_stay_flat(tmp_path: Path) -> None:
    good = ChamberPump(drive_pct_flow_cm_s=PUMP_ROWS)
    curve = good.curve()
    assert curve is not None and curve.drive_pct[0] == PUMP_DEAD  # the dead band's edge
    text = rig_text(lamp_table=False, pump_table=False).replace(
        "[chambers.pump]\n",
        "[chambers.pump]\ndrive_pct_flow_cm_s = [\n  [0, 0],\n  [8, 0],\n  [50, 6],\n"
        "  [70, 6],\n  [100, 14],\n]\n",
    )
    with pytest.raises(FileProblems) as caught:
        load_rig(tmp_path, text)
    assert caught.value.field == "chambers.0.pump.drive_pct_flow_cm_s.3.1"
    assert caught.value.line == line_of(tmp_path, "[70, 6]")


def test_the_rig_schema_shows_the_curve_tables() -> None:
    schema = Rig.model_json_schema()
    lamp = schema["$defs"]["ChamberLamp"]["properties"]
    pump = schema["$defs"]["ChamberPump"]["properties"]
    assert "drive_pct_par" in lamp and "drive_pct_flow_cm_s" in pump
    assert "PAR" in lamp["drive_pct_par"]["description"]


# ------------------------------------------------------------------------ inversion


def test_the_inverse_of_a_table_gives_back_the_setpoint_on_the_table() -> None:
    curve = ChamberLamp(drive_pct_par=LAMP_ROWS).curve()
    assert curve is not None and curve.full == LAMP_ROWS[-1][1]
    for par in np.linspace(1.0, curve.full, 37):
        assert curve.value_at(curve.drive_for(par)) == pytest.approx(par, rel=1e-12)
    for drive, par in LAMP_ROWS[1:]:
        assert curve.drive_for(par) == pytest.approx(drive, abs=1e-9)
    assert curve.drive_for(0.0) == 0.0 and curve.drive_for(-3.0) == 0.0
    assert curve.drive_for(2 * curve.full) == 100.0  # held at full drive
    # a reading past the table goes on along the last segment (the trim keeps its gain)
    last = (LAMP_ROWS[-1][0] - LAMP_ROWS[-2][0]) / (LAMP_ROWS[-1][1] - LAMP_ROWS[-2][1])
    assert curve.equivalent_drive(curve.full + 10.0) == pytest.approx(100.0 + 10.0 * last)


def test_a_dead_band_maps_any_flow_above_zero_past_its_edge() -> None:
    curve = ChamberPump(drive_pct_flow_cm_s=PUMP_ROWS).curve()
    assert curve is not None
    assert curve.drive_for(1e-6) == pytest.approx(PUMP_DEAD, abs=1e-4)
    for flow in (0.5, 4.0, 9.0, 14.0):  # the simulated pump is straight above its band
        assert sim_pump(curve.drive_for(flow)) == pytest.approx(flow, rel=1e-9)
    assert curve.value_at(3.0) == 0.0  # inside the band
    assert curve.equivalent_drive(0.0) == pytest.approx(PUMP_DEAD)


def test_without_a_table_the_plan_keeps_the_straight_line(tmp_path: Path) -> None:
    rig = load_rig(tmp_path, rig_text(lamp_table=False, pump_table=False))
    cs = plan_control(rig, ["B"], RunSettings()).chambers["B"]
    assert cs.lamp_curve == DriveCurve.linear(LAMP_FULL) and cs.par_full == LAMP_FULL
    assert cs.lamp_drive_pct(350.0) == pytest.approx(50.0)
    assert cs.pump_drive_pct(7.0) == pytest.approx(50.0)
    assert cs.lamp_drive_pct(None) is None and cs.pump_drive_pct(None, reading=True) is None


def test_on_a_straight_line_the_drive_is_what_the_par_unit_trim_gave(tmp_path: Path) -> None:
    """The trim now works in % of drive; on a straight line that is the old trim in PAR units
    (drive = 100·(setpoint + correction)/P100), tick by tick."""
    rig = load_rig(tmp_path, rig_text(lamp_table=False, pump_table=False))
    settings = RunSettings(period_s=10.0)
    plan = plan_control(rig, ["B"], settings)
    decider = Decider(plan)
    old = PidParams(
        kc=settings.lamp_trim_kc,
        ti_s=settings.trim_integral_s,
        out_min=-0.5 * LAMP_FULL,
        out_max=0.5 * LAMP_FULL,
    )
    state = PidState()
    rng = np.random.default_rng(7)
    for k in range(60):
        measured = float(250.0 + 40.0 * rng.standard_normal())
        step = pid_step(state, old, measured, 300.0, 10.0)
        state = step.state
        want = min(100.0, max(0.0, 100.0 * (300.0 + step.output) / LAMP_FULL))
        reading = ChamberReadings(chamber="B", t_s=10.0 * k, temperature_c=20.0, par=measured)
        target = Target(temperature_c=None, par=300.0, flow_cm_s=None)
        got = decider.decide({"B": reading}, {"B": target}, 10.0 * k).chambers["B"].outputs
        if k > 0:  # the first tick starts the interlocks (outputs safe)
            assert got.lamp_pct == pytest.approx(want, rel=1e-9, abs=1e-9)


# -------------------------------------------------------------- simulated runs


def run_hold(tmp_path: Path, tag: str, rig: str) -> tuple[float, float, float, float]:
    """Run the 40 min hold; return the true PAR and flow (mean of the last 20 min) and the
    mean absolute PAR error of the first 5 min after the lamp warmed (s 120–420)."""
    folder = tmp_path / tag
    folder.mkdir()
    (folder / "rig.toml").write_text(rig)
    (folder / "protocol.toml").write_text(PROTOCOL)
    run = SimulatedRun.prepare(
        folder / "protocol.toml",
        folder / "rig.toml",
        folder / "run.sqlite",
        settings=RunSettings(period_s=10.0),
    )
    par: list[tuple[float, float]] = []
    flow: list[float] = []

    async def watch(clock: Clock) -> None:
        for t_s in np.arange(120.0, 2400.0, 30.0):
            await clock.sleep_until(float(t_s))
            truth = run.rack.truth("B")
            par.append((float(t_s), truth.par))
            if t_s >= 1200.0:
                flow.append(truth.flow_cm_s)

    async def main(clock: Clock) -> None:
        async with asyncio.TaskGroup() as group:
            group.create_task(watch(clock))
            await run.loop().run()

    try:
        run_with_clock(run.clock, main)
    finally:
        if not run.writer.closed:
            run.writer.close()
    late = [p for t, p in par if t >= 1200.0]
    early = [abs(p - 300.0) for t, p in par if t <= 420.0]
    return float(np.mean(late)), float(np.mean(flow)), float(np.mean(early)), len(late)


def test_without_sensors_the_tables_hit_the_setpoints_and_the_straight_line_misses(
    tmp_path: Path,
) -> None:
    par_line, flow_line, _, n = run_hold(
        tmp_path, "line", rig_text(lamp_table=False, pump_table=False, faults=BLIND)
    )
    par_table, flow_table, _, _ = run_hold(
        tmp_path, "table", rig_text(lamp_table=True, pump_table=True, faults=BLIND)
    )
    assert n >= 30
    # straight line: 3/7 of full drive on the saturating lamp gives
    # 700 · (1 − e^(−1.2·3/7))/(1 − e^(−1.2)) ≈ 403, a third too much; the pump loses its
    # dead band: 14 · (28.6 − 8)/92 ≈ 3.1 cm/s
    assert par_line == pytest.approx(sim_lamp(100 * 300 / LAMP_FULL), rel=0.02)
    assert par_line > 380.0
    assert flow_line == pytest.approx(sim_pump(100 * 4.0 / PUMP_FULL), abs=0.1)
    assert flow_line < 3.3  # 22 % short of 4 cm/s
    # the measured tables: within 1 % (10 % steps of the lamp curve, interpolated)
    assert par_table == pytest.approx(300.0, rel=0.01)
    assert flow_table == pytest.approx(4.0, rel=0.02)


def test_with_the_par_sensor_both_settle_and_the_table_starts_closer(tmp_path: Path) -> None:
    par_line, _, early_line, _ = run_hold(
        tmp_path, "line", rig_text(lamp_table=False, pump_table=False)
    )
    par_table, _, early_table, _ = run_hold(
        tmp_path, "table", rig_text(lamp_table=True, pump_table=False)
    )
    # the PI trim removes the straight line's error in the end ...
    assert par_line == pytest.approx(300.0, rel=0.02)
    assert par_table == pytest.approx(300.0, rel=0.02)
    # ... but starts from it: the first minutes are far off without the table
    assert early_table < 0.5 * early_line


def test_the_example_rig_tables_load_and_reach_their_top(repo_root: Path) -> None:
    text = (repo_root / "rigs" / "saltmarrow-rack8.toml").read_text(encoding="utf-8")
    rig = load_model(repo_root / "rigs" / "saltmarrow-rack8.toml", Rig)
    raw = tomllib.loads(text)
    tables = [c for c in raw["chambers"] if "drive_pct_par" in c.get("lamp", {})]
    assert len(tables) >= 2
    for chamber in rig.chambers:
        curve = chamber.lamp.curve()
        if curve is not None:  # the lamp must reach the PAR the chamber promises
            assert curve.full >= chamber.limits.max_par
    assert any(c.pump.curve() is not None for c in rig.chambers)


def test_the_calibration_notes_tables_are_valid_and_the_snippet_prints_the_lamp_table(
    repo_root: Path,
) -> None:
    text = (repo_root / "hardware-notes" / "calibration.md").read_text(encoding="utf-8")
    (code,) = re.findall(r"```python lamp-table\n(.*?)```", text, flags=re.DOTALL)
    lamp_toml, pump_toml = re.findall(r"```toml (?:lamp|pump)-table\n(.*?)```", text, re.DOTALL)
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(code, "<calibration.md>", "exec"), {})
    printed = tomllib.loads(out.getvalue())["drive_pct_par"]
    lamp = ChamberLamp.model_validate(tomllib.loads(lamp_toml)["chambers"]["lamp"])
    pump = ChamberPump.model_validate(tomllib.loads(pump_toml)["chambers"]["pump"])
    assert [list(r) for r in lamp.drive_pct_par or []] == printed
    curve = pump.curve()
    assert curve is not None and curve.drive_pct[0] == 8.0  # the dead band's edge
    # the notes' figure for the straight line on that pump: 4 of 20 cm/s is 20 % drive
    assert curve.value_at(100.0 * 4.0 / curve.full) == pytest.approx(2.6, abs=0.05)
