"""``squall o2 solubility`` and ``squall o2 convert``."""

from __future__ import annotations

import pytest

from controller.cli import main


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_solubility_prints_number_and_unit(capsys: pytest.CaptureFixture[str]) -> None:
    # Garcia & Gordon (1992) check value: 274.610 µmol/kg at 10 °C, S = 35
    code, out, _ = run(capsys, "o2", "solubility", "--temp-c", "10", "--salinity", "35")
    assert code == 0 and out == "274.610 umol/kg\n"


def test_solubility_in_other_units_and_pressures(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(
        capsys, "o2", "solubility", "--temp-c", "10", "--salinity", "35", "--unit", "mL/L"
    )
    assert code == 0 and out == "6.3148 mL/L\n"  # GG92 mL/L fit, 6.31477
    code, out, _ = run(
        capsys,
        "o2",
        "solubility",
        "--temp-c",
        "10",
        "--salinity",
        "35",
        "--pressure-kpa",
        "100",
        "--unit",
        "umol/L",
    )
    # 90 % at 1000 hPa is 250.455 µmol/L (SCOR WG 142 check), so 100 % is 250.455/0.9
    assert code == 0 and out.endswith(" umol/L\n")
    assert float(out.split()[0]) == pytest.approx(250.455 / 0.9, abs=1e-3)


def test_convert_prints_number_and_target_unit(capsys: pytest.CaptureFixture[str]) -> None:
    # SCOR WG 142 (Bittig et al. 2018): 100 % at 10 °C, S = 35 -> 282.015 µmol/L, pO2 209.715 hPa
    code, out, _ = run(
        capsys,
        "o2",
        "convert",
        "100",
        "%sat",
        "--to",
        "umol/L",
        "--temp-c",
        "10",
        "--salinity",
        "35",
    )
    assert code == 0 and out == "282.015 umol/L\n"
    code, out, _ = run(
        capsys, "o2", "convert", "100", "%sat", "--to", "hPa", "--temp-c", "10", "--salinity", "35"
    )
    assert code == 0 and out == "209.715 hPa\n"
    code, out, _ = run(
        capsys,
        "o2",
        "convert",
        "250.455",
        "umol/L",
        "--to",
        "%sat",
        "--temp-c",
        "10",
        "--salinity",
        "35",
        "--pressure-kpa",
        "100",
    )
    assert code == 0 and out == "90.00 %sat\n"


@pytest.mark.parametrize(
    "argv",
    [
        ["o2", "convert", "1", "ppm", "--to", "umol/L", "--temp-c", "10", "--salinity", "35"],
        ["o2", "convert", "1", "mg/L", "--to", "grains", "--temp-c", "10", "--salinity", "35"],
        ["o2", "solubility", "--temp-c", "10", "--salinity", "35", "--unit", "mol/m3"],
    ],
)
def test_bad_units_exit_2_and_list_the_valid_ones(
    capsys: pytest.CaptureFixture[str], argv: list[str]
) -> None:
    code, out, err = run(capsys, *argv)
    assert code == 2 and out == ""
    assert "unknown oxygen unit" in err and "umol/L, umol/kg, mg/L, mL/L, %sat, hPa" in err


def test_bad_conditions_and_missing_options_exit_2(capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = run(capsys, "o2", "solubility", "--temp-c", "99", "--salinity", "35")
    assert code == 2 and "--temp-c: temperature must be within" in err
    code, _, err = run(capsys, "o2", "solubility", "--temp-c", "10")
    assert code == 2 and "--salinity" in err
    code, _, err = run(
        capsys,
        "o2",
        "convert",
        "lots",
        "mg/L",
        "--to",
        "umol/L",
        "--temp-c",
        "1",
        "--salinity",
        "1",
    )
    assert code == 2 and "argument VALUE: invalid float value: 'lots'" in err
