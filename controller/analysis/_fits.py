"""Fits of metabolic rates: Boltzmann–Arrhenius temperature response, crossing temperature,
Jassby & Platt light response.

Rules of this module
--------------------
- Temperatures are °C at the interface and kelvin inside; rates keep the caller's unit
  (µmol O2 m⁻² h⁻¹ in squall) and must be positive to enter a log-linear fit.
- The Arrhenius fit is ordinary least squares of ln(rate) on u = 1/(k·T_ref) − 1/(k·T)
  (eV⁻¹): ln r = ln r_ref + E·u, so the slope is the activation energy E (eV) and the
  intercept the log rate at T_ref. Intervals use Student's t with n − 2 degrees of freedom.
- The crossing temperature's interval comes from the delta method on the two independent
  fits (normal quantile); it ignores that GPP borrows R from the dark windows, so it is a
  little narrower than it should be when R's error dominates.
- Pure: arrays in, frozen dataclasses out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats

from controller.science.rates import (
    BOLTZMANN_EV_PER_K,
    ZERO_CELSIUS_K,
    jassby_platt,
    q10_equivalent,
)

__all__ = [
    "ArrheniusFit",
    "Crossing",
    "LightFit",
    "crossing_temperature",
    "distinct_temperatures",
    "fit_arrhenius",
    "fit_light_response",
    "inverse_temperature_ev",
    "light_levels",
]

F = npt.NDArray[np.float64]
_PARALLEL_EV = 1e-9  # activation energies closer than this are treated as equal, eV


def inverse_temperature_ev(temp_c: npt.ArrayLike, t_ref_c: float) -> F:
    """Boltzmann-scaled inverse temperature relative to a reference.

    Parameters
    ----------
    temp_c
        Temperature, °C.
    t_ref_c
        Reference temperature, °C.

    Returns
    -------
    numpy.ndarray
        u = 1/(k·T_ref) − 1/(k·T), eV⁻¹ (0 at T_ref, rising with temperature).
    """
    kelvin = np.asarray(temp_c, dtype=float) + ZERO_CELSIUS_K
    ref = t_ref_c + ZERO_CELSIUS_K
    return np.asarray((1.0 / ref - 1.0 / kelvin) / BOLTZMANN_EV_PER_K)


@dataclass(frozen=True, kw_only=True)
class ArrheniusFit:
    """Boltzmann–Arrhenius fit ln r = ln r_ref + E·(1/(k·T_ref) − 1/(k·T)).

    Attributes
    ----------
    n
        Rates fitted, dimensionless.
    n_temperatures
        Distinct temperatures among them (0.5 °C apart), dimensionless.
    t_min_c, t_max_c
        Range of the fitted temperatures, °C.
    t_ref_c
        Reference temperature, °C.
    ln_rate_ref
        ln of the fitted rate at ``t_ref_c`` (rate in the caller's unit).
    ea_ev
        Activation energy E, eV.
    ea_se_ev
        Standard error of E, eV.
    cov
        Covariance of (ln r_ref, E): ((var a, cov), (cov, var E)); eV⁻² for var E.
    r2
        Coefficient of determination of the log-linear fit, dimensionless.
    confidence
        Confidence level of the intervals, dimensionless.
    ea_ci_low_ev, ea_ci_high_ev
        Confidence interval of E, eV.

    References
    ----------
    Gillooly, J. F. et al. (2001) Science 293:2248–2251; Allen, A. P., Gillooly, J. F. &
    Brown, J. H. (2005) Functional Ecology 19:202–213 (the Boltzmann–Arrhenius form).
    """

    n: int
    n_temperatures: int
    t_min_c: float
    t_max_c: float
    t_ref_c: float
    ln_rate_ref: float
    ea_ev: float
    ea_se_ev: float
    cov: tuple[tuple[float, float], tuple[float, float]]
    r2: float
    confidence: float
    ea_ci_low_ev: float
    ea_ci_high_ev: float

    @property
    def rate_ref(self) -> float:
        """Fitted rate at ``t_ref_c``, in the unit of the fitted rates."""
        return math.exp(self.ln_rate_ref)

    def rate_at(self, temp_c: npt.ArrayLike) -> F:
        """Fitted rate at a temperature (°C), in the unit of the fitted rates."""
        u = inverse_temperature_ev(temp_c, self.t_ref_c)
        return np.asarray(np.exp(self.ln_rate_ref + self.ea_ev * u))

    @property
    def q10_from_c(self) -> float:
        """Lower end of the 10 °C interval the reported Q10 spans: the data's middle − 5, °C."""
        return 0.5 * (self.t_min_c + self.t_max_c) - 5.0

    def q10(self, t_low_c: float | None = None) -> tuple[float, float, float]:
        """Q10 the fitted activation energy implies, with its confidence interval.

        Parameters
        ----------
        t_low_c
            Lower end of the 10 °C interval, °C; default :attr:`q10_from_c`.

        Returns
        -------
        tuple of float
            (Q10, low, high), dimensionless: exp(10·E/(k·T·(T + 10))) at E and at the ends
            of E's interval (Q10 rises with E, so the interval maps directly).
        """
        low_c = self.q10_from_c if t_low_c is None else t_low_c
        values = [
            float(q10_equivalent(e, low_c))
            for e in (self.ea_ev, self.ea_ci_low_ev, self.ea_ci_high_ev)
        ]
        return values[0], values[1], values[2]


def distinct_temperatures(temp_c: npt.ArrayLike, step_c: float = 0.5) -> int:
    """Number of distinct temperatures after rounding to ``step_c`` (°C), dimensionless."""
    values = np.asarray(temp_c, dtype=float)
    values = values[np.isfinite(values)]
    return len(np.unique(np.round(values / step_c)))


def fit_arrhenius(
    temp_c: npt.ArrayLike,
    rate: npt.ArrayLike,
    *,
    t_ref_c: float = 20.0,
    confidence: float = 0.95,
) -> ArrheniusFit | None:
    """Fit the Boltzmann–Arrhenius temperature response of a rate.

    Parameters
    ----------
    temp_c
        Temperature of each rate, °C.
    rate
        Rates, any unit; values that are not positive numbers are left out.
    t_ref_c
        Reference temperature of the fitted rate, °C.
    confidence
        Confidence level of the interval on E, dimensionless (0–1).

    Returns
    -------
    ArrheniusFit or None
        None when fewer than 3 rates at 2 or more distinct temperatures remain.
    """
    t = np.asarray(temp_c, dtype=float)
    r = np.asarray(rate, dtype=float)
    keep = np.isfinite(t) & np.isfinite(r) & (r > 0)
    t, r = t[keep], r[keep]
    if len(t) < 3 or np.ptp(t) <= 0:
        return None
    u = inverse_temperature_ev(t, t_ref_c)
    y = np.log(r)
    n = len(u)
    u_mean, y_mean = u.mean(), y.mean()
    suu = float(np.sum((u - u_mean) ** 2))
    suy = float(np.sum((u - u_mean) * (y - y_mean)))
    ea = suy / suu
    a = float(y_mean - ea * u_mean)
    resid = y - (a + ea * u)
    sse = float(np.sum(resid**2))
    syy = float(np.sum((y - y_mean) ** 2))
    s2 = sse / (n - 2) if n > 2 else math.nan
    var_e = s2 / suu
    var_a = s2 * (1.0 / n + u_mean**2 / suu)
    cov_ae = -u_mean * s2 / suu
    half = float(stats.t.ppf(0.5 + confidence / 2.0, n - 2)) * math.sqrt(var_e)
    return ArrheniusFit(
        n=n,
        n_temperatures=distinct_temperatures(t),
        t_min_c=float(t.min()),
        t_max_c=float(t.max()),
        t_ref_c=float(t_ref_c),
        ln_rate_ref=a,
        ea_ev=float(ea),
        ea_se_ev=math.sqrt(var_e),
        cov=((var_a, cov_ae), (cov_ae, var_e)),
        r2=1.0 - sse / syy if syy > 0 else math.nan,
        confidence=confidence,
        ea_ci_low_ev=float(ea - half),
        ea_ci_high_ev=float(ea + half),
    )


@dataclass(frozen=True, kw_only=True)
class Crossing:
    """Temperature at which respiration overtakes gross production (net production < 0 above).

    Attributes
    ----------
    t_cross_c
        Temperature where the fitted GPP(T) and R(T) are equal, °C.
    ci_low_c, ci_high_c
        Its delta-method confidence interval, °C.
    confidence
        Confidence level, dimensionless.
    extrapolated
        Whether the crossing lies outside the temperatures both fits saw.
    r_overtakes_above
        True when R rises faster than GPP (E_R > E_GPP), so net production turns negative
        above the crossing; False when it turns negative below it.
    """

    t_cross_c: float
    ci_low_c: float
    ci_high_c: float
    confidence: float
    extrapolated: bool
    r_overtakes_above: bool


def _celsius_of_u(u: float, t_ref_c: float) -> float:
    """Temperature (°C) of a Boltzmann inverse temperature u (eV⁻¹); inf beyond absolute heat."""
    inverse = 1.0 / (t_ref_c + ZERO_CELSIUS_K) - BOLTZMANN_EV_PER_K * u
    return 1.0 / inverse - ZERO_CELSIUS_K if inverse > 0 else math.inf


def crossing_temperature(
    gpp: ArrheniusFit, resp: ArrheniusFit, confidence: float = 0.95
) -> Crossing | None:
    """Where two fitted Boltzmann–Arrhenius curves, GPP(T) and R(T), cross.

    Parameters
    ----------
    gpp
        Fit of gross primary production against temperature.
    resp
        Fit of respiration against temperature (same rate unit and ``t_ref_c``).
    confidence
        Confidence level of the interval, dimensionless.

    Returns
    -------
    Crossing or None
        None when the activation energies are equal to within 1e-9 eV (parallel curves never
        cross) or the curves would only meet at no positive absolute temperature.

    Notes
    -----
    ln r_G + E_G·u = ln r_R + E_R·u gives u* = (ln r_R − ln r_G)/(E_G − E_R) and
    T* = 1/(1/T_ref − k·u*). Var(u*) = J·Σ·Jᵀ with J = (−1, −u*, 1, u*)/(E_G − E_R) and Σ the
    block-diagonal covariance of (ln r_G, E_G, ln r_R, E_R); T is monotonic in u, so the
    interval on u maps to one on T.
    """
    if gpp.t_ref_c != resp.t_ref_c:
        raise ValueError("both fits need the same reference temperature")
    diff = gpp.ea_ev - resp.ea_ev
    if abs(diff) <= _PARALLEL_EV:
        return None
    u_star = (resp.ln_rate_ref - gpp.ln_rate_ref) / diff
    t_star = _celsius_of_u(u_star, gpp.t_ref_c)
    if not math.isfinite(t_star):
        return None
    jac_g = np.array([-1.0, -u_star]) / diff
    jac_r = np.array([1.0, u_star]) / diff
    var = float(jac_g @ np.array(gpp.cov) @ jac_g + jac_r @ np.array(resp.cov) @ jac_r)
    half = float(stats.norm.ppf(0.5 + confidence / 2.0)) * math.sqrt(max(var, 0.0))
    low = _celsius_of_u(u_star - half, gpp.t_ref_c)
    high = _celsius_of_u(u_star + half, gpp.t_ref_c)
    lo_seen = max(gpp.t_min_c, resp.t_min_c)
    hi_seen = min(gpp.t_max_c, resp.t_max_c)
    return Crossing(
        t_cross_c=t_star,
        ci_low_c=low,
        ci_high_c=high,
        confidence=confidence,
        extrapolated=not lo_seen <= t_star <= hi_seen,
        r_overtakes_above=resp.ea_ev > gpp.ea_ev,
    )


def light_levels(par: npt.ArrayLike, rel: float = 0.05) -> F:
    """Cluster irradiances into light levels.

    Parameters
    ----------
    par
        Mean PAR (setpoint) of each window, µmol photons m⁻² s⁻¹.
    rel
        A value starts a new level when it exceeds the lowest value of the current level by
        more than this fraction (and by more than 1 µmol photons m⁻² s⁻¹), dimensionless.

    Returns
    -------
    numpy.ndarray
        The level (mean PAR of its members, rounded to 0.1) of each input, µmol photons
        m⁻² s⁻¹; NaN for NaN input.
    """
    values = np.asarray(par, dtype=float)
    out = np.full(len(values), np.nan)
    order = np.argsort(values)
    order = order[np.isfinite(values[order])]
    start = 0
    while start < len(order):
        base = values[order[start]]
        stop = start + 1
        limit = max(base * (1.0 + rel), base + 1.0)
        while stop < len(order) and values[order[stop]] <= limit:
            stop += 1
        members = order[start:stop]
        out[members] = round(float(values[members].mean()), 1)
        start = stop
    return out


@dataclass(frozen=True, kw_only=True)
class LightFit:
    """Jassby & Platt (1976) light-response fit P = Pmax·tanh(I/Ik).

    Attributes
    ----------
    n
        Rates fitted, dimensionless.
    n_levels
        Distinct light levels among them, dimensionless.
    pmax, pmax_se
        Light-saturated rate and its standard error, in the unit of the fitted rates.
    ik, ik_se
        Saturation irradiance and its standard error, µmol photons m⁻² s⁻¹.
    alpha
        Initial slope Pmax/Ik, rate unit per µmol photons m⁻² s⁻¹.
    """

    n: int
    n_levels: int
    pmax: float
    pmax_se: float
    ik: float
    ik_se: float
    alpha: float


def fit_light_response(
    par: npt.ArrayLike, rate: npt.ArrayLike, *, min_levels: int = 3, rel: float = 0.05
) -> LightFit | None:
    """Fit Jassby & Platt's light curve to gross production at several irradiances.

    Parameters
    ----------
    par
        Irradiance of each rate, µmol photons m⁻² s⁻¹.
    rate
        Gross production, any rate unit.
    min_levels
        Fewest distinct light levels (see :func:`light_levels`) to attempt a fit,
        dimensionless.
    rel
        Relative width of a light level, dimensionless.

    Returns
    -------
    LightFit or None
        None with too few levels or when the fit does not converge.

    Notes
    -----
    ``scipy.optimize.curve_fit`` (trust-region reflective, Pmax ≥ 0, Ik > 0); standard errors
    from the diagonal of its covariance, scaled by the residual variance.

    References
    ----------
    Jassby, A. D. & Platt, T. (1976) Limnology and Oceanography 21:540–547.
    """
    x = np.asarray(par, dtype=float)
    y = np.asarray(rate, dtype=float)
    keep = np.isfinite(x) & np.isfinite(y) & (x >= 0)
    x, y = x[keep], y[keep]
    levels = len(np.unique(light_levels(x, rel)))
    if levels < min_levels or len(x) < 3:
        return None

    def model(light: F, pmax: float, ik: float) -> F:
        return np.asarray(jassby_platt(light, pmax, ik))

    start = (max(float(np.max(y)), 1e-9), max(float(np.median(x)), 1.0))
    try:
        params, cov = optimize.curve_fit(
            model, x, y, p0=start, bounds=([0.0, 1e-6], [np.inf, np.inf])
        )
    except (RuntimeError, ValueError):
        return None
    se = np.sqrt(np.diag(cov)) if np.all(np.isfinite(cov)) else np.full(2, np.nan)
    pmax, ik = float(params[0]), float(params[1])
    return LightFit(
        n=len(x),
        n_levels=levels,
        pmax=pmax,
        pmax_se=float(se[0]),
        ik=ik,
        ik_se=float(se[1]),
        alpha=pmax / ik,
    )
