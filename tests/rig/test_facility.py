"""Facility tables of a rig file: shared plant, lamp budget, calibration dates, maintenance.

Each bad file must be refused with the line and dotted field of the offending value."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from controller.cli.cmd_check import load_rig
from controller.errors import SquallError
from controller.rig import PlantKind

EXAMPLE = Path(__file__).parents[2] / "rigs" / "saltmarrow-rack8.toml"

HEAD = """name = "toy"

[[baths]]
id = "bath-a"
water_volume_l = 50.0

[[chambers]]
id = "A1"
water_volume_l = 10.0
sediment_area_m2 = 0.04
bath = "bath-a"

[[chambers]]
id = "A2"
water_volume_l = 10.0
sediment_area_m2 = 0.04
bath = "bath-a"

[[chambers]]
id = "B1"
water_volume_l = 10.0
sediment_area_m2 = 0.04
"""


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "rig.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _line_of(text: str, needle: str) -> int:
    return next(i for i, line in enumerate(text.splitlines(), 1) if needle in line)


def test_example_rig_describes_its_facility() -> None:
    rig = load_rig(EXAMPLE)
    assert rig.thermal_nodes() == {
        "lagoon-bath": ("C1", "C2", "C3", "C4"),
        "C5": ("C5",),
        "C6": ("C6",),
        "C7": ("C7",),
        "C8": ("C8",),
    }
    (chiller,) = rig.plants
    assert chiller.kind is PlantKind.CHILLER
    assert set(chiller.serves) == set(rig.thermal_nodes())
    assert rig.power.lamp_budget_w == 720.0
    assert all(c.lamp.rated_w == 120.0 for c in rig.chambers)
    assert rig.maintenance.daily_check_at == dt.time(9, 0)
    assert rig.chamber("C3").calibration.optode_on == dt.date(2026, 11, 24)


def test_plant_serving_a_bath_member_is_refused_at_its_line(tmp_path: Path) -> None:
    text = (
        HEAD
        + """
[[plants]]
id = "chiller-1"
kind = "chiller"
capacity_w = 800.0
serves = ["bath-a", "A2"]
"""
    )
    with pytest.raises(SquallError) as err:
        load_rig(_write(tmp_path, text))
    assert err.value.field == "plants.0.serves.1"
    assert err.value.line == _line_of(text, "serves =")
    assert "'A2' is not a thermal node" in err.value.message
    assert "B1, bath-a" in err.value.message


def test_node_on_two_chillers_is_refused(tmp_path: Path) -> None:
    text = (
        HEAD
        + """
[[plants]]
id = "chiller-1"
kind = "chiller"
capacity_w = 800.0
serves = ["bath-a"]

[[plants]]
id = "chiller-2"
kind = "chiller"
capacity_w = 800.0
serves = ["B1", "bath-a"]
"""
    )
    with pytest.raises(SquallError) as err:
        load_rig(_write(tmp_path, text))
    assert err.value.field == "plants.1.serves.1"
    assert "already served by chiller 'chiller-1'" in err.value.message


def test_a_chiller_and_a_heater_may_share_a_node(tmp_path: Path) -> None:
    text = (
        HEAD
        + """
[[plants]]
id = "chiller-1"
kind = "chiller"
capacity_w = 800.0
serves = ["bath-a", "B1"]

[[plants]]
id = "boiler-1"
kind = "heater"
capacity_w = 900.0
serves = ["bath-a", "B1"]
"""
    )
    rig = load_rig(_write(tmp_path, text))
    assert [p.kind for p in rig.plants] == [PlantKind.CHILLER, PlantKind.HEATER]


def test_lamp_budget_needs_every_lamp_rating(tmp_path: Path) -> None:
    text = HEAD.replace('bath = "bath-a"\n', 'bath = "bath-a"\n\n[chambers.lamp]\nrated_w = 90.0\n')
    text += "\n[power]\nlamp_budget_w = 200.0\n"
    with pytest.raises(SquallError) as err:
        load_rig(_write(tmp_path, text))
    assert err.value.field == "chambers.2.lamp.rated_w"


def test_unknown_time_zone_is_refused_at_its_line(tmp_path: Path) -> None:
    text = HEAD + '\n[maintenance]\ntimezone = "Mars/Olympus"\n'
    with pytest.raises(SquallError) as err:
        load_rig(_write(tmp_path, text))
    assert err.value.field == "maintenance.timezone"
    assert err.value.line == _line_of(text, "Mars/Olympus")


def test_malformed_calibration_date_is_refused(tmp_path: Path) -> None:
    text = HEAD + '\n[chambers.calibration]\noptode_on = "last tuesday"\n'
    with pytest.raises(SquallError) as err:
        load_rig(_write(tmp_path, text))
    assert err.value.field == "chambers.2.calibration.optode_on"


def test_max_par_above_the_lamp_table_is_refused(tmp_path: Path) -> None:
    text = HEAD + (
        "\n[chambers.limits]\nmax_par = 900.0\n"
        "\n[chambers.lamp]\ndrive_pct_par = [[0.0, 0.0], [50.0, 420.0], [100.0, 700.0]]\n"
    )
    with pytest.raises(SquallError) as err:
        load_rig(_write(tmp_path, text))
    assert err.value.field == "chambers.2.limits.max_par"
    assert err.value.line == _line_of(text, "max_par = 900.0")
    assert "gives at 100 % drive (700)" in err.value.message
    ok = load_rig(_write(tmp_path, text.replace("max_par = 900.0", "max_par = 700.0")))
    assert ok.chamber("B1").limits.max_par == 700.0
