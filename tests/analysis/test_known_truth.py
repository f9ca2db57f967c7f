"""Known-truth recovery: a simulated run with set biology, analysed back.

The simulator's community follows the design's biology contract (Jassby & Platt 1976 light
curve with Boltzmann–Arrhenius temperature scaling); the analysis must return its GPP, R,
activation energies, crossing temperatures and light curve within stated tolerances:
rates ±3 % (optode noise 0.3 µmol L⁻¹ at 30 s ticks, settling 5 min ≫ optode t90 40 s),
activation energies ±0.05 eV, crossing temperatures ±0.5 °C of the analytic crossing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from controller.analysis import AnalysisSettings, analyze_log, daily_metabolism
from controller.science.rates import arrhenius_factor

from ._synth import (
    AREA_M2,
    CONTROL_BIO,
    TREATED_BIO,
    VOLUME_L,
    WindowTruth,
    analytic_crossing_c,
)
from .conftest import TruthLog

BIOLOGY = {"C1": CONTROL_BIO, "C2": CONTROL_BIO, "C3": TREATED_BIO, "C4": TREATED_BIO}
GROUPS = {"ambient": CONTROL_BIO, "treated": TREATED_BIO}
RATE_TOL = 0.03
EA_TOL_EV = 0.05
CROSSING_TOL_C = 0.5


def _truth_of(log: TruthLog, window: pd.Series) -> WindowTruth:
    found = [
        t
        for t in log.truths
        if t.chamber == window["chamber"] and abs(t.start_s - window["start_s"]) < 1e-6
    ]
    assert len(found) == 1
    return found[0]


def test_every_window_is_found_fitted_and_usable(truth_log: TruthLog) -> None:
    windows = truth_log.analysis.windows
    assert len(windows) == len(truth_log.truths) == 80
    assert windows["usable"].all()
    # only the r² warning may appear, on windows near the compensation point or blanks
    assert set(";".join(windows["flags"]).split(";")) <= {"", "low_r2"}
    settle = AnalysisSettings().settle_s
    assert (windows["fit_start_s"] >= windows["start_s"] + settle).all()
    assert (windows["fit_end_s"] < windows["end_s"]).all()


def test_gpp_and_r_within_three_percent_of_the_simulator(truth_log: TruthLog) -> None:
    analysis = truth_log.analysis
    windows = analysis.windows.set_index("window")
    checked = 0
    for pair in analysis.pairs.itertuples(index=False):
        if pair.chamber not in BIOLOGY or pair.phase == "light-curve":
            continue
        light = _truth_of(truth_log, windows.loc[pair.light_window])
        dark = _truth_of(truth_log, windows.loc[pair.dark_window])
        assert pair.gpp_umol_m2_h == pytest.approx(light.gpp_umol_m2_h, rel=RATE_TOL)
        assert pair.r_umol_m2_h == pytest.approx(dark.resp_umol_m2_h, rel=RATE_TOL)
        checked += 1
    assert checked == 4 * 5  # four chambers, five temperatures


def test_respiration_of_every_dark_window_within_three_percent(truth_log: TruthLog) -> None:
    resp = truth_log.analysis.respiration
    windows = truth_log.analysis.windows.set_index("window")
    for row in resp[resp["chamber"].isin(list(BIOLOGY))].itertuples(index=False):
        truth = _truth_of(truth_log, windows.loc[row.window])
        assert row.r_umol_m2_h == pytest.approx(truth.resp_umol_m2_h, rel=RATE_TOL)
        assert row.temperature_c == pytest.approx(truth.temperature_c, abs=0.05)


@pytest.mark.parametrize("unit", ["C1", "C2", "C3", "C4", "ambient", "treated"])
def test_activation_energies_within_0_05_ev(truth_log: TruthLog, unit: str) -> None:
    bio = BIOLOGY.get(unit) or GROUPS[unit]
    fits = truth_log.analysis.temperature_fits.set_index(["unit", "rate"])
    r_fit = fits.loc[(unit, "r")]
    gpp_fit = fits.loc[(unit, "gpp")]
    assert r_fit["ea_ev"] == pytest.approx(bio["ea_resp_ev"], abs=EA_TOL_EV)
    assert gpp_fit["ea_ev"] == pytest.approx(bio["ea_gpp_ev"], abs=EA_TOL_EV)
    assert gpp_fit["par_level"] == pytest.approx(600.0)
    assert r_fit["n_temperatures"] == 6 and gpp_fit["n_temperatures"] == 5
    # the reported Q10 is the one the fitted energy implies over [mid − 5, mid + 5] °C
    mid = 0.5 * (gpp_fit["t_min_c"] + gpp_fit["t_max_c"])
    expected = float(arrhenius_factor(mid + 5.0, mid - 5.0, gpp_fit["ea_ev"]))
    assert gpp_fit["q10"] == pytest.approx(expected, rel=1e-9)
    assert gpp_fit["q10_ci_low"] < gpp_fit["q10"] < gpp_fit["q10_ci_high"]


@pytest.mark.parametrize("unit", ["C1", "C2", "C3", "C4", "ambient", "treated"])
def test_crossing_temperature_near_the_analytic_crossing(truth_log: TruthLog, unit: str) -> None:
    bio = BIOLOGY.get(unit) or GROUPS[unit]
    truth_c = analytic_crossing_c(bio, 600.0)
    row = truth_log.analysis.crossings.set_index("unit").loc[unit]
    assert row["t_cross_c"] == pytest.approx(truth_c, abs=CROSSING_TOL_C)
    assert row["r_overtakes_above"] and not row["extrapolated"]
    assert row["ci_low_c"] < row["t_cross_c"] < row["ci_high_c"]
    if unit in GROUPS:  # pooled replicates: the interval also covers the set value
        assert row["ci_low_c"] <= truth_c <= row["ci_high_c"]


@pytest.mark.parametrize("unit", ["ambient", "treated"])
def test_light_curve_recovers_pmax_and_ik(truth_log: TruthLog, unit: str) -> None:
    bio = GROUPS[unit]
    row = truth_log.analysis.light_fits.set_index("unit").loc[unit]
    assert row["phase"] == "light-curve" and row["n_levels"] == 5
    pmax = bio["gpp_max_umol_m2_h"] * float(arrhenius_factor(20.0, 20.0, bio["ea_gpp_ev"]))
    assert row["pmax_umol_m2_h"] == pytest.approx(pmax, rel=RATE_TOL)
    assert row["ik_umol_m2_s"] == pytest.approx(bio["ik_umol_m2_s"], rel=0.05)


def test_treatment_minus_control_respiration_per_phase(truth_log: TruthLog) -> None:
    diffs = truth_log.analysis.differences
    r = diffs[diffs["rate"] == "r"].set_index("phase")
    assert set(r.index) == {"t14", "t18", "t22", "t26", "t30", "light-curve"}
    for phase, row in r.iterrows():
        truths = [t for t in truth_log.truths if t.phase == phase and t.light == "dark"]
        treated = np.mean([t.resp_umol_m2_h for t in truths if t.chamber in ("C3", "C4")])
        control = np.mean([t.resp_umol_m2_h for t in truths if t.chamber in ("C1", "C2")])
        assert row["difference"] == pytest.approx(treated - control, rel=0.1, abs=10.0)
        assert row["ci_low"] <= treated - control <= row["ci_high"]
        assert (row["n_treatment"], row["n_control"]) == (2, 2)


def test_daily_metabolism_follows_the_measured_photoperiod(truth_log: TruthLog) -> None:
    daily = truth_log.analysis.daily.set_index(["chamber", "phase"])
    row = daily.loc[("C1", "t22")]
    # light for 100 of every 200 minutes in the temperature phases: 12 h a day
    assert row["photoperiod_h"] == pytest.approx(12.0)
    expected = daily_metabolism(row["ncp_umol_m2_h"], row["r_umol_m2_h"], 12.0)
    assert row["gpp_mmol_m2_d"] == pytest.approx(expected.gpp_mmol_m2_d)
    assert row["ncp_mmol_m2_d"] == pytest.approx(expected.ncp_mmol_m2_d)
    assert row["p_to_r"] == pytest.approx(expected.p_to_r)


def test_blank_correction_subtracts_the_blank_slope(truth_log: TruthLog) -> None:
    plain = truth_log.analysis.windows.set_index("window")
    with_blank = analyze_log(truth_log.path, AnalysisSettings(blank="B1"))
    corrected = with_blank.windows.set_index("window")
    assert (corrected.loc[corrected["chamber"] == "B1", "role"] == "blank").all()
    samples = corrected[corrected["role"] == "sample"]
    assert (samples["blank_window"] >= 0).all()
    for window, row in samples.iterrows():
        blank = plain.loc[row["blank_window"]]
        assert blank["chamber"] == "B1" and blank["light"] == row["light"]
        shift = -blank["slope_umol_l_h"] * VOLUME_L / AREA_M2
        assert row["flux_umol_m2_h"] == pytest.approx(plain.loc[window, "flux_umol_m2_h"] + shift)
    assert "B1" not in set(
        analyze_log(truth_log.path, AnalysisSettings(blank="B1")).pairs["chamber"]
    )


def test_results_do_not_depend_on_the_chunk_size(truth_log: TruthLog) -> None:
    calls: list[tuple[int, int]] = []
    small = analyze_log(truth_log.path, chunk_rows=997, progress=lambda d, t: calls.append((d, t)))
    total = truth_log.analysis.info.samples
    assert calls[0] == (0, total) and calls[-1] == (total, total)
    assert len(calls) == 1 + -(-total // 997)
    big = truth_log.analysis
    np.testing.assert_allclose(
        small.windows["slope_umol_l_h"], big.windows["slope_umol_l_h"], rtol=1e-9
    )
    numeric = big.quality.select_dtypes("number").columns
    pd.testing.assert_frame_equal(small.quality[numeric], big.quality[numeric], rtol=1e-9)
    assert small.rows_read == big.rows_read == big.info.samples
