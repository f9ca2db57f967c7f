"""Quantities derived from a compiled protocol, and checks of it against a rig.

Rules
-----
- All integrals are exact integrals of the piecewise-linear channels (no sampling).
- Daily light integral (DLI): PAR integrated over each whole 24 h day counted from the
  experiment start (day 1 = 0..24 h), mol photons m-2 d-1 (µmol -> mol: / 10⁶). A last partial
  day is left out.
- Degree heating days (DHD), °C·d: the time integral of how far a chamber's temperature lies
  ABOVE a reference, only where it is above (no credit for cooler stretches):

  * when the protocol has a control group, the reference is the temperature of the first
    control group in the file (so warming relative to the controls is counted; controls get 0);
  * otherwise it is the baseline of the group's first heatwave or cold spell (``baseline_c``
    or the climatological mean ``seas``), and for groups without such an event their own
    phase program before events (so only event warming counts).

- Rig checks (:func:`check_against_rig`) return findings instead of raising: errors mean the
  rig cannot do what the protocol asks, warnings are worth reading.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from controller.protocol._channel import (
    Channel,
    add,
    constant,
    cumulative_integral,
    maximum,
    window,
)
from controller.protocol._compiled import CompiledProtocol, Finding, Severity
from controller.protocol._models import GroupRole
from controller.protocol._shapes import DAY_S

__all__ = [
    "ChamberSummary",
    "check_against_rig",
    "daily_light_integral",
    "degree_heating_days",
    "peak_temperature",
    "summarize",
]


def daily_light_integral(compiled: CompiledProtocol) -> dict[str, np.ndarray]:
    """Daily light integral of each chamber for each whole 24 h day from the start.

    Parameters
    ----------
    compiled
        The compiled protocol.

    Returns
    -------
    dict of str to numpy.ndarray
        By chamber: DLI of day 1, 2, ..., mol photons m-2 d-1 (empty when the chamber's light
        is uncontrolled or the experiment is shorter than a day).
    """
    days = int(np.floor(compiled.duration_s / DAY_S + 1e-9))
    edges = DAY_S * np.arange(days + 1, dtype=np.float64)
    cache: dict[int, np.ndarray] = {}
    result: dict[str, np.ndarray] = {}
    for chamber, channels in compiled.channels.items():
        par = channels.get("par")
        if par is None or days == 0:
            result[chamber] = np.empty(0)
            continue
        if id(par) not in cache:
            cache[id(par)] = np.diff(cumulative_integral(par, edges)) / 1e6
        result[chamber] = cache[id(par)]
    return result


def _negate(channel: Channel) -> Channel:
    return Channel(channel.t_s, -channel.v)


def _reference(compiled: CompiledProtocol, group: str) -> Channel | None:
    controls = [g for g, role in compiled.roles.items() if role is GroupRole.CONTROL]
    if controls:
        chamber = next(c for c, g in compiled.group_of.items() if g == controls[0])
        return compiled.channels[chamber].get("temperature_c")
    if group in compiled.baselines:
        return compiled.baselines[group]
    return compiled.programs[group].get("temperature_c")


def degree_heating_days(compiled: CompiledProtocol) -> dict[str, float]:
    """Degree heating days of each chamber over the experiment (see module rules).

    Parameters
    ----------
    compiled
        The compiled protocol.

    Returns
    -------
    dict of str to float
        By chamber: ∫ max(T - reference, 0) dt over the experiment, °C·d (NaN when the
        chamber's temperature is uncontrolled).
    """
    result: dict[str, float] = {}
    cache: dict[str, float] = {}
    for chamber, group in compiled.group_of.items():
        if group in cache:
            result[chamber] = cache[group]
            continue
        temperature = compiled.channels[chamber].get("temperature_c")
        reference = _reference(compiled, group)
        if temperature is None or reference is None:
            value = float("nan")
        else:
            excess = maximum([add([temperature, _negate(reference)]), constant(0.0)])
            ends = cumulative_integral(excess, [0.0, compiled.duration_s])
            value = float(ends[1] - ends[0]) / DAY_S
        cache[group] = value
        result[chamber] = value
    return result


def peak_temperature(compiled: CompiledProtocol) -> dict[str, float]:
    """Highest temperature setpoint of each chamber, °C (NaN when uncontrolled)."""
    result: dict[str, float] = {}
    for chamber, channels in compiled.channels.items():
        channel = channels.get("temperature_c")
        result[chamber] = (
            float(window(channel, 0.0, compiled.duration_s).v.max())
            if channel is not None
            else float("nan")
        )
    return result


@dataclass(frozen=True)
class ChamberSummary:
    """Derived numbers of one chamber.

    Attributes
    ----------
    group
        The chamber's group.
    dli_mol_m2_d
        DLI of each whole day, mol photons m-2 d-1.
    dli_min, dli_max
        Range of the daily DLI, mol photons m-2 d-1 (NaN without whole days or light).
    degree_heating_days
        °C·d above the reference (see module rules).
    peak_temperature_c, min_temperature_c
        Extremes of the temperature setpoint, °C.
    """

    group: str
    dli_mol_m2_d: tuple[float, ...]
    dli_min: float
    dli_max: float
    degree_heating_days: float
    peak_temperature_c: float
    min_temperature_c: float


def summarize(compiled: CompiledProtocol) -> dict[str, ChamberSummary]:
    """All derived numbers by chamber (DLI per day and range, DHD, temperature extremes)."""
    dli = daily_light_integral(compiled)
    dhd = degree_heating_days(compiled)
    peak = peak_temperature(compiled)
    result: dict[str, ChamberSummary] = {}
    for chamber, group in compiled.group_of.items():
        days = dli[chamber]
        temperature = compiled.channels[chamber].get("temperature_c")
        low = (
            float(window(temperature, 0.0, compiled.duration_s).v.min())
            if temperature is not None
            else float("nan")
        )
        result[chamber] = ChamberSummary(
            group=group,
            dli_mol_m2_d=tuple(float(d) for d in days),
            dli_min=float(days.min()) if days.size else float("nan"),
            dli_max=float(days.max()) if days.size else float("nan"),
            degree_heating_days=dhd[chamber],
            peak_temperature_c=peak[chamber],
            min_temperature_c=low,
        )
    return result


def _chamber_paths(compiled: CompiledProtocol) -> dict[str, str]:
    counters: dict[str, int] = {}
    paths: dict[str, str] = {}
    for chamber, group in compiled.group_of.items():
        index = counters.get(group, 0)
        counters[group] = index + 1
        paths[chamber] = f"groups.{group}.chambers.{index}"
    return paths


def _limit_findings(
    compiled: CompiledProtocol, chamber: str, group: str, limits: Any
) -> list[Finding]:
    findings: list[Finding] = []
    channels = compiled.channels[chamber]
    temperature = channels.get("temperature_c")
    if temperature is not None:
        slope, t = temperature.max_abs_slope()
        if slope * 3600.0 > limits.max_ramp_c_per_h * (1 + 1e-9):
            findings.append(
                Finding(
                    Severity.ERROR,
                    chamber,
                    compiled.source_at(group, "temperature_c", t),
                    f"temperature changes at up to {slope * 3600:.3g} °C/h (at "
                    f"{t / DAY_S:.3g} d), faster than the chamber follows "
                    f"({limits.max_ramp_c_per_h:g} °C/h)",
                )
            )
        step_times, sizes = temperature.steps()
        if step_times.size:
            k = int(np.argmax(np.abs(sizes)))
            minutes = abs(sizes[k]) / limits.max_ramp_c_per_h * 60.0
            findings.append(
                Finding(
                    Severity.WARNING,
                    chamber,
                    compiled.source_at(group, "temperature_c", float(step_times[k])),
                    f"{step_times.size} instant temperature step(s), the largest "
                    f"{sizes[k]:+.3g} °C at {step_times[k] / DAY_S:.3g} d; at "
                    f"{limits.max_ramp_c_per_h:g} °C/h the chamber needs about "
                    f"{minutes:.0f} min to follow it",
                )
            )
        for value, bad, limit, word in (
            (temperature.v.max(), temperature.v.max() > limits.max_temperature_c,
             limits.max_temperature_c, "above the chamber's highest"),
            (temperature.v.min(), temperature.v.min() < limits.min_temperature_c,
             limits.min_temperature_c, "below the chamber's lowest"),
        ):  # fmt: skip
            if bad:
                k = int(np.argmax(temperature.v == value))
                findings.append(
                    Finding(
                        Severity.ERROR,
                        chamber,
                        compiled.source_at(group, "temperature_c", float(temperature.t_s[k])),
                        f"temperature setpoint {value:.3g} °C is {word} ({limit:g} °C)",
                    )
                )
    for key, limit, unit, name in (
        ("par", limits.max_par, "µmol photons m-2 s-1", "PAR"),
        ("flow_cm_s", limits.max_flow_cm_s, "cm s-1", "flow"),
    ):
        channel = channels.get(key)
        if channel is not None and channel.v.max() > limit * (1 + 1e-9):
            k = int(np.argmax(channel.v))
            findings.append(
                Finding(
                    Severity.ERROR,
                    chamber,
                    compiled.source_at(group, key, float(channel.t_s[k])),
                    f"{name} setpoint reaches {channel.v[k]:.4g} {unit}, above the chamber's "
                    f"maximum ({limit:g} {unit})",
                )
            )
    return findings


def check_against_rig(compiled: CompiledProtocol, rig: Any) -> list[Finding]:
    """Check a compiled protocol against what the rig's chambers can do.

    Parameters
    ----------
    compiled
        The compiled protocol.
    rig
        A :class:`controller.rig.Rig` (chambers with ``id``, ``bath`` and ``limits``).

    Returns
    -------
    list of Finding
        Errors: chambers missing from the rig; temperature ramps faster than
        ``limits.max_ramp_c_per_h``; temperature outside ``min/max_temperature_c``; PAR above
        ``max_par``; flow above ``max_flow_cm_s``; chambers sharing a ``bath`` given different
        temperature programs. Warnings: instant temperature steps. Info: rig chambers the
        protocol does not use.
    """
    findings: list[Finding] = []
    paths = _chamber_paths(compiled)
    known = {chamber.id: chamber for chamber in rig.chambers}
    for chamber, group in compiled.group_of.items():
        if chamber not in known:
            findings.append(
                Finding(
                    Severity.ERROR,
                    chamber,
                    paths[chamber],
                    f"chamber {chamber!r} is not in rig {rig.name!r} (it has {', '.join(known)})",
                )
            )
            continue
        findings += _limit_findings(compiled, chamber, group, known[chamber].limits)
    baths: dict[str, list[str]] = {}
    for chamber in compiled.group_of:
        if chamber in known and known[chamber].bath is not None:
            baths.setdefault(known[chamber].bath, []).append(chamber)
    for bath, members in baths.items():
        first = compiled.channels[members[0]].get("temperature_c")
        differing = [c for c in members[1:] if compiled.channels[c].get("temperature_c") != first]
        if differing:
            groups = sorted({compiled.group_of[c] for c in members})
            findings.append(
                Finding(
                    Severity.ERROR,
                    differing[0],
                    paths[differing[0]],
                    f"chambers {', '.join(members)} share bath {bath!r} (one body of water) but "
                    f"get different temperature programs (groups {', '.join(groups)}); put "
                    "chambers of one bath in one group or give them the same temperature",
                )
            )
    unused = [c for c in known if c not in compiled.group_of]
    if unused:
        findings.append(
            Finding(
                Severity.INFO,
                None,
                None,
                f"rig chambers not used by this protocol: {', '.join(unused)}",
            )
        )
    return findings
