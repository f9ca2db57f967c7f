"""Formula checks: closed-chamber flux, daily metabolism, Q10 and Boltzmann–Arrhenius, the
crossing temperature, light levels and the Jassby & Platt fit on exact data."""

from __future__ import annotations

import math

import numpy as np
import pytest

from controller.analysis import (
    areal_flux,
    crossing_temperature,
    daily_metabolism,
    fit_arrhenius,
    fit_light_response,
    inverse_temperature_ev,
    light_levels,
)
from controller.science.rates import arrhenius_factor, jassby_platt, q10_from_rates

K_EV = 8.617333262e-5  # Boltzmann constant, eV/K (CODATA 2018, exact)


def test_closed_chamber_flux_check_values() -> None:
    # Closed-chamber flux F = b·V/A (from memory; the usual benthic-chamber method) and
    # GPP = NCP + R; check example recomputed by hand: V 5 L, A 0.05 m², +20 and −8 µmol L⁻¹
    # h⁻¹ give NCP 2.0, R 0.8 and GPP 2.8 mmol O2 m⁻² h⁻¹.
    ncp = float(areal_flux(20.0, 5.0, 0.05))
    r = -float(areal_flux(-8.0, 5.0, 0.05))
    assert ncp == pytest.approx(2000.0)
    assert r == pytest.approx(800.0)
    assert ncp + r == pytest.approx(2800.0)


def test_blank_slope_is_subtracted_before_scaling() -> None:
    # F = (b_sample − b_blank)·V/A (from memory): a blank drifting +0.5 µmol L⁻¹ h⁻¹
    # removes 0.5·100 = 50 µmol m⁻² h⁻¹.
    assert float(areal_flux(20.0, 5.0, 0.05, blank_slope_umol_l_h=0.5)) == pytest.approx(1950.0)


def test_daily_metabolism_check_values() -> None:
    # Daily rates from the photoperiod (GPP_d = GPP_h·h, R_d = R_h·24,
    # NCP_d = NCP_h·h − R_h·(24 − h), P:R = GPP_d/R_d); check example recomputed by hand
    # with NCP 2.0 and R 0.8 mmol m⁻² h⁻¹ over 12 h: 33.6, 19.2 and 14.4 mmol m⁻² d⁻¹, 1.75.
    daily = daily_metabolism(2000.0, 800.0, 12.0)
    assert daily.gpp_mmol_m2_d == pytest.approx(33.6)
    assert daily.r_mmol_m2_d == pytest.approx(19.2)
    assert daily.ncp_mmol_m2_d == pytest.approx(14.4)
    assert daily.p_to_r == pytest.approx(1.75)


def test_daily_metabolism_refuses_a_day_longer_than_24_hours() -> None:
    with pytest.raises(ValueError, match="photoperiod_h"):
        daily_metabolism(2000.0, 800.0, 25.0)


def test_q10_definition_check_values() -> None:
    # Q10 = (R2/R1)^(10/(T2 − T1)) (standard definition, from memory): 2 → 3 over 5 °C
    # gives (3/2)^2 = 2.25 (recomputed by hand).
    assert float(q10_from_rates(2.0, 3.0, 20.0, 25.0)) == pytest.approx(2.25)


@pytest.mark.parametrize(
    ("ea_ev", "t1_c", "t2_c", "ratio"),
    [
        # Boltzmann–Arrhenius rate ratios (Gillooly et al. 2001 Science 293:2248 form;
        # values recomputed with numpy for 0.65 and 0.32 eV, Allen et al. 2005).
        (0.65, 20.0, 30.0, 2.33678),
        (0.32, 20.0, 30.0, 1.51871),
        (0.65, 15.0, 20.0, 1.56280),
        (0.32, 15.0, 20.0, 1.24583),
    ],
)
def test_arrhenius_fit_returns_the_energy_and_q10_of_exact_rates(
    ea_ev: float, t1_c: float, t2_c: float, ratio: float
) -> None:
    temps = np.linspace(t1_c, t2_c, 6)
    rates = 400.0 * arrhenius_factor(temps, 20.0, ea_ev)
    fit = fit_arrhenius(temps, rates, t_ref_c=20.0)
    assert fit is not None
    assert fit.ea_ev == pytest.approx(ea_ev, abs=1e-9)
    assert fit.rate_ref == pytest.approx(400.0, rel=1e-9)
    assert fit.ea_ci_low_ev <= ea_ev <= fit.ea_ci_high_ev
    assert float(fit.rate_at(t2_c)[()] / fit.rate_at(t1_c)[()]) == pytest.approx(ratio, rel=2e-5)
    if t2_c - t1_c == 10.0:
        # Equivalent Q10 = exp(10E/(k·T(T + 10))) over [T, T + 10] equals the rate ratio.
        assert fit.q10(t1_c)[0] == pytest.approx(ratio, rel=2e-5)


def test_arrhenius_fit_interval_matches_ordinary_least_squares() -> None:
    # The interval is OLS with Student's t (n − 2): compare with numpy's covariance.
    rng = np.random.default_rng(3)
    temps = np.repeat([14.0, 18.0, 22.0, 26.0, 30.0], 3)
    rates = 500.0 * arrhenius_factor(temps, 20.0, 0.6) * np.exp(rng.normal(0, 0.03, temps.size))
    fit = fit_arrhenius(temps, rates, t_ref_c=20.0, confidence=0.95)
    assert fit is not None
    u = inverse_temperature_ev(temps, 20.0)
    coef, cov = np.polyfit(u, np.log(rates), 1, cov="unscaled")
    resid = np.log(rates) - np.polyval(coef, u)
    s2 = float(resid @ resid) / (temps.size - 2)
    assert fit.ea_ev == pytest.approx(coef[0], rel=1e-10)
    assert fit.ea_se_ev == pytest.approx(math.sqrt(s2 * cov[0, 0]), rel=1e-8)
    assert fit.cov[0][1] == pytest.approx(s2 * cov[0, 1], rel=1e-8)
    t975 = 2.160368656461013  # Student's t, 0.975 quantile, 13 dof (scipy.stats.t.ppf)
    assert fit.ea_ci_high_ev - fit.ea_ev == pytest.approx(t975 * fit.ea_se_ev, rel=1e-9)


def test_arrhenius_fit_needs_three_positive_rates() -> None:
    assert fit_arrhenius([14.0, 18.0], [1.0, 2.0]) is None
    assert fit_arrhenius([14.0, 18.0, 22.0], [1.0, -2.0, 3.0]) is None
    assert fit_arrhenius([20.0, 20.0, 20.0], [1.0, 2.0, 3.0]) is None


def test_crossing_of_exact_curves_is_the_analytic_temperature() -> None:
    # GPP_ref·A(T; Eg) = R_ref·A(T; Er) at 1/T = 1/T_ref − k·ln(GPP_ref/R_ref)/(Er − Eg).
    temps = np.array([14.0, 18.0, 22.0, 26.0, 30.0])
    gpp = fit_arrhenius(temps, 547.0 * arrhenius_factor(temps, 20.0, 0.32))
    resp = fit_arrhenius(temps, 400.0 * arrhenius_factor(temps, 20.0, 0.65))
    assert gpp is not None and resp is not None
    crossing = crossing_temperature(gpp, resp)
    assert crossing is not None
    inv_t = 1.0 / 293.15 - K_EV * math.log(547.0 / 400.0) / (0.65 - 0.32)
    assert crossing.t_cross_c == pytest.approx(1.0 / inv_t - 273.15, abs=1e-9)
    assert crossing.r_overtakes_above
    assert not crossing.extrapolated
    # exact data: no scatter, so the interval collapses onto the estimate
    assert crossing.ci_high_c - crossing.ci_low_c == pytest.approx(0.0, abs=1e-6)


def test_crossing_interval_widens_with_scatter_and_is_none_for_parallel_curves() -> None:
    rng = np.random.default_rng(5)
    temps = np.repeat([14.0, 18.0, 22.0, 26.0, 30.0], 2)
    noise = np.exp(rng.normal(0, 0.05, (2, temps.size)))
    gpp = fit_arrhenius(temps, 547.0 * arrhenius_factor(temps, 20.0, 0.32) * noise[0])
    resp = fit_arrhenius(temps, 400.0 * arrhenius_factor(temps, 20.0, 0.65) * noise[1])
    assert gpp is not None and resp is not None
    crossing = crossing_temperature(gpp, resp)
    assert crossing is not None
    assert crossing.ci_low_c < crossing.t_cross_c < crossing.ci_high_c
    assert crossing.ci_high_c - crossing.ci_low_c > 0.2
    parallel = fit_arrhenius(temps, 300.0 * arrhenius_factor(temps, 20.0, 0.32))
    assert parallel is not None
    shifted = fit_arrhenius(temps, 200.0 * arrhenius_factor(temps, 20.0, 0.32))
    assert shifted is not None
    assert crossing_temperature(parallel, shifted) is None


def test_light_levels_cluster_within_five_percent() -> None:
    levels = light_levels([600.0, 602.0, 0.0, 0.5, 300.0, 620.0, np.nan], rel=0.05)
    assert levels[0] == levels[1] == levels[5] == pytest.approx(607.3, abs=0.05)
    assert levels[2] == levels[3] == pytest.approx(0.2, abs=0.05)
    assert levels[4] == 300.0
    assert np.isnan(levels[6])


def test_jassby_platt_fit_recovers_exact_parameters() -> None:
    # Jassby & Platt (1976) L&O 21:540: P = Pmax·tanh(I/Ik); Pmax 10, Ik 100 gives
    # P(100) = 7.61594 (REFERENCES P–I check, computed).
    assert float(jassby_platt(100.0, 10.0, 100.0)) == pytest.approx(7.61594, abs=1e-5)
    par = np.array([25.0, 50.0, 100.0, 200.0, 400.0, 800.0])
    fit = fit_light_response(par, jassby_platt(par, 550.0, 200.0))
    assert fit is not None
    assert fit.pmax == pytest.approx(550.0, rel=1e-6)
    assert fit.ik == pytest.approx(200.0, rel=1e-6)
    assert fit.alpha == pytest.approx(550.0 / 200.0, rel=1e-6)
    assert fit.n_levels == 6


def test_jassby_platt_fit_needs_three_light_levels() -> None:
    assert fit_light_response([100.0, 101.0, 400.0], [5.0, 5.1, 9.0]) is None
