"""Two-point Stern–Volmer optode calibration and its inverse."""

from __future__ import annotations

import numpy as np
import pytest

from controller.errors import SquallError
from controller.science import optode, oxygen

C100 = 282.015  # µmol/L, air saturation at 10 °C, S = 35 (SCOR WG 142 check, reference notes §2)


def test_stern_volmer_lifetime_check() -> None:
    # Two-point Stern–Volmer, f = 1: τ0 = 60 µs, τ100 = 30 µs -> KSV = 3.54591e-3 L/µmol and
    # τ = 40 µs -> 141.008 µmol/L (reference notes §3 [computed])
    cal = optode.calibrate_two_point(60.0, 30.0, C100, kind="lifetime_us", temp_c=10.0)
    assert cal.ksv_l_per_umol == pytest.approx(3.54591e-3, abs=5e-9)
    # τ0/τ − 1 = 0.5 of the span's 1, so exactly C100/2 = 141.0075, quoted as 141.008
    assert optode.concentration_from_lifetime(cal, 40.0, 10.0) == pytest.approx(141.008, abs=6e-4)
    assert optode.concentration_from_lifetime(cal, 40.0, 10.0) == pytest.approx(C100 / 2, rel=1e-12)
    assert optode.concentration_from_lifetime(cal, 30.0, 10.0) == pytest.approx(C100)
    assert optode.concentration_from_lifetime(cal, 60.0, 10.0) == pytest.approx(0.0, abs=1e-12)


def test_non_quenchable_fraction_check() -> None:
    # Two-component model τ/τ0 = f/(1 + KSV·C) + (1 − f), f = 0.8 (Klimant et al. 1995):
    # KSV = 5.90985e-3, τ = 40 µs -> 120.864 µmol/L (reference notes §3 [computed])
    cal = optode.calibrate_two_point(
        60.0, 30.0, C100, kind="lifetime_us", temp_c=10.0, quenchable_fraction=0.8
    )
    assert cal.ksv_l_per_umol == pytest.approx(5.90985e-3, abs=5e-9)
    assert optode.concentration_from_lifetime(cal, 40.0, 10.0) == pytest.approx(120.864, abs=5e-4)


def test_phase_angle_check() -> None:
    # tan φ = ωτ, so τ0/τ = tan φ0/tan φ: φ0 60°, φ100 30°, φ 40° -> 150.057 µmol/L
    # (reference notes §3 [computed])
    cal = optode.calibrate_two_point(60.0, 30.0, C100, kind="phase_deg", temp_c=10.0)
    assert optode.concentration_from_phase(cal, 40.0, 10.0) == pytest.approx(150.057, abs=5e-4)


@pytest.mark.parametrize("kind", ["lifetime_us", "phase_deg"])
@pytest.mark.parametrize("fraction", [1.0, 0.85])
def test_readings_round_trip_with_temperature_correction(kind: str, fraction: float) -> None:
    zero, span = (55.0, 24.0) if kind == "lifetime_us" else (62.0, 27.0)
    cal = optode.calibrate_two_point(
        zero,
        span,
        oxygen.solubility(18.0, 31.0, unit="umol/L"),
        kind=kind,
        temp_c=18.0,
        quenchable_fraction=fraction,
        ksv_slope_l_per_umol_per_k=4e-5,
        zero_slope_per_k=-0.2,
    )
    conc = np.linspace(0.0, 450.0, 10)
    temps = np.linspace(8.0, 28.0, 10)
    reading = optode.signal_from_concentration(cal, conc, temps)
    np.testing.assert_allclose(
        optode.concentration_from_signal(cal, reading, temps), conc, atol=1e-9
    )
    # Oxygen-free water reads the temperature-corrected zero.
    assert optode.signal_from_concentration(cal, 0.0, 23.0) == pytest.approx(zero - 0.2 * 5.0)
    # More oxygen, shorter lifetime / smaller phase.
    assert np.all(np.diff(reading) < 0.0)


def test_temperature_correction_changes_the_reading_as_documented() -> None:
    cal = optode.calibrate_two_point(
        60.0, 30.0, C100, kind="lifetime_us", temp_c=10.0, ksv_slope_l_per_umol_per_k=1e-4
    )
    # At 20 °C KSV = KSV_cal + 10·1e-4; with f = 1 the lifetime is τ0/(1 + KSV·C).
    ksv, zero = cal.at(20.0)
    assert ksv == pytest.approx(3.54591e-3 + 1e-3, abs=5e-9)
    assert zero == pytest.approx(60.0)  # no zero-signal slope given
    assert optode.lifetime_from_concentration(cal, 200.0, 20.0) == pytest.approx(
        60.0 / (1.0 + float(ksv) * 200.0)
    )


def test_simulator_phase_inverse() -> None:
    cal = optode.calibrate_two_point(60.0, 30.0, C100, kind="phase_deg", temp_c=10.0)
    phases = optode.phase_from_concentration(cal, np.array([0.0, 150.057, C100]), 10.0)
    np.testing.assert_allclose(phases, [60.0, 40.0, 30.0], atol=2e-5)


def test_bad_calibrations_and_readings_are_refused() -> None:
    with pytest.raises(SquallError, match="below the oxygen-free"):
        optode.calibrate_two_point(30.0, 60.0, C100, kind="lifetime_us", temp_c=10.0)
    with pytest.raises(SquallError, match="unquenchable floor"):
        optode.calibrate_two_point(
            60.0, 10.0, C100, kind="lifetime_us", temp_c=10.0, quenchable_fraction=0.8
        )
    with pytest.raises(SquallError, match="between 0 and 90"):
        optode.calibrate_two_point(95.0, 30.0, C100, kind="phase_deg", temp_c=10.0)
    with pytest.raises(SquallError, match="positive"):
        optode.calibrate_two_point(60.0, 30.0, 0.0, kind="lifetime_us", temp_c=10.0)
    with pytest.raises(ValueError):
        optode.calibrate_two_point(60.0, 30.0, C100, kind="intensity", temp_c=10.0)
    cal = optode.calibrate_two_point(60.0, 30.0, C100, kind="lifetime_us", temp_c=10.0)
    with pytest.raises(SquallError, match="lifetime_us readings, not phase_deg"):
        optode.concentration_from_phase(cal, 40.0, 10.0)
    with pytest.raises(SquallError, match=">= 0"):
        optode.lifetime_from_concentration(cal, -1.0, 10.0)
