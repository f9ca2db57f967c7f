"""Deliberately bad closed windows get the flags they deserve and stay out of the rates."""

from __future__ import annotations

import pytest

from controller.analysis import AnalysisSettings, analyze_log

from .conftest import FlagLog


def _flags(log: FlagLog) -> list[set[str]]:
    return [set(filter(None, f.split(";"))) for f in log.analysis.windows["flags"]]


def test_each_bad_window_gets_its_flag(flag_log: FlagLog) -> None:
    flags = _flags(flag_log)
    assert flags[0] == set()
    assert "too_short" in flags[1]
    assert "nonlinear" in flags[2]
    assert "o2_out_of_band" in flags[3]
    assert flag_log.analysis.windows["usable"].tolist() == [True, False, False, False]


def test_the_good_window_is_not_flagged_for_what_the_bad_ones_are(flag_log: FlagLog) -> None:
    flags = _flags(flag_log)
    assert "nonlinear" not in flags[1] | flags[3]
    assert "o2_out_of_band" not in flags[0] | flags[2]


def test_the_nonlinear_window_changes_slope_by_more_than_a_quarter(flag_log: FlagLog) -> None:
    # the lamp went off half way: NCP turned into R, so the slope fell by about 3x
    row = flag_log.analysis.windows.iloc[2]
    assert row["quad_p"] < 1e-6
    assert row["slope_change_frac"] > 1.0
    good = flag_log.analysis.windows.iloc[0]
    assert good["slope_change_frac"] < AnalysisSettings().nonlinear_slope_change


def test_flagged_windows_are_left_out_of_pairs_and_counted_in_quality(flag_log: FlagLog) -> None:
    analysis = flag_log.analysis
    assert analysis.pairs["light_window"].tolist() == [0]
    assert analysis.pairs["dark_window"].tolist() == [-1]  # its only dark window is flagged
    assert any("no dark window" in note for note in analysis.notes)
    assert analysis.respiration.empty
    quality = analysis.quality.iloc[0]
    assert (quality["windows"], quality["light_windows"], quality["dark_windows"]) == (4, 3, 1)
    assert quality["flagged_windows"] == 3


def test_a_wider_band_and_a_longer_settling_change_the_verdicts(flag_log: FlagLog) -> None:
    wide = analyze_log(flag_log.path, AnalysisSettings(o2_sat_min_pct=60.0))
    assert wide.windows["usable"].tolist() == [True, False, False, True]
    assert wide.pairs["dark_window"].tolist() == [3]
    long_settle = analyze_log(flag_log.path, AnalysisSettings(settle_s=50 * 60.0))
    assert long_settle.windows.iloc[0]["flags"] == "no_data"  # the 45 min window is all settling
    assert long_settle.windows.iloc[0]["n"] == 0
    assert long_settle.windows.iloc[0]["phase"] == "hot"  # still counted in its phase
    assert long_settle.quality.iloc[0]["windows"] == 4


@pytest.mark.parametrize(
    ("field", "value"),
    [("settle_s", -1.0), ("min_points", 2), ("confidence", 1.0), ("band_c", 0.0)],
)
def test_settings_refuse_impossible_values(field: str, value: float) -> None:
    with pytest.raises(ValueError, match=field):
        AnalysisSettings(**{field: value})
