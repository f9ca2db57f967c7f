"""O2 slopes from running sums agree with reference least-squares implementations."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from controller.analysis import SlopeSums, fit_o2_slope, fit_sums, window_fits


def _window(seed: int, n: int = 90, curvature: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """An invented closed window: 30 s readings, −12 µmol L⁻¹ h⁻¹, optode-like noise."""
    rng = np.random.default_rng(seed)
    t_s = 1800.0 + 30.0 * np.arange(n)
    hours = (t_s - t_s[0]) / 3600.0
    o2 = 230.0 - 12.0 * hours + curvature * hours**2 + rng.normal(0.0, 0.3, n)
    return t_s, o2


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_slope_se_and_r2_match_scipy_linregress(seed: int) -> None:
    # Reference: scipy.stats.linregress (ordinary least squares).
    t_s, o2 = _window(seed)
    fit = fit_o2_slope(t_s, o2)
    ref = stats.linregress(t_s / 3600.0, o2)
    assert fit.n[0] == len(t_s)
    assert fit.slope_umol_l_h[0] == pytest.approx(ref.slope, rel=1e-9)
    assert fit.slope_se_umol_l_h[0] == pytest.approx(ref.stderr, rel=1e-7)
    assert fit.r2[0] == pytest.approx(ref.rvalue**2, rel=1e-9)


def test_quadratic_term_and_its_p_value_match_numpy_least_squares() -> None:
    # Reference: numpy.polyfit of degree 2 with its unscaled covariance; Student's t, n − 3.
    t_s, o2 = _window(4, curvature=6.0)
    fit = fit_o2_slope(t_s, o2)
    x = (t_s - t_s.mean()) / 3600.0
    coef, cov = np.polyfit(x, o2, 2, cov="unscaled")
    resid = o2 - np.polyval(coef, x)
    s2 = float(resid @ resid) / (len(x) - 3)
    t = coef[0] / np.sqrt(s2 * cov[0, 0])
    assert fit.quad_umol_l_h2[0] == pytest.approx(coef[0], rel=1e-7)
    assert fit.quad_p[0] == pytest.approx(2 * stats.t.sf(abs(t), len(x) - 3), rel=1e-6)
    assert fit.quad_p[0] < 1e-6


def test_nan_readings_are_left_out() -> None:
    t_s, o2 = _window(5)
    holed = o2.copy()
    holed[[3, 40, 41]] = np.nan
    keep = np.isfinite(holed)
    assert fit_o2_slope(t_s, holed).slope_umol_l_h[0] == pytest.approx(
        fit_o2_slope(t_s[keep], o2[keep]).slope_umol_l_h[0], rel=1e-12
    )


def test_too_few_readings_give_nan_not_an_error() -> None:
    one = fit_o2_slope([0.0], [230.0])
    assert one.n[0] == 1 and np.isnan(one.slope_umol_l_h[0])
    two = fit_o2_slope([0.0, 3600.0], [230.0, 220.0])
    assert two.slope_umol_l_h[0] == pytest.approx(-10.0)
    assert np.isnan(two.slope_se_umol_l_h[0]) and np.isnan(two.quad_p[0])


def test_sums_added_in_chunks_equal_one_pass() -> None:
    t_s, o2 = _window(6)
    x = (t_s - t_s.mean()) / 3600.0
    y = o2 - o2[0]
    whole = SlopeSums(2)
    whole.add(np.zeros(len(x), dtype=np.intp), x, y)
    parts = SlopeSums(2)
    for chunk in np.array_split(np.arange(len(x)), 7):
        parts.add(np.zeros(len(chunk), dtype=np.intp), x[chunk], y[chunk])
    np.testing.assert_allclose(parts.sums, whole.sums, rtol=1e-12, atol=1e-12)
    assert np.isnan(fit_sums(parts.sums).slope_umol_l_h[1])  # the empty second window


def test_window_fit_skips_settling_open_rows_and_other_chambers() -> None:
    t_s = np.arange(0.0, 3600.0, 30.0)
    o2 = 250.0 - 20.0 * t_s / 3600.0
    o2[t_s < 300.0] = 260.0  # transient that the settling time must hide
    samples = pd.DataFrame(
        {
            "run_s": np.concatenate([t_s, t_s]),
            "chamber": ["A"] * len(t_s) + ["B"] * len(t_s),
            "phase": "p",
            "temperature_c": 20.0,
            "temperature_setpoint_c": 20.0,
            "par": 0.0,
            "par_setpoint": 0.0,
            "o2_umol_l": np.concatenate([o2, np.full(len(t_s), 100.0)]),
            "o2_sat_pct": 100.0,
            "incubation": ["closed"] * len(t_s) + ["closed"] * len(t_s),
        }
    )
    samples.loc[(samples["chamber"] == "A") & (samples["run_s"] >= 3000.0), "incubation"] = "open"
    windows = pd.DataFrame(
        {"chamber": ["A"], "light": ["dark"], "start_s": [0.0], "end_s": [3600.0],
         "end_reason": ["max_duration"]}
    )  # fmt: skip
    table = window_fits(samples, windows, settle_s=300.0)
    row = table.iloc[0]
    assert row["slope_umol_l_h"] == pytest.approx(-20.0, rel=1e-9)
    assert row["fit_start_s"] == 300.0 and row["fit_end_s"] == 2970.0
    assert row["n"] == (3000 - 300) // 30
