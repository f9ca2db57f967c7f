"""Rig files with simulator parameters: the example rig is valid, mistakes are located."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from controller.errors import SquallError
from controller.files import load_model
from controller.rig import FaultKind, Rig
from simulator import Rack

EXAMPLE = Path(__file__).resolve().parents[2] / "rigs" / "saltmarrow-rack8.toml"


def test_example_rig_parses_with_tomllib_and_validates() -> None:
    data = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    rig = Rig.model_validate(data)
    assert [c.id for c in rig.chambers] == [f"C{i}" for i in range(1, 9)]
    assert {c.bath for c in rig.chambers[:4]} == {"lagoon-bath"}
    assert all(c.bath is None and c.sim.thermal is not None for c in rig.chambers[4:])
    assert rig.baths[0].thermal.heater_max_w == 1500.0
    assert rig.sim.faults[0].kind is FaultKind.DROPOUT
    assert rig.chambers[0].sim.biology.ea_resp_ev == 0.65


def test_example_rig_loads_through_the_located_loader_and_runs() -> None:
    rig = load_model(EXAMPLE, Rig)
    rack = Rack(rig)
    for cid in rack.chamber_ids:
        rack.set_outputs(cid, heater_pct=40.0, lamp_pct=50.0, pump_pct=30.0)
    rack.advance(6 * 3600.0)
    bath = {round(rack.truth(c).temperature_c, 12) for c in ("C1", "C2", "C3", "C4")}
    assert len(bath) == 1
    assert rack.truth("C5").temperature_c != rack.truth("C1").temperature_c


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "rig.toml"
    path.write_text(text, encoding="utf-8")
    return path


BATH_RIG = """\
name = "two in a bath"

[[baths]]
id = "tank"

[[chambers]]
id = "C1"
water_volume_l = 10.0
sediment_area_m2 = 0.05
bath = "tank"

[[chambers]]
id = "C2"
water_volume_l = 10.0
sediment_area_m2 = 0.05
bath = "{bath}"
"""


def test_undefined_bath_is_reported_at_its_line(tmp_path: Path) -> None:
    with pytest.raises(SquallError) as caught:
        load_model(_write(tmp_path, BATH_RIG.format(bath="tnak")), Rig)
    assert caught.value.line == 16
    assert caught.value.field == "chambers.1.bath"
    assert "'tnak' is not defined" in caught.value.message


def test_thermal_table_in_a_bath_chamber_is_refused(tmp_path: Path) -> None:
    text = BATH_RIG.format(bath="tank") + "\n[chambers.sim.thermal]\nua_w_k = 5.0\n"
    with pytest.raises(SquallError) as caught:
        load_model(_write(tmp_path, text), Rig)
    assert "[baths.thermal]" in caught.value.message
    assert caught.value.field is not None and caught.value.field.startswith("chambers.1")


def test_misspelt_biology_key_gets_a_suggestion(tmp_path: Path) -> None:
    text = BATH_RIG.format(bath="tank") + "\n[chambers.sim.biology]\nresp_umol_m2_hr = 5.0\n"
    with pytest.raises(SquallError) as caught:
        load_model(_write(tmp_path, text), Rig)
    assert caught.value.line == 19
    assert "resp_umol_m2_h" in caught.value.message


def test_unused_bath_and_duplicate_ids_are_refused() -> None:
    base = {"water_volume_l": 1.0, "sediment_area_m2": 0.01}
    with pytest.raises(SquallError) as unused:
        Rig.model_validate(
            {"name": "x", "baths": [{"id": "tank"}], "chambers": [{"id": "C1", **base}]}
        )
    assert unused.value.field == "baths.0.id"
    with pytest.raises(SquallError) as twice:
        Rig.model_validate({"name": "x", "chambers": [{"id": "C1", **base}, {"id": "C1", **base}]})
    assert twice.value.field == "chambers.1.id"


def test_bath_named_without_definitions_uses_defaults() -> None:
    base = {"water_volume_l": 5.0, "sediment_area_m2": 0.01, "bath": "tank"}
    rig = Rig.model_validate(
        {"name": "x", "chambers": [{"id": "C1", **base}, {"id": "C2", **base}]}
    )
    rack = Rack(rig)
    rack.set_outputs("C1", heater_pct=100.0)
    rack.advance(3600.0)
    assert rack.truth("C1").temperature_c == rack.truth("C2").temperature_c > 20.0
