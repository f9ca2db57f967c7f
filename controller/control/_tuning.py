"""Tuning maths: SIMC rules, relay autotuning, first-order-plus-dead-time identification.

Rules of this module
--------------------
- Plants are described by a first-order-plus-dead-time model (FOPDT)
  G(s) = k·e^(−θs)/(τ1·s + 1), held in :class:`Fopdt`. Gains come back as :class:`PidGains`
  in the standard (ISA) form used by :class:`~controller.control.PidParams`.
- Everything is pure arithmetic on numbers or arrays; a relay experiment is analysed from a
  record the caller took, never run from here.
- References: Skogestad (2003) for SIMC; Åström & Hägglund (1984) for the relay method;
  Ziegler & Nichols (1942) for the classic rules. Formulas from memory are marked so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import Enum

import numpy as np
from numpy.typing import ArrayLike

from controller.control._pid import PidParams

__all__ = [
    "Fopdt",
    "PidGains",
    "RelayCycle",
    "ZieglerNicholsRule",
    "fopdt_from_relay",
    "fopdt_from_ultimate",
    "relay_cycle",
    "relay_ultimate_gain",
    "simc",
    "simc_sopdt",
    "ultimate_point",
    "ziegler_nichols",
]


def _positive(value: float, name: str) -> float:
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a finite number above 0, got {value!r}")
    return value


@dataclass(frozen=True, kw_only=True)
class Fopdt:
    """First-order-plus-dead-time plant k·e^(−θs)/(τ1·s + 1).

    Parameters
    ----------
    gain
        Static gain k, output unit per input unit (for example °C per %); not 0.
    tau_s
        Time constant τ1, s, above 0.
    theta_s
        Dead time θ, s, 0 or more.
    """

    gain: float
    tau_s: float
    theta_s: float

    def __post_init__(self) -> None:
        if not math.isfinite(self.gain) or self.gain == 0:
            raise ValueError(f"gain must be finite and not 0, got {self.gain!r}")
        _positive(self.tau_s, "tau_s")
        if not math.isfinite(self.theta_s) or self.theta_s < 0:
            raise ValueError(f"theta_s must be 0 or more, got {self.theta_s!r}")


@dataclass(frozen=True, kw_only=True)
class PidGains:
    """Controller gains in the standard (ISA) form.

    Parameters
    ----------
    kc
        Controller gain, input unit of the plant per output unit (for example % per °C).
    ti_s
        Integral time, s; ``math.inf`` for none.
    td_s
        Derivative time, s; 0 for none.
    """

    kc: float
    ti_s: float
    td_s: float = 0.0

    def params(self, *, out_min: float, out_max: float, **options: float) -> PidParams:
        """Return :class:`PidParams` with these gains, the output limits and options.

        Parameters
        ----------
        out_min
            Lowest output, output unit.
        out_max
            Highest output, output unit.
        **options
            Further :class:`PidParams` fields (``derivative_filter_n``, ...).

        Returns
        -------
        PidParams
            Ready-to-use loop parameters.
        """
        return PidParams(
            kc=self.kc, ti_s=self.ti_s, td_s=self.td_s, out_min=out_min, out_max=out_max, **options
        )


def simc(model: Fopdt, tau_c_s: float | None = None) -> PidGains:
    """SIMC PI tuning of a FOPDT plant (Skogestad 2003).

    Parameters
    ----------
    model
        The plant.
    tau_c_s
        Desired closed-loop time constant τc, s, 0 or more; default θ ("tight" control,
        gain margin about 3). Larger values give slower, more robust loops.

    Returns
    -------
    PidGains
        Kc = τ1/(k·(τc + θ)), τI = min(τ1, 4·(τc + θ)), no derivative.

    References
    ----------
    S. Skogestad, "Simple analytic rules for model reduction and PID controller tuning",
    J. Process Control 13 (2003) 291–309.
    """
    tau_c = model.theta_s if tau_c_s is None else float(tau_c_s)
    if not math.isfinite(tau_c) or tau_c < 0:
        raise ValueError(f"tau_c_s must be 0 or more, got {tau_c_s!r}")
    total = tau_c + model.theta_s
    if total <= 0:
        raise ValueError("tau_c_s + theta_s must be above 0 for SIMC")
    return PidGains(
        kc=model.tau_s / (model.gain * total), ti_s=min(model.tau_s, 4.0 * total), td_s=0.0
    )


def simc_sopdt(
    gain: float, tau1_s: float, tau2_s: float, theta_s: float, tau_c_s: float | None = None
) -> PidGains:
    """SIMC PID tuning of k·e^(−θs)/((τ1·s + 1)(τ2·s + 1)), converted to the ISA form.

    Parameters
    ----------
    gain
        Static gain k, output unit per input unit; not 0.
    tau1_s
        Dominant time constant τ1, s, above 0.
    tau2_s
        Second time constant τ2, s, above 0 (and not above τ1).
    theta_s
        Dead time θ, s, 0 or more.
    tau_c_s
        Desired closed-loop time constant, s; default θ.

    Returns
    -------
    PidGains
        ISA-form gains.

    Notes
    -----
    SIMC gives the series (cascade) form Kc' = τ1/(k(τc + θ)), τI' = min(τ1, 4(τc + θ)),
    τD' = τ2 (Skogestad 2003, from memory). The series form converts to the ISA form with
    f = 1 + τD'/τI': Kc = Kc'·f, Ti = τI'·f, Td = τD'/f (Åström & Hägglund 2006, from memory).
    """
    _positive(tau2_s, "tau2_s")
    if tau2_s > tau1_s:
        raise ValueError("tau2_s must not exceed tau1_s (name the larger one tau1_s)")
    series = simc(Fopdt(gain=gain, tau_s=tau1_s, theta_s=theta_s), tau_c_s)
    f = 1.0 + tau2_s / series.ti_s
    return PidGains(kc=series.kc * f, ti_s=series.ti_s * f, td_s=tau2_s / f)


def relay_ultimate_gain(
    relay_amplitude: float, oscillation_amplitude: float, hysteresis: float = 0.0
) -> float:
    """Ultimate gain from a relay experiment by the describing function.

    Parameters
    ----------
    relay_amplitude
        Relay output amplitude d (half the peak-to-peak swing of the input), input unit.
    oscillation_amplitude
        Amplitude a of the measured oscillation (half its peak-to-peak), output unit.
    hysteresis
        Relay hysteresis ε (switching happens at ±ε around the setpoint), output unit,
        0 or more and below ``oscillation_amplitude``.

    Returns
    -------
    float
        Ku = 4d/(π·√(a² − ε²)), input unit per output unit.

    References
    ----------
    K. J. Åström, T. Hägglund, "Automatic tuning of simple regulators with specifications on
    phase and amplitude margins", Automatica 20 (1984) 645–651 (formula from memory).
    """
    d = _positive(relay_amplitude, "relay_amplitude")
    a = _positive(oscillation_amplitude, "oscillation_amplitude")
    eps = float(hysteresis)
    if not math.isfinite(eps) or eps < 0 or eps >= a:
        raise ValueError("hysteresis must be 0 or more and below the oscillation amplitude")
    return 4.0 * d / (math.pi * math.sqrt(a * a - eps * eps))


class ZieglerNicholsRule(Enum):
    """Which controller the Ziegler–Nichols ultimate-sensitivity rule tunes."""

    P = "p"
    PI = "pi"
    PID = "pid"


def ziegler_nichols(
    ku: float, pu_s: float, rule: ZieglerNicholsRule = ZieglerNicholsRule.PID
) -> PidGains:
    """Ziegler–Nichols ultimate-sensitivity tuning, for comparison with SIMC.

    Parameters
    ----------
    ku
        Ultimate gain, input unit per output unit, above 0.
    pu_s
        Ultimate period, s, above 0.
    rule
        P, PI or PID.

    Returns
    -------
    PidGains
        P: Kc = 0.5Ku. PI: Kc = 0.45Ku, Ti = Pu/1.2. PID: Kc = 0.6Ku, Ti = Pu/2, Td = Pu/8.

    References
    ----------
    J. G. Ziegler, N. B. Nichols, "Optimum settings for automatic controllers",
    Trans. ASME 64 (1942) 759–768 (rules from memory).
    """
    ku = _positive(ku, "ku")
    pu_s = _positive(pu_s, "pu_s")
    if rule is ZieglerNicholsRule.P:
        return PidGains(kc=0.5 * ku, ti_s=math.inf, td_s=0.0)
    if rule is ZieglerNicholsRule.PI:
        return PidGains(kc=0.45 * ku, ti_s=pu_s / 1.2, td_s=0.0)
    return PidGains(kc=0.6 * ku, ti_s=pu_s / 2.0, td_s=pu_s / 8.0)


def ultimate_point(model: Fopdt) -> tuple[float, float]:
    """Ultimate gain and period of a FOPDT plant under proportional control.

    Parameters
    ----------
    model
        The plant, with θ above 0 (without dead time a FOPDT loop never oscillates).

    Returns
    -------
    tuple of float
        ``(ku, pu_s)``: gain (input unit per output unit) and period (s) at which the phase
        of G is −180°: atan(ω·τ1) + ω·θ = π, Ku = √(1 + (ω·τ1)²)/|k|, Pu = 2π/ω.
    """
    tau, theta = model.tau_s, _positive(model.theta_s, "theta_s")
    # The phase rises monotonically in ω from 0; bracket the root in (π/(2θ), π/θ].
    lo, hi = math.pi / (2.0 * theta), math.pi / theta
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if math.atan(mid * tau) + mid * theta < math.pi:
            lo = mid
        else:
            hi = mid
    omega = 0.5 * (lo + hi)
    return math.hypot(1.0, omega * tau) / abs(model.gain), 2.0 * math.pi / omega


def fopdt_from_ultimate(ku: float, pu_s: float, gain: float) -> Fopdt:
    """FOPDT model from the ultimate point and a known static gain.

    Parameters
    ----------
    ku
        Ultimate gain, input unit per output unit, above 0.
    pu_s
        Ultimate period, s, above 0.
    gain
        Static gain k from a step test or the rig's physics, output unit per input unit;
        |k|·Ku must exceed 1.

    Returns
    -------
    Fopdt
        With ω = 2π/Pu: |G(jω)| = 1/Ku gives τ1 = √((k·Ku)² − 1)/ω, and the phase condition
        atan(ω·τ1) + ω·θ = π gives θ = (π − atan(ω·τ1))/ω.

    Notes
    -----
    Fed with Ku from :func:`relay_ultimate_gain`, this inherits the describing function's
    error (the relay oscillation is not a sine). For a relay record prefer
    :func:`fopdt_from_relay`, which is exact for a FOPDT plant.
    """
    ku = _positive(ku, "ku")
    omega = 2.0 * math.pi / _positive(pu_s, "pu_s")
    m = abs(float(gain)) * ku
    if not m > 1.0:
        raise ValueError("|gain|·ku must exceed 1 for a FOPDT model to fit")
    tau = math.sqrt(m * m - 1.0) / omega
    return Fopdt(gain=gain, tau_s=tau, theta_s=(math.pi - math.atan(omega * tau)) / omega)


def fopdt_from_relay(
    relay_amplitude: float,
    oscillation_amplitude: float,
    period_s: float,
    gain: float,
    hysteresis: float = 0.0,
) -> Fopdt:
    """FOPDT model from a symmetric relay limit cycle and a known static gain.

    Parameters
    ----------
    relay_amplitude
        Relay amplitude d, input unit.
    oscillation_amplitude
        Oscillation amplitude a (half of peak-to-peak), output unit.
    period_s
        Oscillation period P, s.
    gain
        Static gain k, output unit per input unit, above 0 (use the relay's sign
        convention so that the loop is negative feedback).
    hysteresis
        Relay hysteresis ε, output unit, 0 or more and below ``a``.

    Returns
    -------
    Fopdt
        The model whose exact limit cycle has this amplitude and period.

    Notes
    -----
    Derived here from the exact time-domain limit cycle rather than the describing
    function. With r = θ/τ1 and K = k·d: after the relay switches at y = +ε, the output
    keeps rising for θ, so a = K − (K − ε)·e^(−r); it then falls to −ε in
    s = τ1·ln((a + K)/(K − ε)). Hence r = ln((K − ε)/(K − a)) and, since P/2 = θ + s,
    τ1 = P/(2·(r + ln((a + K)/(K − ε)))), θ = r·τ1.
    """
    d = _positive(relay_amplitude, "relay_amplitude")
    a = _positive(oscillation_amplitude, "oscillation_amplitude")
    period = _positive(period_s, "period_s")
    k = _positive(gain, "gain")
    eps = float(hysteresis)
    if not math.isfinite(eps) or eps < 0 or eps >= a:
        raise ValueError("hysteresis must be 0 or more and below the oscillation amplitude")
    big_k = k * d
    if a >= big_k:
        raise ValueError("oscillation amplitude must be below gain·relay_amplitude")
    r = math.log((big_k - eps) / (big_k - a))
    tau = period / (2.0 * (r + math.log((a + big_k) / (big_k - eps))))
    return Fopdt(gain=k, tau_s=tau, theta_s=r * tau)


@dataclass(frozen=True, kw_only=True)
class RelayCycle:
    """Amplitude and period measured from a relay experiment.

    Parameters
    ----------
    amplitude
        Half the peak-to-peak swing of the output over the analysed cycles, output unit.
    period_s
        Mean period between rising relay switches, s.
    cycles
        Number of whole cycles analysed.
    """

    amplitude: float
    period_s: float
    cycles: int


def relay_cycle(t_s: ArrayLike, y: ArrayLike, u: ArrayLike, cycles: int = 3) -> RelayCycle:
    """Measure the settled limit cycle of a relay experiment record.

    Parameters
    ----------
    t_s
        Sample times, s, increasing.
    y
        Measured output at those times, output unit.
    u
        Relay output at those times, input unit (two levels).
    cycles
        How many of the last whole cycles to analyse, at least 1.

    Returns
    -------
    RelayCycle
        Amplitude and period of the last ``cycles`` cycles (the first cycles of a relay
        experiment are transients and are skipped).
    """
    t = np.asarray(t_s, dtype=float)
    yy = np.asarray(y, dtype=float)
    uu = np.asarray(u, dtype=float)
    if not (t.shape == yy.shape == uu.shape) or t.ndim != 1:
        raise ValueError("t_s, y and u must be one-dimensional and of equal length")
    if cycles < 1:
        raise ValueError("cycles must be at least 1")
    high = uu > 0.5 * (uu.max() + uu.min())
    rising = np.flatnonzero(~high[:-1] & high[1:]) + 1
    if rising.size < cycles + 1:
        raise ValueError(
            f"the record holds {max(rising.size - 1, 0)} whole relay cycles, need {cycles}"
        )
    first, last = rising[-cycles - 1], rising[-1]
    window = yy[first:last]
    return RelayCycle(
        amplitude=0.5 * float(window.max() - window.min()),
        period_s=float(t[last] - t[first]) / cycles,
        cycles=cycles,
    )
