"""Every fault produces the symptom a controller would see."""

from __future__ import annotations

import pydantic
import pytest
from sim_rigs import chamber, rack, rig, thermal

from controller.errors import SquallError
from simulator import Fault, FaultKind, Rack, SensorNoReply


def _two_chambers(**top: object) -> Rack:
    warm = {"thermal": thermal(ua_w_k=5.0, heater_max_w=200.0, chiller_max_w=200.0)}
    return rack(chamber("C1", sim=warm), chamber("C2", sim=warm), **top)


def test_dropout_scheduled_in_the_rig_raises_no_reply_for_its_window() -> None:
    faults = [
        {"kind": "dropout", "chamber": "C1", "sensor": "optode", "at_s": 600.0, "duration_s": 120.0}
    ]
    r = _two_chambers(sim={"faults": faults})
    r.advance(599.0)
    r.read_optode("C1")
    r.advance(1.0)
    with pytest.raises(SensorNoReply) as caught:
        r.read_optode("C1")
    assert (caught.value.chamber_id, caught.value.sensor) == ("C1", "optode")
    r.read_optode("C2")  # the other chamber still answers
    r.read_temperature("C1")  # and so does C1's probe
    r.advance(120.0)
    r.read_optode("C1")


def test_stuck_sensor_repeats_its_value_while_the_water_warms() -> None:
    r = _two_chambers()
    r.set_outputs("C1", heater_pct=100.0)
    r.advance(600.0)
    r.inject(Fault(kind=FaultKind.STUCK, chamber="C1", sensor="temperature"))
    frozen = r.read_temperature("C1")
    r.advance(3600.0)
    assert r.read_temperature("C1") == frozen
    assert r.truth("C1").temperature_c > frozen + 1.0
    assert r.clear_faults(FaultKind.STUCK, "C1") == 1
    assert r.read_temperature("C1") == pytest.approx(r.truth("C1").temperature_c, abs=1e-6)


def test_spikes_jump_by_the_magnitude_now_and_then() -> None:
    r = _two_chambers()
    r.inject(Fault(kind="spikes", chamber="C1", sensor="temperature", magnitude=3.0))
    deviations = [r.read_temperature("C1") - 20.0 for _ in range(500)]
    spikes = [d for d in deviations if d != 0.0]
    assert all(abs(abs(d) - 3.0) < 1e-9 for d in spikes)
    assert 50 < len(spikes) < 150  # about 20 % of readings
    assert any(d > 0 for d in spikes) and any(d < 0 for d in spikes)


def test_drift_grows_by_magnitude_per_hour() -> None:
    r = _two_chambers()
    r.inject(Fault(kind="drift", chamber="C2", sensor="temperature", magnitude=-0.25))
    r.advance(4 * 3600.0)
    assert r.read_temperature("C2") - r.truth("C2").temperature_c == pytest.approx(-1.0)
    assert r.read_temperature("C1") == pytest.approx(r.truth("C1").temperature_c)


def test_heater_stuck_on_runs_the_temperature_away() -> None:
    r = _two_chambers()
    r.inject(Fault(kind="heater-stuck-on", chamber="C1", at_s=60.0))
    r.set_outputs("C1", heater_pct=0.0)
    r.advance(12 * 3600.0)
    assert r.outputs("C1").heater_pct == 100.0
    assert r.read_temperature("C1") > 30.0  # room is 20 °C, the command is 0 %
    assert r.read_temperature("C2") == pytest.approx(20.0)


def test_heater_stuck_off_ignores_the_command() -> None:
    r = _two_chambers()
    r.inject(Fault(kind="heater-stuck-off", chamber="C1"))
    r.set_outputs("C1", heater_pct=100.0)
    r.set_outputs("C2", heater_pct=100.0)
    r.advance(3 * 3600.0)
    assert r.outputs("C1").heater_pct == 0.0
    assert r.read_temperature("C1") == pytest.approx(20.0)
    assert r.read_temperature("C2") > 25.0


def test_chiller_failure_gives_no_cooling() -> None:
    r = _two_chambers()
    r.inject(Fault(kind="chiller-failure", chamber="C1"))
    for cid in ("C1", "C2"):
        r.set_outputs(cid, chiller_pct=100.0)
    r.advance(3 * 3600.0)
    assert r.outputs("C1").chiller_pct == 0.0
    assert r.read_temperature("C1") == pytest.approx(20.0)
    assert r.read_temperature("C2") < 15.0


def test_pump_failure_stops_flow_and_closes_the_incubation() -> None:
    r = _two_chambers()
    r.set_outputs("C1", pump_pct=80.0)
    assert r.read_flow("C1") > 0.0
    r.inject(Fault(kind="pump-failure", chamber="C1", duration_s=600.0))
    assert r.read_flow("C1") == 0.0
    assert not r.truth("C1").incubation_open
    r.advance(600.0)
    assert r.read_flow("C1") > 0.0


def test_leak_trips_the_level_switch_after_the_alarm_loss() -> None:
    # 10 L chamber, alarm at 5 % = 0.5 L, leaking 2 L/h: trips after 15 min.
    r = _two_chambers()
    r.inject(Fault(kind="leak", chamber="C1", magnitude=2.0))
    r.advance(14 * 60.0)
    assert r.read_level_ok("C1")
    r.advance(2 * 60.0)
    assert not r.read_level_ok("C1")
    assert r.read_level_ok("C2")
    assert r.truth("C1").water_volume_l == pytest.approx(10.0 - 2.0 * 16 / 60)


def test_comm_timeout_silences_one_device() -> None:
    r = _two_chambers()
    r.inject(Fault(kind="comm-timeout", chamber="C1", sensor="modbus", duration_s=30.0))
    assert not r.comm_ok("C1", "modbus")
    assert r.comm_ok("C1", "optode") and r.comm_ok("C2", "modbus")
    with pytest.raises(SensorNoReply):
        r.read_temperature("C1")
    with pytest.raises(SensorNoReply):
        r.read_par("C1")
    r.read_optode("C1")
    r.advance(30.0)
    assert r.comm_ok("C1", "modbus")


def test_power_loss_turns_everything_off_and_silences_every_device() -> None:
    r = _two_chambers()
    for cid in ("C1", "C2"):
        r.set_outputs(cid, heater_pct=100.0, lamp_pct=50.0, pump_pct=50.0)
    r.advance(3600.0)
    warm = r.truth("C1").temperature_c
    r.inject(Fault(kind="power-loss", duration_s=7200.0))
    assert not r.powered
    for cid in ("C1", "C2"):
        assert r.outputs(cid) == r.outputs(cid).__class__(
            heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0
        )
        assert not r.comm_ok(cid, "modbus") and not r.comm_ok(cid, "optode")
        with pytest.raises(SensorNoReply):
            r.read_optode(cid)
    r.advance(7200.0)
    assert r.powered
    assert r.truth("C1").temperature_c < warm  # cooled while the power was off
    assert r.outputs("C1").heater_pct == 100.0  # commands take effect again


def test_faults_are_validated() -> None:
    with pytest.raises(pydantic.ValidationError, match="needs sensor"):
        Fault(kind="stuck", chamber="C1")
    with pytest.raises(pydantic.ValidationError, match="needs a magnitude"):
        Fault(kind="leak", chamber="C1")
    with pytest.raises(pydantic.ValidationError, match="takes no sensor"):
        Fault(kind="leak", chamber="C1", sensor="flow", magnitude=1.0)
    with pytest.raises(SquallError) as caught:
        rig(chamber("C1"), sim={"faults": [{"kind": "power-loss", "chamber": "C7"}]})
    assert caught.value.field == "sim.faults.0.chamber"
    with pytest.raises(ValueError, match="C7"):
        _two_chambers().inject(Fault(kind="power-loss", chamber="C7"))


def test_open_ended_fault_lasts_until_cleared() -> None:
    r = _two_chambers()
    r.inject(Fault(kind="dropout", chamber="C2", sensor="flow"))
    r.advance(86400.0)
    with pytest.raises(SensorNoReply):
        r.read_flow("C2")
    assert [f.kind for f in r.active_faults()] == [FaultKind.DROPOUT]
    assert r.clear_faults() == 1
    assert r.read_flow("C2") == 0.0
    assert r.active_faults() == ()
