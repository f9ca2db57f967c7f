"""Oxygen solubility (Garcia & Gordon 1992) and unit conversions (SCOR WG 142)."""

from __future__ import annotations

import itertools

import gsw
import numpy as np
import pytest

from controller.errors import SquallError
from controller.science import oxygen

# Temperature scale: squall applies the Garcia & Gordon equation to the temperature as given
# (as the SCOR WG 142 code does). gsw.O2sol_SP_pt takes ITS-90 and converts it to IPTS-68 with
# t68 = 1.00024·t90 before the same equation, so the two agree exactly when gsw is handed
# t/1.00024 (gsw-python 3.6 docstring and GSW-C source).
PT68 = 1.00024


def test_garcia_gordon_check_value() -> None:
    # Garcia & Gordon (1992) check value, Benson & Krause µmol/kg coefficients: 274.610 µmol/kg
    # at t = 10 °C, S = 35 (the equation's own temperature; see PT68 above)
    assert oxygen.solubility(10.0, 35.0) == pytest.approx(274.610, abs=5e-4)
    # the same paper's mL/L fit: 6.315 mL/L
    assert oxygen.solubility(10.0, 35.0, unit="mL/L") == pytest.approx(6.315, abs=5e-4)
    # gsw agrees to rounding when given the matching temperature (source: gsw 3.6)
    assert oxygen.solubility(10.0, 35.0) == pytest.approx(gsw.O2sol_SP_pt(35.0, 10.0 / PT68))


def test_agrees_with_gsw_over_the_working_range() -> None:
    temps, sals = np.meshgrid(np.linspace(0.0, 35.0, 36), np.linspace(0.0, 40.0, 41))
    ours = oxygen.solubility(temps, sals)
    # source: gsw.O2sol_SP_pt (TEOS-10 GSW 3.6), potential temperature on the IPTS-68 footing
    theirs = gsw.O2sol_SP_pt(sals, temps / PT68)
    assert np.max(np.abs(ours / theirs - 1.0)) < 1e-4  # 0.01 %
    # Feeding gsw the same number on the ITS-90 footing instead moves it by < 0.02 %.
    shifted = gsw.O2sol_SP_pt(sals, temps)
    assert 1e-4 < np.max(np.abs(ours / shifted - 1.0)) < 2e-4


@pytest.mark.parametrize(
    ("sp", "pt", "expected"),
    [
        # GSW documentation examples of O2sol_SP_pt, µmol/kg (GSW-R docs; gsw-python agrees)
        (34.7118, 28.8099, 194.6825431692940),
        (34.8472, 10.2262, 273.5652832698713),
    ],
)
def test_gsw_documentation_examples(sp: float, pt: float, expected: float) -> None:
    assert oxygen.solubility(pt * PT68, sp) == pytest.approx(expected, rel=1e-9)


# Table at 1 atm (reference notes §1 [computed]): S, t, µmol/kg (GG92 B&K fit), µmol/L and mg/L
# (µmol/kg·ρ/1000 with TEOS-10 ρ at p = 0, and ·0.0319988), mL/L (GG92 B&K mL/L fit).
TABLE = [
    (0, 0, 457.006, 456.93, 14.621, 10.2314),
    (0, 10, 352.864, 352.76, 11.288, 7.8987),
    (0, 20, 284.652, 284.14, 9.092, 6.3623),
    (0, 30, 237.252, 236.22, 7.559, 5.2893),
    (35, 0, 347.903, 357.68, 11.445, 8.0101),
    (35, 10, 274.610, 282.01, 9.024, 6.3148),
    (35, 20, 225.537, 231.12, 7.396, 5.1748),
    (35, 30, 190.740, 194.88, 6.236, 4.3634),
]


@pytest.mark.parametrize(("sal", "temp", "umol_kg", "umol_l", "mg_l", "ml_l"), TABLE)
def test_solubility_table(
    sal: float, temp: float, umol_kg: float, umol_l: float, mg_l: float, ml_l: float
) -> None:
    kg = oxygen.solubility(temp, sal)
    assert kg == pytest.approx(umol_kg, abs=5e-4)
    assert oxygen.solubility(temp, sal, unit="mL/L") == pytest.approx(ml_l, abs=5e-5)
    # the table's µmol/L and mg/L columns are the µmol/kg fit times density
    as_l = oxygen.convert(kg, "umol/kg", "umol/L", temp_c=temp, salinity=sal)
    assert as_l == pytest.approx(umol_l, abs=5e-3)
    assert oxygen.convert(kg, "umol/kg", "mg/L", temp_c=temp, salinity=sal) == pytest.approx(
        mg_l, abs=5e-4
    )
    # squall's per-volume solubility comes from the mL/L fit (SCOR WG 142); the two fits of the
    # Benson & Krause data agree within 0.015 %
    assert oxygen.solubility(temp, sal, unit="umol/L") == pytest.approx(umol_l, rel=1.5e-4)


def benson_krause_mg_l(temp_c: np.ndarray, sal: np.ndarray) -> np.ndarray:
    """Benson & Krause (1984) mg/L equation in its Standard Methods / USGS form."""
    t = temp_c + 273.15
    ln_c = (
        -139.34411
        + 1.575701e5 / t
        - 6.642308e7 / t**2
        + 1.243800e10 / t**3
        - 8.621949e11 / t**4
        - sal * (0.017674 - 10.754 / t + 2140.7 / t**2)
    )
    return np.exp(ln_c)


def test_mg_per_litre_matches_the_benson_krause_equation() -> None:
    temps, sals = np.meshgrid(np.linspace(0.0, 30.0, 31), np.linspace(0.0, 35.0, 8))
    # source: Benson & Krause (1984), mg/L form (Standard Methods 4500-O, from memory)
    expected = benson_krause_mg_l(temps, sals)
    via_density = oxygen.convert(
        oxygen.solubility(temps, sals), "umol/kg", "mg/L", temp_c=temps, salinity=sals
    )
    per_volume = oxygen.solubility(temps, sals, unit="mg/L")
    # At the table's points (S 0 and 35, t 0 to 30 by 10) the µmol/kg fit times TEOS-10
    # density is within 0.001 mg/L (reference notes §1).
    ends = ((sals == 0.0) | (sals == 35.0)) & (temps % 10.0 == 0.0)
    assert np.max(np.abs(via_density - expected)[ends]) < 1e-3
    # Everywhere, both routes (and the WG 142 per-volume fit) stay within 0.003 mg/L (0.03 %):
    # the mg/L equation's salinity term is simpler than Garcia & Gordon's.
    assert np.max(np.abs(via_density - expected)) < 3e-3
    assert np.max(np.abs(per_volume - expected)) < 3e-3


@pytest.mark.parametrize(
    ("temp", "sal", "expected"),
    # Weiss & Price (1980) water vapour pressure, mbar (reference notes §1, SCOR WG 142 code)
    [(0.0, 0.0, 6.1048), (20.0, 0.0, 23.363), (10.0, 35.0, 12.0347)],
)
def test_water_vapour_pressure(temp: float, sal: float, expected: float) -> None:
    assert oxygen.water_vapour_pressure_hpa(temp, sal) == pytest.approx(expected, abs=5e-4)


def test_barometric_correction() -> None:
    # C*(p) = C*·(p − pH2O)/(1013.25 − pH2O)  (SCOR WG 142 code)
    vapour = oxygen.water_vapour_pressure_hpa(15.0, 30.0)
    for unit in ("umol/kg", "umol/L", "mg/L", "mL/L"):
        ratio = oxygen.solubility(15.0, 30.0, 95.0, unit=unit) / oxygen.solubility(
            15.0, 30.0, unit=unit
        )
        assert ratio == pytest.approx((950.0 - vapour) / (1013.25 - vapour), rel=1e-12)
    assert oxygen.solubility(15.0, 30.0, 95.0, unit="%sat") == pytest.approx(100.0, rel=1e-12)
    assert oxygen.solubility(15.0, 30.0, 95.0, unit="hPa") == pytest.approx(
        0.20946 * (950.0 - vapour), rel=1e-12
    )


@pytest.mark.parametrize(
    ("value", "source", "target", "temp", "sal", "pressure_kpa", "expected", "tol"),
    [
        # SCOR WG 142 (Bittig et al. 2018) O2stoO2c / O2ctoO2p checks (reference notes §2)
        (100.0, "%sat", "umol/L", 10.0, 35.0, 101.325, 282.015, 5e-4),
        (100.0, "%sat", "umol/L", 20.0, 0.0, 101.325, 284.138, 5e-4),
        (90.0, "%sat", "umol/L", 10.0, 35.0, 100.0, 250.455, 5e-4),
        (100.0, "%sat", "hPa", 10.0, 35.0, 101.325, 209.715, 5e-4),
        (100.0, "%sat", "hPa", 20.0, 0.0, 101.325, 207.342, 5e-4),
        # constants: 22.3916 L/mol, 31.9988 g/mol (SCOR WG 142)
        (1.0, "mL/L", "umol/L", 10.0, 35.0, 101.325, 44.6596, 5e-5),
        (1.0, "mg/L", "umol/L", 10.0, 35.0, 101.325, 31.2512, 5e-5),
        (1.0, "mL/L", "mg/L", 10.0, 35.0, 101.325, 1.42905, 5e-6),
        # µmol/kg = µmol/L / ρ, ρ = 1026.955 kg m-3 at 10 °C, S = 35 (TEOS-10, gsw 3.6)
        (274.610, "umol/kg", "umol/L", 10.0, 35.0, 101.325, 274.610 * 1.026955, 5e-4),
    ],
)
def test_wg142_conversions(
    value: float,
    source: str,
    target: str,
    temp: float,
    sal: float,
    pressure_kpa: float,
    expected: float,
    tol: float,
) -> None:
    got = oxygen.convert(
        value, source, target, temp_c=temp, salinity=sal, pressure_kpa=pressure_kpa
    )
    assert isinstance(got, float)
    assert got == pytest.approx(expected, abs=tol)


def test_density_is_teos10_at_the_surface() -> None:
    # source: gsw 3.6, rho_t_exact(SR_from_SP(S), t, 0); reference notes §8
    assert oxygen.seawater_density_kg_m3(10.0, 35.0) == pytest.approx(1026.955, abs=2e-3)
    assert oxygen.seawater_density_kg_m3(20.0, 0.0) == pytest.approx(998.208, abs=2e-3)


def test_every_unit_pair_round_trips_on_arrays() -> None:
    rng = np.random.default_rng(4)
    temps = rng.uniform(0.0, 35.0, 50)
    sals = rng.uniform(0.0, 40.0, 50)
    pressures = rng.uniform(90.0, 105.0, 50)
    start = rng.uniform(50.0, 400.0, 50)  # µmol/L
    for source, target in itertools.permutations(oxygen.UNITS, 2):
        amount = oxygen.convert(
            start, "umol/L", source, temp_c=temps, salinity=sals, pressure_kpa=pressures
        )
        there = oxygen.convert(
            amount, source, target, temp_c=temps, salinity=sals, pressure_kpa=pressures
        )
        back = oxygen.convert(
            there, target, source, temp_c=temps, salinity=sals, pressure_kpa=pressures
        )
        np.testing.assert_allclose(back, amount, rtol=1e-12, err_msg=f"{source} -> {target}")


def test_saturation_reads_as_100_percent() -> None:
    for unit in ("umol/L", "mg/L", "mL/L", "hPa"):
        sat = oxygen.solubility(12.0, 31.0, 99.0, unit=unit)
        assert oxygen.convert(
            sat, unit, "%sat", temp_c=12.0, salinity=31.0, pressure_kpa=99.0
        ) == pytest.approx(100.0, rel=1e-12)
    # the µmol/kg fit is a separate fit of the same data: within 0.015 %
    kg = oxygen.solubility(12.0, 31.0, 99.0)
    pct = oxygen.convert(kg, "umol/kg", "%sat", temp_c=12.0, salinity=31.0, pressure_kpa=99.0)
    assert pct == pytest.approx(100.0, abs=0.015)


def test_broadcasting_scalars_and_missing_values() -> None:
    out = oxygen.convert(
        np.array([100.0, 50.0, np.nan]), "%sat", "umol/L", temp_c=10.0, salinity=35.0
    )
    assert out.shape == (3,)
    assert out[1] == pytest.approx(out[0] / 2) and np.isnan(out[2])
    grid = oxygen.solubility(np.array([[5.0], [15.0]]), np.array([0.0, 20.0, 35.0]))
    assert grid.shape == (2, 3)
    assert isinstance(oxygen.solubility(10.0, 35.0), float)
    assert oxygen.convert(1.0, "mL/L", "umol/L", temp_c=10.0, salinity=[30.0, 35.0]).shape == (2,)


def test_unit_spellings_and_unknown_units() -> None:
    assert oxygen.normalise_unit("µmol/l") == "umol/L"
    assert oxygen.normalise_unit(" ML/L ") == "mL/L"
    assert oxygen.normalise_unit("mbar") == "hPa"
    with pytest.raises(SquallError) as info:
        oxygen.convert(1.0, "ppm", "umol/L", temp_c=10.0, salinity=35.0)
    assert info.value.field == "from_unit"
    assert "'ppm'" in info.value.message
    for unit in oxygen.UNITS:
        assert unit in info.value.message
    with pytest.raises(SquallError, match="unknown oxygen unit 'mol'"):
        oxygen.solubility(10.0, 35.0, unit="mol")


@pytest.mark.parametrize(
    ("temp", "sal", "pressure_kpa", "field"),
    [
        (60.0, 35.0, 101.325, "temp_c"),
        (10.0, -1.0, 101.325, "salinity"),
        (10.0, 35.0, 5.0, "pressure_kpa"),
    ],
)
def test_out_of_range_conditions_are_refused(
    temp: float, sal: float, pressure_kpa: float, field: str
) -> None:
    with pytest.raises(SquallError) as info:
        oxygen.solubility(temp, sal, pressure_kpa)
    assert info.value.field == field
