"""Temperature gains from the rig file, and the heater-equivalent split of the PID output.

- ``[chambers.control]`` gains win over the SIMC gains derived from the thermal description,
  and a simulated run really uses them: proportional-only gains leave the steady offset the
  heat balance predicts, the SIMC gains (with integral action) none.
- With a chiller four times the heater (1200 W against 300 W), a cooling step settles
  quietly when the chiller's drive is scaled to heater watts, and limit-cycles between
  heater and chiller when the chiller's own % is the PID output (four times the loop gain
  the gains were tuned for).
"""

from __future__ import annotations

import dataclasses
import logging
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from controller.clock import Clock, run_with_clock
from controller.control import simc
from controller.files import load_model
from controller.rig import Rig
from controller.runtime import RunSettings, SimulatedRun, node_model, plan_control
from controller.runtime._settings import GainSource  # not re-exported by controller.runtime yet
from controller.storage import RunLogReader

pytestmark = pytest.mark.timeout(120)

RIG = """name = "gain test rack"
[sim]
room_temperature_c = {room_c}
physics_step_s = 1.0
seed = 5

[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0

[chambers.limits]
min_temperature_c = 5.0
max_temperature_c = 30.0
max_ramp_c_per_h = 60.0

[chambers.sim]
initial_temperature_c = {initial_c}

[chambers.sim.sensors]
temperature_noise_c = 0.01
temperature_tau_s = 10.0

[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = {heater_w}
chiller_max_w = {chiller_w}
dead_time_s = 20.0
{control}"""


def protocol(*holds: tuple[float, float]) -> str:
    """A protocol of temperature holds, (minutes, °C) each."""
    text = """format = "squall-protocol/1"
title = "Temperature holds"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"
[groups.all]
role = "treatment"
chambers = ["B"]
"""
    for k, (minutes, value) in enumerate(holds):
        text += f"""
[[phases]]
name = "hold{k}"
duration = "{minutes:g}min"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = {value} }} ]
"""
    return text


def rig_text(
    *,
    control: str = "",
    room_c: float = 18.0,
    initial_c: float = 22.0,
    heater_w: float = 400.0,
    chiller_w: float = 300.0,
) -> str:
    return RIG.format(
        control=control, room_c=room_c, initial_c=initial_c, heater_w=heater_w, chiller_w=chiller_w
    )


def load(tmp_path: Path, text: str) -> Rig:
    path = tmp_path / "rig.toml"
    path.write_text(text)
    return load_model(path, Rig)


def run(
    tmp_path: Path, tag: str, rig: str, proto: str, *, scaled: bool = True
) -> tuple[SimulatedRun, pd.DataFrame]:
    """Run a protocol on the simulated rig (10 s ticks); return the run and B's samples.

    ``scaled=False`` drives the chiller with the PID's own % (the split before the chiller
    was scaled to heater watts), with the same gains.
    """
    folder = tmp_path / tag
    folder.mkdir()
    (folder / "rig.toml").write_text(rig)
    (folder / "protocol.toml").write_text(proto)
    sim = SimulatedRun.prepare(
        folder / "protocol.toml",
        folder / "rig.toml",
        folder / "run.sqlite",
        settings=RunSettings(period_s=10.0),
    )
    if not scaled:
        nodes = tuple(
            dataclasses.replace(
                n, chiller_ratio=1.0, pid=dataclasses.replace(n.pid, out_min=-100.0)
            )
            for n in sim.plan.nodes
        )
        sim = dataclasses.replace(sim, plan=dataclasses.replace(sim.plan, nodes=nodes))

    async def main(clock: Clock) -> None:
        del clock
        await sim.loop().run()

    try:
        run_with_clock(sim.clock, main)
    finally:
        if not sim.writer.closed:
            sim.writer.close()
    with RunLogReader(sim.writer.path) as reader:
        return sim, reader.samples("B")


# -------------------------------------------------------------------------- the plan


def test_rig_gains_win_over_simc_and_track_at_a_quarter_of_ti(tmp_path: Path) -> None:
    rig = load(tmp_path, rig_text(control="[chambers.control]\nkc = 40.0\nti_s = 600.0\n"))
    node = plan_control(rig, ["B"], RunSettings(period_s=10.0)).nodes[0]
    assert node.gains is GainSource.RIG
    assert (node.pid.kc, node.pid.ti_s, node.pid.td_s) == (40.0, 600.0, 0.0)
    assert node.pid.tracking_time_s == 150.0  # Ti / 4 when not given
    rig = load(
        tmp_path,
        rig_text(control="[chambers.control]\nkc = 40.0\nti_s = 600.0\ntracking_time_s = 90.0\n"),
    )
    assert plan_control(rig, ["B"], RunSettings()).nodes[0].pid.tracking_time_s == 90.0
    rig = load(tmp_path, rig_text(control="[chambers.control]\nkc = 4.0\nti_s = inf\n"))
    pid = plan_control(rig, ["B"], RunSettings()).nodes[0].pid
    assert not pid.has_integral and pid.tracking_time_s is None


def test_without_rig_gains_the_plan_keeps_the_simc_gains(tmp_path: Path) -> None:
    rig = load(tmp_path, rig_text())
    settings = RunSettings(period_s=10.0)
    node = plan_control(rig, ["B"], settings).nodes[0]
    model = node_model(rig, ["B"], settings.period_s)
    gains = simc(model, model.theta_s)  # SIMC with τc = θ (Skogestad 2003)
    assert node.gains is GainSource.SIMC
    assert (node.pid.kc, node.pid.ti_s) == (gains.kc, gains.ti_s)
    assert node.pid.tracking_time_s == pytest.approx(2 * model.theta_s)
    assert node.pid.out_min == pytest.approx(-75.0)  # full cooling: 300 W in heater watts


def test_the_plan_logs_where_the_gains_come_from(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    with caplog.at_level(logging.INFO, logger="controller.runtime._settings"):
        plan_control(load(tmp_path, rig_text()), ["B"], RunSettings())
        control = "[chambers.control]\nkc = 40.0\nti_s = 600.0\nperiod_s = 60.0\n"
        plan_control(load(tmp_path, rig_text(control=control)), ["B"], RunSettings())
    text = caplog.text
    assert "SIMC on the rig's thermal description" in text
    assert "rig file [chambers.control]" in text
    assert "tuned for a 60 s tick" in text  # the default run ticks every 10 s


@pytest.mark.parametrize(("heater_w", "chiller_w"), [(300.0, 1200.0), (400.0, 300.0)])
def test_the_split_gives_the_same_watts_per_percent_on_both_sides(
    tmp_path: Path, heater_w: float, chiller_w: float
) -> None:
    rig = load(tmp_path, rig_text(heater_w=heater_w, chiller_w=chiller_w))
    node = plan_control(rig, ["B"], RunSettings()).nodes[0]
    ratio = chiller_w / heater_w
    assert node.chiller_ratio == ratio and node.pid.out_min == pytest.approx(-100.0 * ratio)
    assert node.split(-100.0 * ratio, 2.0) == (0.0, pytest.approx(100.0))  # full cooling
    assert node.split(100.0, 2.0) == (100.0, 0.0)
    assert node.split(-0.5, 2.0) == (0.0, 0.0) == node.split(0.5, 2.0)

    def watts(u: float) -> float:
        heater, chiller = node.split(u, 2.0)
        return heater * heater_w / 100.0 - chiller * chiller_w / 100.0

    for u in (20.0, 40.0, 60.0):  # away from the dead band and from saturation
        assert (watts(u + 5.0) - watts(u)) == pytest.approx(watts(-u) - watts(-u - 5.0))


# ----------------------------------------------------------------- simulated runs


def test_a_run_uses_the_rig_gains(tmp_path: Path) -> None:
    """Proportional-only rig gains hold the water where the heat balance says: the heat
    lost to the room, UA·(T − T_room), equals the heater's share of Kc·(r − T) past the dead
    band; the SIMC gains integrate the offset away."""
    proto = protocol((150.0, 22.0))
    kc = 4.0
    _, p_only = run(
        tmp_path, "p", rig_text(control=f"[chambers.control]\nkc = {kc}\nti_s = inf\n"), proto
    )
    _, derived = run(tmp_path, "simc", rig_text(), proto)
    ua, room, r, db = 8.0, 18.0, 22.0, 2.0
    b = 400.0 / (100.0 - db)  # heater W per % of output past the dead band
    expected = (ua * room + b * (kc * r - db)) / (ua + b * kc)  # ≈ 20.35 °C
    late = p_only.t_s >= 7200.0
    assert p_only.temperature_c[late].mean() == pytest.approx(expected, abs=0.05)
    assert derived.temperature_c[derived.t_s >= 7200.0].mean() == pytest.approx(22.0, abs=0.03)


def test_a_strong_chiller_settles_a_cooling_step_only_when_scaled(tmp_path: Path) -> None:
    """Heater 300 W, chiller 1200 W, room 28 °C (the chiller works all the time at 19 °C):
    step 24 → 19 °C. Measured on this rig: scaled, the last 50 min vary by the probe noise
    (sd ≈ 0.012 °C) with the chiller steady near 6 % and the heater off; unscaled, the loop
    has four times the gain it was tuned for and cycles (sd ≈ 0.05 °C, the chiller swinging
    between 0 and about 20 % with the heater cutting in)."""
    rig = rig_text(room_c=28.0, initial_c=24.0, heater_w=300.0, chiller_w=1200.0)
    proto = protocol((40.0, 24.0), (100.0, 19.0))
    scaled_run, scaled = run(tmp_path, "scaled", rig, proto)
    _, plain = run(tmp_path, "plain", rig, proto, scaled=False)
    assert scaled_run.plan.nodes[0].chiller_ratio == 4.0
    tail = {name: s[s.t_s >= 5400.0] for name, s in (("scaled", scaled), ("plain", plain))}
    sd = {name: float(np.std(t.temperature_c - 19.0)) for name, t in tail.items()}
    heater_ticks = {name: int((t.heater_pct > 0).sum()) for name, t in tail.items()}
    assert sd["scaled"] < 0.02 and abs(float(tail["scaled"].temperature_c.mean()) - 19.0) < 0.01
    assert heater_ticks["scaled"] == 0
    assert float(tail["scaled"].chiller_pct.max() - tail["scaled"].chiller_pct.min()) < 5.0
    assert sd["plain"] > 2.5 * sd["scaled"]
    assert heater_ticks["plain"] > 10  # heater and chiller take turns
    assert float(tail["plain"].chiller_pct.max() - tail["plain"].chiller_pct.min()) > 10.0
