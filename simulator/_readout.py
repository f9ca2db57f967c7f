"""Every chamber's sensors read in one call: the readings, noise and errors of reading them
one by one, at the cost of one call to the noise generator and some float arithmetic.

Rules of this module
--------------------
- :func:`sweep` gives exactly what calling the rack's ``read_temperature``, ``read_par``,
  ``read_flow``, ``read_level_ok`` and (where asked) ``read_optode`` on each chamber in turn
  would give: the same values and the same draws from the rack's generator, in the same
  order. A chamber that a sensor fault touches (dropout, stuck, drift, spikes), or one whose
  device is silent, is read through those very methods, in its place in the order; the
  chambers between such ones are read in groups.
- Within a group, the Gaussian draws the chambers would take one by one (noise whose standard
  deviation is above 0: temperature, PAR, flow, then optode oxygen and optode temperature)
  are drawn in one ``standard_normal`` call, which gives the very numbers of the one-by-one
  calls, and taken where each reading would have taken them. The rest is plain floats with
  the one-by-one reads' arithmetic in its order (8 chambers are too few for numpy to pay),
  and the O2 saturation is :func:`controller.science.oxygen.solubility_umol_l_scalar`, the
  very function the one-by-one optode read uses.
- An error other than :class:`~simulator.SensorNoReply` (the O2 solubility refuses a
  temperature outside −5 … 50 °C) ends that chamber's reading where a one-by-one read would
  have ended it; the error is handed back for that chamber and the others are read on.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, NamedTuple

from controller.rig import FaultKind
from controller.science.oxygen import solubility_umol_l_scalar
from simulator._types import SensorNoReply

if TYPE_CHECKING:
    from simulator._rack import Rack

__all__ = ["Sweep", "sweep"]


@dataclass(frozen=True, slots=True)
class Sweep:
    """Readings of several chambers, one list entry per chamber asked for, in that order.

    Attributes
    ----------
    temperature_c
        Temperature probe, °C; None when the probe did not reply.
    par
        PAR sensor, µmol photons m⁻² s⁻¹; None when silent.
    flow_cm_s
        Flow sensor, cm s⁻¹; None when silent.
    level_ok
        Level switch, dimensionless (True: level good).
    o2_umol_l
        Optode oxygen, µmol L⁻¹; None when the optode was not asked or did not reply.
    o2_sat_pct
        Optode oxygen, % air saturation at the optode's temperature reading; None likewise.
    errors
        The exception (other than a silent sensor) that ended a chamber's reading, else None;
        the values such a chamber read before it stay in the other lists.
    """

    temperature_c: list[float | None]
    par: list[float | None]
    flow_cm_s: list[float | None]
    level_ok: list[bool | None]
    o2_umol_l: list[float | None]
    o2_sat_pct: list[float | None]
    errors: list[Exception | None]


def _touched(rack: Rack, indices: Sequence[int], optode: Sequence[bool]) -> list[bool]:
    """Which chambers must be read one by one (a sensor fault or a silent device)."""
    book = rack._book
    if not book.active:  # no fault at all: every device answers, no sensor is faulted
        return [False] * len(indices)
    hit: set[int] = set()
    for entry in book.active:
        if entry.fault.sensor is not None and entry.fault.kind is not FaultKind.COMM_TIMEOUT:
            hit.update(entry.chambers)
    return [
        i in hit or book.comm_down(i, "modbus") or (ask and book.comm_down(i, "optode"))
        for i, ask in zip(indices, optode, strict=True)
    ]


def _one(rack: Rack, cid: str, ask_optode: bool, out: Sweep, k: int) -> None:
    """Read one chamber through the rack's own methods, into slot ``k`` of ``out``."""

    def value(reader: Callable[[str], float]) -> float | None:
        try:
            return float(reader(cid))
        except SensorNoReply:
            return None

    try:
        out.temperature_c[k] = value(rack.read_temperature)
        out.par[k] = value(rack.read_par)
        out.flow_cm_s[k] = value(rack.read_flow)
        out.level_ok[k] = rack.read_level_ok(cid)
        if ask_optode:
            try:
                reading = rack.read_optode(cid)
            except SensorNoReply:
                return
            out.o2_umol_l[k] = reading.o2_umol_l
            out.o2_sat_pct[k] = reading.o2_sat_pct
    except Exception as error:  # ends this chamber's reading, as a one-by-one read would
        out.errors[k] = error


class _Sensors(NamedTuple):
    """One chamber's sensor constants as plain floats."""

    temp_sd: float  # probe noise, °C
    flow_sd: float  # flow noise, cm s⁻¹
    o2_sd: float  # optode noise, µmol L⁻¹
    temp_off: float  # probe offset, °C
    o2_off: float  # optode offset, µmol L⁻¹
    drift: float  # optode drift, µmol L⁻¹ s⁻¹
    par_frac: float  # PAR noise, fraction of the reading
    cold: float  # output share of a cold lamp
    warm_gain: float  # 1 − cold
    salinity: float  # PSS-78
    volume_l: float  # full water volume, L
    draws: int  # Gaussian draws of temperature and flow (PAR's depend on the reading)
    optode_draws: int  # Gaussian draws of an optode read (O2, then its temperature)


@dataclass(frozen=True, slots=True)
class _Consts:
    """Sensor constants of a rack as plain floats, one :class:`_Sensors` per chamber in rig
    order.

    Built once per rack from its resolved parameters, which never change after the rack is
    built: nothing invalidates it.
    """

    chambers: list[_Sensors]
    level_alarm_frac: float  # level switch trips above this share lost
    pressure_kpa: float


def _consts(rack: Rack) -> _Consts:
    """The rack's sensor constants, built on the first sweep and kept on the rack."""
    found = rack._sweep_consts
    if not isinstance(found, _Consts):
        p = rack._p
        columns = zip(
            p.temperature_noise_c.tolist(),
            p.flow_noise_cm_s.tolist(),
            p.optode_noise_umol_l.tolist(),
            p.temperature_offset_c.tolist(),
            p.optode_offset_umol_l.tolist(),
            p.optode_drift_umol_l_per_s.tolist(),
            p.par_noise_frac.tolist(),
            p.cold_output_frac.tolist(),  # [7]
            p.salinity.tolist(),
            p.volume_l.tolist(),
            strict=True,
        )
        chambers = []
        for values in columns:
            temp_sd, flow_sd, o2_sd = values[:3]
            chambers.append(
                _Sensors(
                    *values[:8],
                    1.0 - values[7],
                    *values[8:],
                    (temp_sd > 0.0) + (flow_sd > 0.0),
                    (o2_sd > 0.0) + (temp_sd > 0.0),
                )
            )
        found = rack._sweep_consts = _Consts(
            chambers=chambers,
            level_alarm_frac=float(p.level_alarm_frac),
            pressure_kpa=float(p.pressure_kpa),
        )
    return found


def _group(rack: Rack, indices: list[int], ask: list[bool], out: Sweep, slots: list[int]) -> None:
    """Read chambers without sensor faults at once, into ``slots`` of ``out``.

    Plain floats, chamber by chamber, with the arithmetic of the one-by-one reads in their
    order (``noisy`` and ``fault_offset``, the latter adding 0.0); only the Gaussian draws
    are taken at once, in the order those reads take them.
    """
    c = _consts(rack)
    sensors = c.chambers
    water = rack._water
    probe_c = water.probe_c.tolist()
    warmth = water.warmth.tolist()
    par_warm = rack._par_warm.tolist()
    t_s = rack._t
    # Pass 1: the true values and how many draws each chamber takes.
    trues: list[tuple[_Sensors, float, float, float]] = []
    count = 0
    for i, asked in zip(indices, ask, strict=True):
        one = sensors[i]
        par = par_warm[i] * (one.cold + one.warm_gain * warmth[i])  # Rack._par_now
        par_sd = one.par_frac * par
        trues.append((one, probe_c[i] + one.temp_off, par, par_sd))
        count += one.draws + (par_sd > 0.0) + (one.optode_draws if asked else 0)
    z = rack._rng.standard_normal(count).tolist() if count else []
    # Pass 2: the readings, taking the draws in order.
    k = 0
    alarm = c.level_alarm_frac
    flow_cm_s = rack._act.flow_cm_s
    volume = rack._volume.tolist()
    optode_c = water.optode_umol_l.tolist() if any(ask) else []
    temperatures, pars, flows, levels = out.temperature_c, out.par, out.flow_cm_s, out.level_ok
    for j, i in enumerate(indices):
        slot = slots[j]
        one, probe, par, par_sd = trues[j]
        sd = one.temp_sd
        if sd > 0.0:
            temperature = probe + sd * z[k]
            k += 1
        else:
            temperature = probe
        if par_sd > 0.0:
            par = par + par_sd * z[k]
            k += 1
        flow = flow_cm_s[i]
        if one.flow_sd > 0.0:
            flow = flow + one.flow_sd * z[k]
            k += 1
        temperatures[slot] = temperature + 0.0
        par += 0.0
        pars[slot] = 0.0 if 0.0 > par else par  # max(par, 0.0) as the builtin decides it
        flow += 0.0
        flows[slot] = 0.0 if 0.0 > flow else flow
        levels[slot] = 1.0 - volume[i] / one.volume_l < alarm
        if not ask[j]:
            continue
        o2 = optode_c[i] + one.o2_off
        o2 += one.drift * t_s
        if one.o2_sd > 0.0:
            o2 = o2 + one.o2_sd * z[k]
            k += 1
        o2 += 0.0
        o2 = 0.0 if 0.0 > o2 else o2
        optode_temp = probe
        if sd > 0.0:
            optode_temp = probe + sd * z[k]
            k += 1
        try:
            sat = solubility_umol_l_scalar(optode_temp, one.salinity, c.pressure_kpa)
        except Exception as error:  # ends this chamber's reading, as a one-by-one read would
            out.errors[slot] = error
            continue
        out.o2_umol_l[slot] = o2
        out.o2_sat_pct[slot] = 100.0 * o2 / sat


def sweep(rack: Rack, chamber_ids: Sequence[str], optode: Sequence[bool]) -> Sweep:
    """Read several chambers' sensors at once (see the module's rules).

    Parameters
    ----------
    rack
        The rack, brought up to date with its commands.
    chamber_ids
        Chambers to read, in the order the one-by-one reads would take.
    optode
        Per chamber, whether to read its optode too, dimensionless.

    Returns
    -------
    Sweep
        Readings (°C, µmol photons m⁻² s⁻¹, cm s⁻¹, level, µmol L⁻¹, % saturation) and errors.
    """
    n = len(chamber_ids)
    out = Sweep([None] * n, [None] * n, [None] * n, [None] * n, [None] * n, [None] * n, [None] * n)
    index = rack._index
    try:
        indices = [index[cid] for cid in chamber_ids]
    except KeyError as missing:
        raise KeyError(f"no chamber {missing.args[0]!r} in this rack") from None
    asks = [bool(ask) for ask in optode]
    if len(asks) != n:
        raise ValueError(f"{n} chambers but {len(asks)} optode flags")
    if not rack._book.active:  # no fault at all: one group of every chamber
        _group(rack, indices, asks, out, list(range(n)))
        return out
    touched = _touched(rack, indices, asks)
    start = 0
    for stop in [*(k for k in range(n) if touched[k]), n]:
        if stop > start:
            _group(rack, indices[start:stop], asks[start:stop], out, list(range(start, stop)))
        if stop < n:
            _one(rack, chamber_ids[stop], asks[stop], out, stop)
        start = stop + 1
    return out
