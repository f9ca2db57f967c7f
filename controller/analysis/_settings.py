"""Settings of a run-log analysis and the flags a closed window can carry.

Rules of this module
--------------------
- Every threshold the analysis applies lives in :class:`AnalysisSettings`, with its unit in
  its name and its source in the docstring ("common practice" for trade rules of thumb,
  "chosen default" where no practice exists). Nothing else in ``controller.analysis`` holds a
  magic number that changes a result.
- :class:`WindowFlag` values are stored in JSON and CSV outputs: members may be added, never
  renamed.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from enum import StrEnum
from typing import Any

__all__ = ["EXCLUDING_FLAGS", "AnalysisSettings", "WindowFlag"]


class WindowFlag(StrEnum):
    """Why a closed window's fit is doubtful."""

    NO_DATA = "no_data"
    """No closed-incubation O2 reading after the settling time."""
    TOO_SHORT = "too_short"
    """Fewer than ``min_points`` readings or a fitted span under ``min_fit_s``."""
    NONLINEAR = "nonlinear"
    """The quadratic term is significant and changes the slope materially (see settings)."""
    LOW_R2 = "low_r2"
    """r² under ``r2_min``: a warning only (r² tends to 0 as the true slope does)."""
    O2_OUT_OF_BAND = "o2_out_of_band"
    """O2 left the 80–120 % air-saturation band during the fitted part."""
    NO_BLANK = "no_blank"
    """A blank correction was asked for but no usable blank window matched."""


EXCLUDING_FLAGS: frozenset[WindowFlag] = frozenset(
    {
        WindowFlag.NO_DATA,
        WindowFlag.TOO_SHORT,
        WindowFlag.NONLINEAR,
        WindowFlag.O2_OUT_OF_BAND,
        WindowFlag.NO_BLANK,
    }
)
"""Flags that keep a window out of the metabolism and temperature-response results.

``low_r2`` is not among them on purpose: near the compensation point (net production ≈ 0)
r² falls towards 0 however good the data, and dropping those windows would bias gross
production and the crossing temperature exactly where they matter.
"""


def _check(condition: bool, name: str, value: object, rule: str) -> None:
    if not condition:
        raise ValueError(f"{name} must be {rule}, got {value!r}")


@dataclass(frozen=True, kw_only=True)
class AnalysisSettings:
    """Thresholds and choices of one analysis.

    Parameters
    ----------
    settle_s
        Settling time skipped at the start of every closed window before fitting, s.
        Default 300 s; common practice is to fit "the linear part only, after a 2–5 min
        transient". Choose it longer than a few optode response times (t90).
    min_points
        Fewest O2 readings a fit needs, dimensionless (chosen default 10).
    min_fit_s
        Shortest fitted span (first to last fitted reading), s (chosen default 600 s;
        common practice runs 30–120 min per light or dark incubation).
    r2_min
        r² below which a window gets the warning flag ``low_r2``, dimensionless
        (chosen default 0.8).
    quad_alpha
        Significance level of the t-test on the quadratic term, dimensionless (chosen
        default 0.001).
    nonlinear_slope_change
        With a significant quadratic term, a window is ``nonlinear`` when the slope changes
        by more than this fraction of the mean slope over the fitted span, dimensionless
        (chosen default 0.25).
    o2_sat_min_pct, o2_sat_max_pct
        Air-saturation band O2 must stay in while fitting, % (common practice: keep O2
        within about 80–120 % air saturation).
    match_tol_c
        A light window is paired with a dark window of the same chamber and phase whose mean
        temperature setpoint (measured temperature when there is none) differs by at most
        this much, °C (chosen default 0.5 °C).
    par_level_rel
        Light windows whose mean PAR setpoints lie within this fraction of the lowest one in
        a cluster form one light level, dimensionless (chosen default 0.05).
    t_ref_c
        Reference temperature of the Arrhenius fits (the temperature at which the fitted
        reference rate applies), °C.
    confidence
        Confidence level of every interval, dimensionless, between 0 and 1.
    min_temperatures
        Fewest distinct temperatures (0.5 °C apart) an Arrhenius fit needs, dimensionless.
    min_par_levels
        Fewest distinct light levels a light-response fit needs, dimensionless.
    band_c
        Half-width of the temperature tolerance band, °C (common practice: ±0.5 °C
        acceptable, ±0.1–0.2 °C in good baths).
    band_par_pct
        Half-width of the PAR tolerance band, % of the setpoint (chosen default 10 %).
    band_par_floor
        Smallest PAR half-width, µmol photons m⁻² s⁻¹, so darkness is not judged to the
        last photon (chosen default 5).
    band_flow_cm_s
        Half-width of the flow tolerance band, cm s⁻¹ (chosen default 1.0).
    gap_periods
        Missing ticks longer than this many tick periods count as a data gap, dimensionless.
    photoperiod_h
        Light hours per day for daily metabolism, h; None = measured from the log (share of
        ticks with a PAR setpoint above zero, times 24 h).
    blank
        Chamber whose closed windows are seawater blanks, subtracted from every other
        chamber's slopes; None for no blank correction.
    """

    settle_s: float = 300.0
    min_points: int = 10
    min_fit_s: float = 600.0
    r2_min: float = 0.8
    quad_alpha: float = 0.001
    nonlinear_slope_change: float = 0.25
    o2_sat_min_pct: float = 80.0
    o2_sat_max_pct: float = 120.0
    match_tol_c: float = 0.5
    par_level_rel: float = 0.05
    t_ref_c: float = 20.0
    confidence: float = 0.95
    min_temperatures: int = 3
    min_par_levels: int = 3
    band_c: float = 0.5
    band_par_pct: float = 10.0
    band_par_floor: float = 5.0
    band_flow_cm_s: float = 1.0
    gap_periods: float = 2.0
    photoperiod_h: float | None = None
    blank: str | None = None

    def __post_init__(self) -> None:
        finite_nonneg = (
            ("settle_s", self.settle_s),
            ("min_fit_s", self.min_fit_s),
            ("match_tol_c", self.match_tol_c),
            ("par_level_rel", self.par_level_rel),
            ("band_par_floor", self.band_par_floor),
        )
        for name, value in finite_nonneg:
            _check(math.isfinite(value) and value >= 0, name, value, "a number >= 0")
        positive = (
            ("band_c", self.band_c),
            ("band_par_pct", self.band_par_pct),
            ("band_flow_cm_s", self.band_flow_cm_s),
            ("nonlinear_slope_change", self.nonlinear_slope_change),
        )
        for name, value in positive:
            _check(math.isfinite(value) and value > 0, name, value, "a number > 0")
        _check(self.min_points >= 3, "min_points", self.min_points, "at least 3")
        _check(0.0 <= self.r2_min <= 1.0, "r2_min", self.r2_min, "within 0–1")
        _check(0.0 < self.quad_alpha < 1.0, "quad_alpha", self.quad_alpha, "within (0, 1)")
        _check(0.0 < self.confidence < 1.0, "confidence", self.confidence, "within (0, 1)")
        _check(
            0.0 <= self.o2_sat_min_pct < self.o2_sat_max_pct,
            "o2_sat_min_pct",
            (self.o2_sat_min_pct, self.o2_sat_max_pct),
            "at least 0 and below o2_sat_max_pct",
        )
        _check(self.gap_periods > 1.0, "gap_periods", self.gap_periods, "above 1")
        _check(self.min_temperatures >= 2, "min_temperatures", self.min_temperatures, ">= 2")
        _check(self.min_par_levels >= 3, "min_par_levels", self.min_par_levels, ">= 3")
        _check(-5.0 <= self.t_ref_c <= 50.0, "t_ref_c", self.t_ref_c, "within -5–50 °C")
        if self.photoperiod_h is not None:
            _check(
                0.0 < self.photoperiod_h <= 24.0,
                "photoperiod_h",
                self.photoperiod_h,
                "within (0, 24] h",
            )

    def as_dict(self) -> dict[str, Any]:
        """The settings as a plain mapping (for JSON provenance), units in the keys."""
        return asdict(self)
