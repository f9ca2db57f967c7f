"""Community metabolism from closed windows: flags, areal fluxes, NCP, R, GPP, daily rates.

Rules of this module
--------------------
- A window's areal flux is F = (b − b_blank)·V/A (µmol O2 m⁻² h⁻¹) with b its O2 slope
  (µmol L⁻¹ h⁻¹), V the chamber's water volume (L) and A the community's area (m²).
- Net community production (NCP) is the flux of a light window, respiration R = −(flux of a
  dark window), gross primary production GPP = NCP + R, which assumes respiration in the
  light equals respiration in the dark.
- Pairing rule: each usable light window is paired with the usable dark window of the same
  chamber and the same protocol phase whose mean temperature setpoint (the measured mean
  where no setpoint was logged) lies within ``match_tol_c`` of the light window's; among
  several, the one whose middle is nearest in time. A light window without such a partner
  has NCP but no GPP.
- Pure: frames in, frames out.

References
----------
Closed-chamber flux and GPP = NCP + R (from memory; the usual benthic-chamber method).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import pandas as pd

from ._settings import EXCLUDING_FLAGS, AnalysisSettings, WindowFlag

__all__ = [
    "DailyMetabolism",
    "areal_flux",
    "classify_windows",
    "daily_metabolism",
    "daily_table",
    "pair_windows",
    "respiration_table",
]

F = npt.NDArray[np.float64]
_HOURS_PER_DAY = 24.0


def areal_flux(
    slope_umol_l_h: npt.ArrayLike,
    volume_l: npt.ArrayLike,
    area_m2: npt.ArrayLike,
    blank_slope_umol_l_h: npt.ArrayLike = 0.0,
) -> F:
    """Areal O2 flux of a closed chamber from its O2 slope.

    Parameters
    ----------
    slope_umol_l_h
        Regression slope dC/dt of the chamber, µmol L⁻¹ h⁻¹.
    volume_l
        Water volume net of organisms and sediment, L.
    area_m2
        Planar area of the enclosed community, m².
    blank_slope_umol_l_h
        Slope of a seawater blank run alongside, µmol L⁻¹ h⁻¹ (0 for no correction).

    Returns
    -------
    numpy.ndarray
        F = (b_sample − b_blank)·V/A, µmol O2 m⁻² h⁻¹ (positive: the community releases O2).

    References
    ----------
    Closed-chamber flux (from memory; the usual benthic-chamber calculation). Divide by
    biomass instead of area for mass-specific rates.
    """
    slope = np.asarray(slope_umol_l_h, dtype=float) - np.asarray(blank_slope_umol_l_h, float)
    return np.asarray(slope * np.asarray(volume_l, float) / np.asarray(area_m2, float))


@dataclass(frozen=True, kw_only=True)
class DailyMetabolism:
    """Daily community metabolism.

    Attributes
    ----------
    gpp_mmol_m2_d
        Gross primary production, GPP_h·h, mmol O2 m⁻² d⁻¹.
    r_mmol_m2_d
        Community respiration, R_h·24, mmol O2 m⁻² d⁻¹.
    ncp_mmol_m2_d
        Net community production, NCP_h·h − R_h·(24 − h) = GPP_d − R_d, mmol O2 m⁻² d⁻¹.
    p_to_r
        GPP_d/R_d, dimensionless (NaN when R_d is 0).
    """

    gpp_mmol_m2_d: float
    r_mmol_m2_d: float
    ncp_mmol_m2_d: float
    p_to_r: float


def daily_metabolism(
    ncp_umol_m2_h: float, r_umol_m2_h: float, photoperiod_h: float
) -> DailyMetabolism:
    """Daily GPP, R, NCP and P:R from hourly rates and the light hours of a day.

    Parameters
    ----------
    ncp_umol_m2_h
        Net community production in the light, µmol O2 m⁻² h⁻¹.
    r_umol_m2_h
        Community respiration (positive), µmol O2 m⁻² h⁻¹.
    photoperiod_h
        Light hours per day, h (0–24).

    Returns
    -------
    DailyMetabolism
        Daily rates in mmol O2 m⁻² d⁻¹ and P:R.

    Notes
    -----
    GPP_h = NCP_h + R_h; GPP_d = GPP_h·h; R_d = R_h·24; NCP_d = NCP_h·h − R_h·(24 − h);
    P:R = GPP_d/R_d (assumes respiration in the light equals that in the dark).
    """
    if not 0.0 <= photoperiod_h <= _HOURS_PER_DAY:
        raise ValueError(f"photoperiod_h must be within 0–24 h, got {photoperiod_h!r}")
    gpp_h = ncp_umol_m2_h + r_umol_m2_h
    gpp_d = gpp_h * photoperiod_h / 1000.0
    r_d = r_umol_m2_h * _HOURS_PER_DAY / 1000.0
    ncp_d = (ncp_umol_m2_h * photoperiod_h - r_umol_m2_h * (24.0 - photoperiod_h)) / 1000.0
    ratio = gpp_d / r_d if r_d != 0 else float("nan")
    return DailyMetabolism(
        gpp_mmol_m2_d=float(gpp_d),
        r_mmol_m2_d=float(r_d),
        ncp_mmol_m2_d=float(ncp_d),
        p_to_r=float(ratio),
    )


def _basic_flags(table: pd.DataFrame, settings: AnalysisSettings) -> list[list[WindowFlag]]:
    """Flags of each window from its own fit (no blank yet)."""
    n = table["n"].to_numpy()
    span_s = table["span_min"].to_numpy(dtype=float) * 60.0
    quad_p = table["quad_p"].to_numpy(dtype=float)
    change = table["slope_change_frac"].to_numpy(dtype=float)
    r2 = table["r2"].to_numpy(dtype=float)
    sat_lo = table["o2_sat_min_pct"].to_numpy(dtype=float)
    sat_hi = table["o2_sat_max_pct"].to_numpy(dtype=float)
    flags: list[list[WindowFlag]] = []
    for i in range(len(table)):
        found: list[WindowFlag] = []
        if n[i] == 0:
            found.append(WindowFlag.NO_DATA)
        elif n[i] < settings.min_points or not span_s[i] >= settings.min_fit_s:
            found.append(WindowFlag.TOO_SHORT)
        if quad_p[i] < settings.quad_alpha and change[i] > settings.nonlinear_slope_change:
            found.append(WindowFlag.NONLINEAR)
        if r2[i] < settings.r2_min:
            found.append(WindowFlag.LOW_R2)
        if sat_lo[i] < settings.o2_sat_min_pct or sat_hi[i] > settings.o2_sat_max_pct:
            found.append(WindowFlag.O2_OUT_OF_BAND)
        flags.append(found)
    return flags


def _blank_partner(blanks: pd.DataFrame, row: pd.Series) -> int | None:
    """Position in ``blanks`` of the blank window matching a window, or None.

    The blank window of the same light state whose fitted span overlaps the window's fitted
    span most; without any overlap, the one of the same phase whose middle is nearest.
    """
    same = blanks[blanks["light"] == row["light"]]
    if same.empty:
        return None
    lo = np.maximum(same["fit_start_s"].to_numpy(float), row["fit_start_s"])
    hi = np.minimum(same["fit_end_s"].to_numpy(float), row["fit_end_s"])
    overlap = hi - lo
    if np.isfinite(overlap).any() and np.nanmax(overlap) > 0:
        return int(same.index[int(np.nanargmax(overlap))])
    phase = same[same["phase"] == row["phase"]]
    if phase.empty:
        return None
    distance = np.abs(phase["mid_s"].to_numpy(float) - row["mid_s"])
    return int(phase.index[int(np.argmin(distance))])


def classify_windows(
    table: pd.DataFrame, chambers: pd.DataFrame, settings: AnalysisSettings
) -> pd.DataFrame:
    """Flag every window's fit and turn its slope into an areal flux.

    Parameters
    ----------
    table
        Window fits as :meth:`controller.analysis.WindowAccumulator.table` returns them.
    chambers
        Columns ``chamber``, ``water_volume_l`` (L) and ``sediment_area_m2`` (m²).
    settings
        Thresholds; ``settings.blank`` names the blank chamber, if any.

    Returns
    -------
    pandas.DataFrame
        ``table`` plus ``role`` (``sample`` or ``blank``), ``water_volume_l``,
        ``sediment_area_m2``, ``blank_window`` (−1 for none), ``blank_slope_umol_l_h``,
        ``flux_umol_m2_h`` and ``flux_se_umol_m2_h`` (µmol O2 m⁻² h⁻¹), ``flags`` (names
        joined by ``;``, empty when none) and ``usable`` (no flag of
        :data:`~controller.analysis.EXCLUDING_FLAGS`).
    """
    out = table.copy()
    geometry = chambers.set_index("chamber")[["water_volume_l", "sediment_area_m2"]]
    out = out.join(geometry, on="chamber")
    flags = _basic_flags(out, settings)
    out["role"] = np.where(out["chamber"] == settings.blank, "blank", "sample")
    blank_slope = np.zeros(len(out))
    blank_se = np.zeros(len(out))
    blank_window = np.full(len(out), -1, dtype=np.int64)
    if settings.blank is not None:
        ok = np.array([not (set(f) & EXCLUDING_FLAGS) for f in flags], dtype=bool)
        blanks = out[(out["role"] == "blank").to_numpy() & ok]
        for i in np.flatnonzero((out["role"] == "sample").to_numpy()):
            partner = _blank_partner(blanks, out.iloc[i])
            if partner is None:
                flags[i].append(WindowFlag.NO_BLANK)
                blank_slope[i] = blank_se[i] = np.nan
                continue
            blank_window[i] = int(out.at[partner, "window"])
            blank_slope[i] = out.at[partner, "slope_umol_l_h"]
            blank_se[i] = out.at[partner, "slope_se_umol_l_h"]
    is_blank = (out["role"] == "blank").to_numpy()
    blank_slope[is_blank] = 0.0
    blank_se[is_blank] = 0.0
    scale = out["water_volume_l"].to_numpy(float) / out["sediment_area_m2"].to_numpy(float)
    out["blank_window"] = blank_window
    out["blank_slope_umol_l_h"] = np.where(is_blank, np.nan, blank_slope)
    out["flux_umol_m2_h"] = areal_flux(
        out["slope_umol_l_h"], out["water_volume_l"], out["sediment_area_m2"], blank_slope
    )
    out["flux_se_umol_m2_h"] = np.hypot(out["slope_se_umol_l_h"].to_numpy(float), blank_se) * scale
    out["flags"] = [";".join(f.value for f in found) for found in flags]
    out["usable"] = [not (set(found) & EXCLUDING_FLAGS) for found in flags]
    return out


def _match_key(frame: pd.DataFrame) -> F:
    """Temperature a window is matched on: its mean setpoint, else its measured mean, °C."""
    setpoint = frame["temperature_setpoint_c"].to_numpy(float)
    return np.where(np.isfinite(setpoint), setpoint, frame["temperature_c"].to_numpy(float))


def pair_windows(windows: pd.DataFrame, settings: AnalysisSettings) -> pd.DataFrame:
    """NCP, R and GPP of every usable light window, paired with a dark window (module rules).

    Parameters
    ----------
    windows
        Classified windows (:func:`classify_windows`).
    settings
        ``match_tol_c`` (°C) is used.

    Returns
    -------
    pandas.DataFrame
        One row per usable light window of a sample chamber: ``chamber``, ``phase``,
        ``light_window``, ``dark_window`` (−1 when unpaired), ``mid_s`` (s since the run's
        start), ``temperature_c`` and ``dark_temperature_c`` (measured means, °C),
        ``temperature_setpoint_c`` (°C), ``par`` and ``par_setpoint`` (µmol photons m⁻²
        s⁻¹), ``ncp_umol_m2_h``, ``r_umol_m2_h``, ``gpp_umol_m2_h`` and their ``_se``
        (µmol O2 m⁻² h⁻¹; R and GPP NaN when unpaired).
    """
    use = windows[windows["usable"].to_numpy(bool) & (windows["role"] == "sample").to_numpy()]
    light = use[(use["light"] == "light").to_numpy()]
    dark = use[(use["light"] == "dark").to_numpy()]
    dark_key = _match_key(dark)
    dark_mid = dark["mid_s"].to_numpy(float)
    by_unit: dict[tuple[str, str], list[int]] = {}
    dark_units = zip(dark["chamber"].astype(str), dark["phase"].astype(str), strict=True)
    for k, unit in enumerate(dark_units):
        by_unit.setdefault(unit, []).append(k)
    members = {unit: np.asarray(ks, dtype=np.intp) for unit, ks in by_unit.items()}
    light_key = _match_key(light)
    light_mid = light["mid_s"].to_numpy(float)
    partner = np.full(len(light), -1, dtype=np.intp)
    units = zip(light["chamber"].astype(str), light["phase"].astype(str), strict=True)
    for i, unit in enumerate(units):
        candidates = members.get(unit)
        if candidates is None or pd.isna(light["phase"].iloc[i]):
            continue
        candidates = candidates[np.abs(dark_key[candidates] - light_key[i]) <= settings.match_tol_c]
        if len(candidates):
            partner[i] = candidates[np.argmin(np.abs(dark_mid[candidates] - light_mid[i]))]
    paired = partner >= 0
    ncp = light["flux_umol_m2_h"].to_numpy(float)
    ncp_se = light["flux_se_umol_m2_h"].to_numpy(float)

    def from_dark(column: str, fill: float = np.nan) -> F:
        """A dark-window column for each light window (``fill`` where unpaired)."""
        out = np.full(len(light), fill)
        out[paired] = dark[column].to_numpy(float)[partner[paired]]
        return out

    r = -from_dark("flux_umol_m2_h")
    r_se = from_dark("flux_se_umol_m2_h")
    dark_window = from_dark("window", -1.0).astype(np.int64)
    return pd.DataFrame(
        {
            "chamber": light["chamber"].to_numpy(),
            "phase": light["phase"].to_numpy(),
            "light_window": light["window"].to_numpy(np.int64),
            "dark_window": dark_window,
            "mid_s": light_mid,
            "temperature_c": light["temperature_c"].to_numpy(float),
            "dark_temperature_c": from_dark("temperature_c"),
            "temperature_setpoint_c": light["temperature_setpoint_c"].to_numpy(float),
            "par": light["par"].to_numpy(float),
            "par_setpoint": light["par_setpoint"].to_numpy(float),
            "ncp_umol_m2_h": ncp,
            "ncp_se_umol_m2_h": ncp_se,
            "r_umol_m2_h": r,
            "r_se_umol_m2_h": r_se,
            "gpp_umol_m2_h": ncp + r,
            "gpp_se_umol_m2_h": np.hypot(ncp_se, r_se),
        }
    )


def respiration_table(windows: pd.DataFrame) -> pd.DataFrame:
    """Respiration of every usable dark window of a sample chamber.

    Parameters
    ----------
    windows
        Classified windows (:func:`classify_windows`).

    Returns
    -------
    pandas.DataFrame
        ``chamber``, ``phase``, ``window``, ``mid_s`` (s), ``temperature_c`` (°C),
        ``r_umol_m2_h`` = −flux and ``r_se_umol_m2_h`` (µmol O2 m⁻² h⁻¹).
    """
    dark = windows[windows["usable"] & (windows["role"] == "sample")]
    dark = dark[dark["light"] == "dark"]
    return pd.DataFrame(
        {
            "chamber": dark["chamber"].to_numpy(),
            "phase": dark["phase"].to_numpy(),
            "window": dark["window"].to_numpy(),
            "mid_s": dark["mid_s"].to_numpy(float),
            "temperature_c": dark["temperature_c"].to_numpy(float),
            "r_umol_m2_h": -dark["flux_umol_m2_h"].to_numpy(float),
            "r_se_umol_m2_h": dark["flux_se_umol_m2_h"].to_numpy(float),
        }
    )


def daily_table(
    pairs: pd.DataFrame, photoperiods: pd.DataFrame, photoperiod_h: float | None = None
) -> pd.DataFrame:
    """Daily metabolism per chamber and phase from the paired hourly rates.

    Parameters
    ----------
    pairs
        Output of :func:`pair_windows`; unpaired rows are left out.
    photoperiods
        Columns ``chamber``, ``phase`` and ``photoperiod_h`` (light hours per day, h).
    photoperiod_h
        Light hours per day for every chamber and phase, h; overrides ``photoperiods``.

    Returns
    -------
    pandas.DataFrame
        ``chamber``, ``phase``, ``n_pairs``, ``photoperiod_h`` (h), mean
        ``ncp_umol_m2_h``, ``r_umol_m2_h`` and ``gpp_umol_m2_h`` (µmol O2 m⁻² h⁻¹), and
        ``gpp_mmol_m2_d``, ``r_mmol_m2_d``, ``ncp_mmol_m2_d`` (mmol O2 m⁻² d⁻¹) and
        ``p_to_r`` from :func:`daily_metabolism`.
    """
    paired = pairs[pairs["dark_window"] >= 0]
    lookup = {
        (str(r.chamber), str(r.phase)): float(r.photoperiod_h)
        for r in photoperiods.itertuples(index=False)
    }
    rows = []
    for (chamber, phase), part in paired.groupby(["chamber", "phase"], sort=False):
        hours = photoperiod_h if photoperiod_h is not None else lookup.get((chamber, phase))
        ncp = float(part["ncp_umol_m2_h"].mean())
        r = float(part["r_umol_m2_h"].mean())
        row = {
            "chamber": chamber,
            "phase": phase,
            "n_pairs": len(part),
            "photoperiod_h": np.nan if hours is None else hours,
            "ncp_umol_m2_h": ncp,
            "r_umol_m2_h": r,
            "gpp_umol_m2_h": ncp + r,
            "gpp_mmol_m2_d": np.nan,
            "r_mmol_m2_d": np.nan,
            "ncp_mmol_m2_d": np.nan,
            "p_to_r": np.nan,
        }
        if hours is not None and np.isfinite(hours):
            daily = daily_metabolism(ncp, r, hours)
            row.update(
                gpp_mmol_m2_d=daily.gpp_mmol_m2_d,
                r_mmol_m2_d=daily.r_mmol_m2_d,
                ncp_mmol_m2_d=daily.ncp_mmol_m2_d,
                p_to_r=daily.p_to_r,
            )
        rows.append(row)
    columns = [
        "chamber", "phase", "n_pairs", "photoperiod_h", "ncp_umol_m2_h", "r_umol_m2_h",
        "gpp_umol_m2_h", "gpp_mmol_m2_d", "r_mmol_m2_d", "ncp_mmol_m2_d", "p_to_r",
    ]  # fmt: skip
    return pd.DataFrame(rows, columns=columns)
