"""What the decider keeps between ticks follows every change of its inputs.

The decider takes settings from the frozen plan once and keeps each actuator's feed-forward
drive with the setpoint it was computed for; these tests change a setpoint, inject a fault,
fail a write and acknowledge mid-run, and check each change shows at the very tick it
happens.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from controller.control import Condition, SafetyState
from controller.files import load_model
from controller.rig import Rig
from controller.runtime import ChamberReadings, RunSettings, plan_control
from controller.runtime._decide import Decider, Target

RIG = """name = "decider memory rack"
[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0
[chambers.limits]
min_temperature_c = 5.0
max_temperature_c = 30.0
max_par = 700.0
max_flow_cm_s = 14.0
[chambers.pump]
drive_pct_flow_cm_s = [[0.0, 0.0], [8.0, 0.0], [50.0, 6.4], [100.0, 14.0]]
"""


@pytest.fixture
def decider(tmp_path: Path) -> Decider:
    path = tmp_path / "rig.toml"
    path.write_text(RIG)
    rig = load_model(path, Rig)
    return Decider(plan_control(rig, ["B"], RunSettings(period_s=10.0)))


def reading(t_s: float, temperature_c: float = 20.0, **more: object) -> dict[str, ChamberReadings]:
    """B's readings without PAR and flow sensors (the lamp and pump run on feed-forward)."""
    fields: dict[str, object] = {"level_ok": True, "e_stop": False, "comm_ok": True}
    fields.update(more)
    return {"B": ChamberReadings(chamber="B", t_s=t_s, temperature_c=temperature_c, **fields)}  # type: ignore[arg-type]


def target(flow_cm_s: float | None, par: float | None = 350.0) -> dict[str, Target]:
    return {"B": Target(temperature_c=20.0, par=par, flow_cm_s=flow_cm_s)}


def test_a_changed_setpoint_gets_its_own_drive_at_once(decider: Decider) -> None:
    pump = decider.plan.chambers["B"].pump_curve
    lamp = decider.plan.chambers["B"].lamp_curve
    decider.decide(reading(0.0), target(4.0), 0.0)  # first tick: outputs safe
    seen = []
    for k, flow in enumerate([4.0, 4.0, 9.0, 9.0, 0.0, 4.0, None, 4.0], start=1):
        par = 100.0 * k
        outputs = decider.decide(reading(10.0 * k), target(flow, par), 10.0 * k).writes["B"]
        want_pump = 0.0 if flow is None else pump.drive_for(flow)
        assert outputs.pump_pct == want_pump
        assert outputs.lamp_pct == lamp.drive_for(par)
        seen.append(outputs.pump_pct)
    assert len(set(seen)) == 3 and seen[0] == seen[-1] > 8.0  # 4, 9 and off; 4 again


def test_a_fault_a_failed_write_and_an_acknowledge_show_at_their_tick(decider: Decider) -> None:
    for k in range(3):
        decision = decider.decide(reading(10.0 * k), target(4.0), 10.0 * k)
    assert decision.chambers["B"].safety is SafetyState.NORMAL
    flowing = decision.writes["B"].pump_pct
    # a probe reading beyond the over-temperature trip: forced safe on this very tick
    decision = decider.decide(reading(30.0, temperature_c=40.0), target(4.0), 30.0)
    assert decision.chambers["B"].alarm is Condition.OVER_TEMPERATURE
    safe = decider.plan.chambers["B"].interlocks.safe_outputs()
    assert decision.writes["B"] == safe and decider.stop_outputs("B") == safe
    # back in range, still latched; the operator's acknowledge releases the next tick
    decision = decider.decide(reading(40.0), target(4.0), 40.0)
    assert decision.chambers["B"].safety is SafetyState.TRIPPED
    decider.acknowledge("B", Condition.OVER_TEMPERATURE, 45.0)
    decision = decider.decide(reading(50.0), target(4.0), 50.0)
    assert decision.chambers["B"].safety is SafetyState.NORMAL
    assert decision.writes["B"].pump_pct == flowing
    # writes that stop arriving count as lost communication once the limit has passed
    limit_s = decider.plan.chambers["B"].interlocks.comm_loss_after_s
    decider.note_write("B", False)
    t_s = 50.0
    while t_s - 50.0 < limit_s:
        t_s += 10.0
        decision = decider.decide(reading(t_s), target(4.0), t_s)
    assert decision.chambers["B"].alarm is Condition.COMM_LOSS
    decider.note_write("B", True)
    decision = decider.decide(reading(t_s + 10.0), target(4.0), t_s + 10.0)
    assert decision.chambers["B"].alarm is None
    assert decision.writes["B"].pump_pct == flowing


def test_the_plan_the_decider_took_its_settings_from_cannot_be_replaced(
    decider: Decider,
) -> None:
    with pytest.raises(AttributeError):
        decider.plan = decider.plan  # type: ignore[misc]
