"""P–I curves and temperature scaling of metabolic rates."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants

from controller.errors import SquallError
from controller.science import rates


def test_boltzmann_constant_is_codata_2018() -> None:
    # CODATA 2018 value as printed, 8.617333262e-5 eV/K (exact: k/e with both fixed by the
    # 2019 SI); source: scipy.constants, which agrees to the printed ten digits
    assert rates.BOLTZMANN_EV_PER_K == 8.617333262e-5
    value, unit, uncertainty = scipy.constants.physical_constants["Boltzmann constant in eV/K"]
    assert unit == "eV K^-1" and uncertainty == 0.0
    assert rates.BOLTZMANN_EV_PER_K == pytest.approx(value, rel=1e-10)
    assert rates.BOLTZMANN_EV_PER_K == pytest.approx(
        scipy.constants.k / scipy.constants.e, rel=1e-10
    )


def test_pi_curves_at_the_saturation_irradiance() -> None:
    # Pmax = 10, α = 0.1 -> Ik = 100; at I = Ik: tanh form 7.61594 (Jassby & Platt 1976),
    # exponential form 6.32121 (Webb et al. 1974); reference notes §5 [computed]
    assert float(rates.jassby_platt(100.0, 10.0, 100.0)) == pytest.approx(7.61594, abs=5e-6)
    assert float(rates.webb(100.0, 10.0, 100.0)) == pytest.approx(6.32121, abs=5e-6)


def test_platt_curve_and_its_optimum() -> None:
    # Platt et al. (1980), Ps = 10, α = 0.1, β = 0.01: Pm 7.15267 at Im 239.790 and
    # P(100) = 5.71966; reference notes §5 [computed]
    assert float(rates.platt(100.0, 10.0, 0.1, 0.01)) == pytest.approx(5.71966, abs=5e-6)
    pm, im = rates.platt_optimum(10.0, 0.1, 0.01)
    assert pm == pytest.approx(7.15267, abs=5e-6)
    assert im == pytest.approx(239.790, abs=5e-4)
    grid = np.linspace(0.0, 2000.0, 200_001)
    curve = rates.platt(grid, 10.0, 0.1, 0.01)
    assert grid[np.argmax(curve)] == pytest.approx(im, abs=0.01)
    assert float(rates.platt(im, 10.0, 0.1, 0.01)) == pytest.approx(pm, rel=1e-12)


def test_pi_curves_share_the_initial_slope_and_saturate() -> None:
    low = np.array([0.0, 0.01])
    for curve in (rates.jassby_platt(low, 10.0, 100.0), rates.webb(low, 10.0, 100.0)):
        assert curve[0] == 0.0
        assert curve[1] / 0.01 == pytest.approx(0.1, rel=1e-4)  # α = Pmax/Ik
    assert float(rates.jassby_platt(5000.0, 10.0, 100.0)) == pytest.approx(10.0)
    assert float(rates.webb(5000.0, 10.0, 100.0)) == pytest.approx(10.0)
    # Without photoinhibition Platt's curve is Webb's with Ik = Ps/α.
    par = np.array([0.0, 50.0, 400.0])
    np.testing.assert_allclose(rates.platt(par, 10.0, 0.1, 0.0), rates.webb(par, 10.0, 100.0))


def test_negative_light_counts_as_dark_and_bad_parameters_are_refused() -> None:
    np.testing.assert_array_equal(rates.jassby_platt(np.array([-3.0, 0.0]), 10.0, 100.0), [0, 0])
    with pytest.raises(SquallError, match="ik"):
        rates.jassby_platt(10.0, 10.0, 0.0)
    with pytest.raises(SquallError, match="beta"):
        rates.platt(10.0, 10.0, 0.1, -0.01)


def test_q10_check_values() -> None:
    # Q10 = (R2/R1)^(10/(T2−T1)): 2 -> 3 over 5 °C gives 2.25; Q10 = 2 over +5 °C gives √2
    # (reference notes §5, arithmetic)
    assert float(rates.q10_from_rates(2.0, 3.0, 10.0, 15.0)) == pytest.approx(2.25)
    assert float(rates.q10_factor(25.0, 20.0, 2.0)) == pytest.approx(1.41421, abs=5e-6)
    np.testing.assert_allclose(
        rates.q10_factor(np.array([10.0, 20.0, 30.0]), 20.0, 2.0), [0.5, 1, 2]
    )
    with pytest.raises(SquallError):
        rates.q10_from_rates(2.0, 3.0, 10.0, 10.0)
    with pytest.raises(SquallError):
        rates.q10_from_rates(0.0, 3.0, 10.0, 15.0)


@pytest.mark.parametrize(
    ("t_ref", "temp", "ea", "ratio"),
    [
        # Boltzmann–Arrhenius rate ratios, reference notes §5 [computed]; activation energies
        # 0.65 eV (respiration, Gillooly et al. 2001) and 0.32 eV (photosynthesis, Allen et
        # al. 2005)
        (20.0, 30.0, 0.65, 2.33678),
        (20.0, 30.0, 0.32, 1.51871),
        (15.0, 20.0, 0.65, 1.56280),
        (15.0, 20.0, 0.32, 1.24583),
    ],
)
def test_arrhenius_ratios(t_ref: float, temp: float, ea: float, ratio: float) -> None:
    assert float(rates.arrhenius_factor(temp, t_ref, ea)) == pytest.approx(ratio, abs=5e-6)
    assert float(rates.arrhenius_factor(t_ref, temp, ea)) == pytest.approx(1.0 / ratio, rel=5e-6)


def test_q10_equivalent_of_an_activation_energy() -> None:
    # Equivalent Q10 = exp(10E/(k·T(T+10))) (reference notes §5)
    temps = np.array([0.0, 15.0, 20.0])
    np.testing.assert_allclose(
        rates.q10_equivalent(0.65, temps), rates.arrhenius_factor(temps + 10.0, temps, 0.65)
    )
    assert float(rates.q10_equivalent(0.65, 20.0)) == pytest.approx(2.33678, abs=5e-6)
    expected = math.exp(10 * 0.32 / (rates.BOLTZMANN_EV_PER_K * 293.15 * 303.15))
    assert float(rates.q10_equivalent(0.32, 20.0)) == pytest.approx(expected, rel=1e-12)
    with pytest.raises(SquallError, match="absolute zero"):
        rates.arrhenius_factor(-300.0, 20.0, 0.65)


def test_warming_favours_respiration_over_photosynthesis() -> None:
    # López-Urrutia et al. (2006): respiration (0.65 eV) rises faster than photosynthesis
    # (0.32 eV), so the P:R ratio falls with warming.
    temps = np.linspace(10.0, 30.0, 5)
    ratio = rates.arrhenius_factor(temps, 20.0, 0.32) / rates.arrhenius_factor(temps, 20.0, 0.65)
    assert np.all(np.diff(ratio) < 0.0)
