"""Tables of the temperature and light responses, and treatment-versus-control differences.

Rules of this module
--------------------
- A *unit* is what a fit pools: one chamber, or every chamber of a protocol group.
- Respiration's temperature response uses every usable dark window; gross production's
  uses the paired light windows of one light level at a time (light windows at different
  irradiance differ by light as well as temperature). A unit needs ``min_temperatures``
  distinct temperatures (0.5 °C apart) for a fit; otherwise its row says why not.
- The crossing temperature is computed for each GPP fit with the same unit's R fit.
- Light-response fits pool the paired light windows of one unit, phase and temperature
  setpoint (0.5 °C bins) with ``min_par_levels`` light levels or more.
- Treatment-versus-control differences treat the chamber as the replicate: each chamber's
  rates are averaged within a phase first, then the group means are compared with Welch's
  t interval (needs two chambers or more in both groups).
- Pure: frames in, frames out.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from ._fits import (
    ArrheniusFit,
    crossing_temperature,
    distinct_temperatures,
    fit_arrhenius,
    fit_light_response,
    light_levels,
)
from ._settings import AnalysisSettings

__all__ = [
    "CROSSING_COLUMNS",
    "DIFFERENCE_COLUMNS",
    "FIT_COLUMNS",
    "LIGHT_COLUMNS",
    "GroupSpec",
    "group_differences",
    "light_response",
    "response_points",
    "temperature_response",
    "units",
]

FIT_COLUMNS = (
    "unit", "unit_kind", "rate", "par_level", "n", "n_temperatures", "t_min_c", "t_max_c",
    "t_ref_c", "rate_ref_umol_m2_h", "ln_rate_ref", "ea_ev", "ea_se_ev", "ea_ci_low_ev",
    "ea_ci_high_ev", "q10", "q10_ci_low", "q10_ci_high", "q10_from_c", "q10_to_c", "r2",
    "note",
)  # fmt: skip
"""Columns of the temperature-fit table (rates µmol O2 m⁻² h⁻¹, E in eV, T in °C)."""

CROSSING_COLUMNS = (
    "unit", "unit_kind", "par_level", "t_cross_c", "ci_low_c", "ci_high_c", "confidence",
    "extrapolated", "r_overtakes_above", "ea_gpp_ev", "ea_r_ev",
)  # fmt: skip
"""Columns of the crossing-temperature table (°C, eV)."""

LIGHT_COLUMNS = (
    "unit", "unit_kind", "phase", "temperature_setpoint_c", "n", "n_levels",
    "pmax_umol_m2_h", "pmax_se_umol_m2_h", "ik_umol_m2_s", "ik_se_umol_m2_s", "alpha",
)  # fmt: skip
"""Columns of the light-response table (Pmax µmol O2 m⁻² h⁻¹, Ik µmol photons m⁻² s⁻¹)."""

DIFFERENCE_COLUMNS = (
    "phase", "treatment", "control", "rate", "n_treatment", "n_control", "treatment_mean",
    "control_mean", "difference", "ci_low", "ci_high", "p_value", "confidence",
)  # fmt: skip
"""Columns of the treatment-versus-control table (rates µmol O2 m⁻² h⁻¹)."""


@dataclass(frozen=True, kw_only=True)
class GroupSpec:
    """A protocol group as the analysis needs it.

    Attributes
    ----------
    name
        Group name in the protocol.
    role
        ``treatment`` or ``control``.
    chambers
        Its chambers.
    label
        Label for plots (the name when the protocol gives none).
    """

    name: str
    role: str
    chambers: tuple[str, ...]
    label: str


def units(chambers: Sequence[str], groups: Sequence[GroupSpec]) -> list[tuple[str, str, list[str]]]:
    """Every unit a fit pools: each chamber, then each group.

    Parameters
    ----------
    chambers
        Sample chambers with data.
    groups
        Protocol groups.

    Returns
    -------
    list of (unit, unit_kind, chambers)
        ``unit_kind`` is ``chamber`` or ``group``.
    """
    out = [(c, "chamber", [c]) for c in chambers]
    out += [(g.name, "group", [c for c in g.chambers if c in chambers]) for g in groups]
    return [u for u in out if u[2]]


def _fit_row(
    unit: str, kind: str, rate: str, level: float, fit: ArrheniusFit | None, note: str
) -> dict[str, object]:
    row: dict[str, object] = dict.fromkeys(FIT_COLUMNS, math.nan)
    row.update(unit=unit, unit_kind=kind, rate=rate, par_level=level, note=note)
    if fit is None:
        return row
    q10, q10_lo, q10_hi = fit.q10()
    row.update(
        n=fit.n,
        n_temperatures=fit.n_temperatures,
        t_min_c=fit.t_min_c,
        t_max_c=fit.t_max_c,
        t_ref_c=fit.t_ref_c,
        rate_ref_umol_m2_h=fit.rate_ref,
        ln_rate_ref=fit.ln_rate_ref,
        ea_ev=fit.ea_ev,
        ea_se_ev=fit.ea_se_ev,
        ea_ci_low_ev=fit.ea_ci_low_ev,
        ea_ci_high_ev=fit.ea_ci_high_ev,
        q10=q10,
        q10_ci_low=q10_lo,
        q10_ci_high=q10_hi,
        q10_from_c=fit.q10_from_c,
        q10_to_c=fit.q10_from_c + 10.0,
        r2=fit.r2,
    )
    return row


def _try_fit(
    temp_c: np.ndarray, rate: np.ndarray, settings: AnalysisSettings
) -> tuple[ArrheniusFit | None, str]:
    positive = np.isfinite(rate) & (rate > 0) & np.isfinite(temp_c)
    seen = distinct_temperatures(temp_c[positive])
    if seen < settings.min_temperatures:
        need = settings.min_temperatures
        return None, f"{seen} distinct temperature(s) with positive rates; needs {need}"
    fit = fit_arrhenius(
        temp_c[positive], rate[positive], t_ref_c=settings.t_ref_c, confidence=settings.confidence
    )
    return fit, "" if fit is not None else "too few rates"


def _gpp_levels(pairs: pd.DataFrame, rel: float) -> np.ndarray:
    setpoint = pairs["par_setpoint"].to_numpy(float)
    par = np.where(np.isfinite(setpoint), setpoint, pairs["par"].to_numpy(float))
    return light_levels(par, rel)


def temperature_response(
    pairs: pd.DataFrame,
    resp: pd.DataFrame,
    groups: Sequence[GroupSpec],
    settings: AnalysisSettings,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Arrhenius fits of GPP and R per unit and the temperatures where they cross.

    Parameters
    ----------
    pairs
        Paired light windows (:func:`controller.analysis.pair_windows`).
    resp
        Dark-window respiration (:func:`controller.analysis.respiration_table`).
    groups
        Protocol groups (may be empty).
    settings
        ``t_ref_c`` (°C), ``confidence``, ``min_temperatures`` and ``par_level_rel`` are used.

    Returns
    -------
    (fits, crossings)
        Frames with :data:`FIT_COLUMNS` and :data:`CROSSING_COLUMNS`.
    """
    gpp = pairs[np.isfinite(pairs["gpp_umol_m2_h"].to_numpy(float))].copy()
    gpp["par_level"] = _gpp_levels(gpp, settings.par_level_rel)
    chambers = sorted(set(gpp["chamber"]) | set(resp["chamber"]), key=str)
    fit_rows: list[dict[str, object]] = []
    cross_rows: list[dict[str, object]] = []
    for unit, kind, members in units(chambers, groups):
        r_part = resp[resp["chamber"].isin(members)]
        r_fit, r_note = _try_fit(
            r_part["temperature_c"].to_numpy(float), r_part["r_umol_m2_h"].to_numpy(float), settings
        )
        fit_rows.append(_fit_row(unit, kind, "r", math.nan, r_fit, r_note))
        g_part = gpp[gpp["chamber"].isin(members)]
        for level, part in g_part.groupby("par_level", sort=True):
            g_fit, g_note = _try_fit(
                part["temperature_c"].to_numpy(float),
                part["gpp_umol_m2_h"].to_numpy(float),
                settings,
            )
            if g_fit is None and distinct_temperatures(part["temperature_c"]) < 2:
                continue  # a single-temperature light level (e.g. a light curve): no row
            fit_rows.append(_fit_row(unit, kind, "gpp", float(level), g_fit, g_note))
            if g_fit is None or r_fit is None:
                continue
            crossing = crossing_temperature(g_fit, r_fit, settings.confidence)
            if crossing is None:
                continue
            cross_rows.append(
                {
                    "unit": unit,
                    "unit_kind": kind,
                    "par_level": float(level),
                    "t_cross_c": crossing.t_cross_c,
                    "ci_low_c": crossing.ci_low_c,
                    "ci_high_c": crossing.ci_high_c,
                    "confidence": crossing.confidence,
                    "extrapolated": crossing.extrapolated,
                    "r_overtakes_above": crossing.r_overtakes_above,
                    "ea_gpp_ev": g_fit.ea_ev,
                    "ea_r_ev": r_fit.ea_ev,
                }
            )
    return (
        pd.DataFrame(fit_rows, columns=list(FIT_COLUMNS)),
        pd.DataFrame(cross_rows, columns=list(CROSSING_COLUMNS)),
    )


def light_response(
    pairs: pd.DataFrame, groups: Sequence[GroupSpec], settings: AnalysisSettings
) -> pd.DataFrame:
    """Jassby & Platt fits where a unit has light windows at several irradiances.

    Parameters
    ----------
    pairs
        Paired light windows (:func:`controller.analysis.pair_windows`).
    groups
        Protocol groups (may be empty).
    settings
        ``min_par_levels`` and ``par_level_rel`` are used.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`LIGHT_COLUMNS`; the irradiance is each window's measured mean PAR.
    """
    gpp = pairs[np.isfinite(pairs["gpp_umol_m2_h"].to_numpy(float))].copy()
    setpoint = gpp["temperature_setpoint_c"].to_numpy(float)
    gpp["t_level"] = (
        np.round(
            np.where(np.isfinite(setpoint), setpoint, gpp["temperature_c"].to_numpy(float)) * 2.0
        )
        / 2.0
    )
    rows: list[dict[str, object]] = []
    for unit, kind, members in units(sorted(set(gpp["chamber"]), key=str), groups):
        part = gpp[gpp["chamber"].isin(members)]
        for (phase, t_level), sub in part.groupby(["phase", "t_level"], sort=True):
            fit = fit_light_response(
                sub["par"].to_numpy(float),
                sub["gpp_umol_m2_h"].to_numpy(float),
                min_levels=settings.min_par_levels,
                rel=settings.par_level_rel,
            )
            if fit is None:
                continue
            rows.append(
                {
                    "unit": unit,
                    "unit_kind": kind,
                    "phase": phase,
                    "temperature_setpoint_c": float(t_level),
                    "n": fit.n,
                    "n_levels": fit.n_levels,
                    "pmax_umol_m2_h": fit.pmax,
                    "pmax_se_umol_m2_h": fit.pmax_se,
                    "ik_umol_m2_s": fit.ik,
                    "ik_se_umol_m2_s": fit.ik_se,
                    "alpha": fit.alpha,
                }
            )
    return pd.DataFrame(rows, columns=list(LIGHT_COLUMNS))


def _chamber_means(pairs: pd.DataFrame, resp: pd.DataFrame) -> pd.DataFrame:
    """Mean GPP, NCP and R of each chamber in each phase (long format)."""
    parts = []
    for frame, column, rate in (
        (pairs, "gpp_umol_m2_h", "gpp"),
        (pairs, "ncp_umol_m2_h", "ncp"),
        (resp, "r_umol_m2_h", "r"),
    ):
        valid = frame[np.isfinite(frame[column].to_numpy(float))]
        means = valid.groupby(["phase", "chamber"], sort=True)[column].mean().reset_index()
        parts.append(means.rename(columns={column: "value"}).assign(rate=rate))
    return pd.concat(parts, ignore_index=True)


def _welch(a: np.ndarray, b: np.ndarray, confidence: float) -> tuple[float, float, float]:
    """Welch confidence interval half-width, p-value and degrees of freedom (NaN if n < 2)."""
    if len(a) < 2 or len(b) < 2:
        return math.nan, math.nan, math.nan
    va, vb = a.var(ddof=1) / len(a), b.var(ddof=1) / len(b)
    se = math.sqrt(va + vb)
    if se == 0:
        return 0.0, math.nan, math.nan
    dof = (va + vb) ** 2 / (va**2 / (len(a) - 1) + vb**2 / (len(b) - 1))
    t = (a.mean() - b.mean()) / se
    half = float(stats.t.ppf(0.5 + confidence / 2.0, dof)) * se
    return half, float(2.0 * stats.t.sf(abs(t), dof)), float(dof)


def group_differences(
    pairs: pd.DataFrame,
    resp: pd.DataFrame,
    groups: Sequence[GroupSpec],
    confidence: float = 0.95,
) -> pd.DataFrame:
    """Treatment minus control GPP, NCP and R per phase, with Welch intervals.

    Parameters
    ----------
    pairs
        Paired light windows (:func:`controller.analysis.pair_windows`).
    resp
        Dark-window respiration (:func:`controller.analysis.respiration_table`).
    groups
        Protocol groups; every treatment group is compared with every control group.
    confidence
        Confidence level, dimensionless.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`DIFFERENCE_COLUMNS`; means and differences in µmol O2 m⁻² h⁻¹.

    References
    ----------
    Welch, B. L. (1947) The generalization of "Student's" problem when several different
    population variances are involved. Biometrika 34:28–35 (from memory).
    """
    treatments = [g for g in groups if g.role == "treatment"]
    controls = [g for g in groups if g.role == "control"]
    if not treatments or not controls:
        return pd.DataFrame(columns=list(DIFFERENCE_COLUMNS))
    means = _chamber_means(pairs, resp)
    rows: list[dict[str, object]] = []
    for (phase, rate), part in means.groupby(["phase", "rate"], sort=True):
        for treat in treatments:
            a = part[part["chamber"].isin(treat.chambers)]["value"].to_numpy(float)
            for ctrl in controls:
                b = part[part["chamber"].isin(ctrl.chambers)]["value"].to_numpy(float)
                if len(a) == 0 or len(b) == 0:
                    continue
                half, p, _ = _welch(a, b, confidence)
                diff = float(a.mean() - b.mean())
                rows.append(
                    {
                        "phase": phase,
                        "treatment": treat.name,
                        "control": ctrl.name,
                        "rate": rate,
                        "n_treatment": len(a),
                        "n_control": len(b),
                        "treatment_mean": float(a.mean()),
                        "control_mean": float(b.mean()),
                        "difference": diff,
                        "ci_low": diff - half,
                        "ci_high": diff + half,
                        "p_value": p,
                        "confidence": confidence,
                    }
                )
    return pd.DataFrame(rows, columns=list(DIFFERENCE_COLUMNS))


def response_points(
    pairs: pd.DataFrame, resp: pd.DataFrame, groups: Sequence[GroupSpec], rel: float = 0.05
) -> pd.DataFrame:
    """The rates behind the temperature fits, per unit, for plots.

    Parameters
    ----------
    pairs
        Paired light windows (:func:`controller.analysis.pair_windows`).
    resp
        Dark-window respiration (:func:`controller.analysis.respiration_table`).
    groups
        Protocol groups (may be empty).
    rel
        Relative width of a light level (``par_level_rel``), dimensionless.

    Returns
    -------
    pandas.DataFrame
        ``unit``, ``unit_kind``, ``chamber``, ``rate`` (``gpp`` or ``r``), ``par_level``
        (µmol photons m⁻² s⁻¹, NaN for R), ``temperature_c`` (°C) and ``value``
        (µmol O2 m⁻² h⁻¹).
    """
    gpp = pairs[np.isfinite(pairs["gpp_umol_m2_h"].to_numpy(float))]
    base = [
        pd.DataFrame(
            {
                "chamber": gpp["chamber"].to_numpy(),
                "rate": "gpp",
                "par_level": _gpp_levels(gpp, rel),
                "temperature_c": gpp["temperature_c"].to_numpy(float),
                "value": gpp["gpp_umol_m2_h"].to_numpy(float),
            }
        ),
        pd.DataFrame(
            {
                "chamber": resp["chamber"].to_numpy(),
                "rate": "r",
                "par_level": np.nan,
                "temperature_c": resp["temperature_c"].to_numpy(float),
                "value": resp["r_umol_m2_h"].to_numpy(float),
            }
        ),
    ]
    points = pd.concat(base, ignore_index=True)
    chambers = sorted(set(points["chamber"].astype(str)), key=str)
    parts = [
        points[points["chamber"].isin(members)].assign(unit=unit, unit_kind=kind)
        for unit, kind, members in units(chambers, groups)
    ]
    columns = ["unit", "unit_kind", "chamber", "rate", "par_level", "temperature_c", "value"]
    if not parts:
        return pd.DataFrame(columns=columns)
    return pd.concat(parts, ignore_index=True)[columns]
