"""Every chamber's sensors read in one call: the readings, noise and errors of reading them
one by one, at the cost of a few array operations.

Rules of this module
--------------------
- :func:`sweep` gives exactly what calling the rack's ``read_temperature``, ``read_par``,
  ``read_flow``, ``read_level_ok`` and (where asked) ``read_optode`` on each chamber in turn
  would give: the same values and the same draws from the rack's generator, in the same
  order. A chamber that a sensor fault touches (dropout, stuck, drift, spikes), or one whose
  device is silent, is read through those very methods, in its place in the order; the
  chambers between such ones are read in vectorised groups.
- Within a group, the Gaussian draws the chambers would take one by one (noise whose standard
  deviation is above 0: temperature, PAR, flow, then optode oxygen and optode temperature)
  are drawn in one ``standard_normal`` call, which gives the very numbers of the one-by-one
  calls, and put back where each reading would have taken them.
- An error other than :class:`~simulator.SensorNoReply` (the O2 solubility refuses a
  temperature outside −5 … 50 °C) ends that chamber's reading where a one-by-one read would
  have ended it; the error is handed back for that chamber and the others are read on.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from controller.rig import FaultKind
from controller.science.oxygen import solubility
from simulator._science import saturation_umol_l
from simulator._types import SensorNoReply

if TYPE_CHECKING:
    from simulator._rack import Rack

__all__ = ["Sweep", "sweep"]

F = NDArray[np.float64]
Idx = NDArray[np.intp]

_SAT_MIN_C = -5.0  # the solubility's accepted temperature range, °C
_SAT_MAX_C = 50.0


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


@dataclass(frozen=True, slots=True)
class _Consts:
    """What does not change between sweeps of one group of chambers (indexed once)."""

    temp_sd: F  # probe noise, °C
    flow_sd: F  # flow noise, cm s⁻¹
    o2_sd: F  # optode noise, µmol L⁻¹
    need: NDArray[np.bool_]  # which of the 5 readings draw noise (PAR column: filled per sweep)
    temp_off: F
    o2_off: F
    drift: F
    par_frac: F
    salinity: F
    volume_l: F


def _consts(rack: Rack, idx: Idx) -> _Consts:
    """The group's constants, cached on the rack's sweep cache by chamber indices."""
    key = idx.tobytes()
    cache = rack._sweep_cache
    found = cache.get(key)
    if not isinstance(found, _Consts):
        p = rack._p
        temp_sd = p.temperature_noise_c[idx]
        flow_sd = p.flow_noise_cm_s[idx]
        o2_sd = p.optode_noise_umol_l[idx]
        need = np.stack((temp_sd, temp_sd, flow_sd, o2_sd, temp_sd), axis=1) > 0.0
        found = cache[key] = _Consts(
            temp_sd=temp_sd,
            flow_sd=flow_sd,
            o2_sd=o2_sd,
            need=need,
            temp_off=p.temperature_offset_c[idx],
            o2_off=p.optode_offset_umol_l[idx],
            drift=p.optode_drift_umol_l_per_s[idx],
            par_frac=p.par_noise_frac[idx],
            salinity=p.salinity[idx],
            volume_l=p.volume_l[idx],
        )
    return found


def _group(rack: Rack, idx: Idx, ask: NDArray[np.bool_], out: Sweep, slots: list[int]) -> None:
    """Read chambers without sensor faults at once, into ``slots`` of ``out``."""
    c = _consts(rack, idx)
    water = rack._water
    par_true = rack._par_now()[idx]
    par_sd = c.par_frac * par_true
    need = c.need.copy()
    need[:, 1] = par_sd > 0.0
    if not ask.all():
        need[:, 3:] &= ask[:, None]
    count = int(need.sum())
    probe = water.probe_c[idx] + c.temp_off
    o2_true = water.optode_umol_l[idx] + c.o2_off
    o2_true += c.drift * rack._t
    true = np.empty(need.shape)
    true[:, 0] = probe
    true[:, 1] = par_true
    true[:, 2] = rack._act.flow_cm_s[idx]
    true[:, 3] = o2_true
    true[:, 4] = probe
    if count:
        sds = np.empty(need.shape)
        sds[:, 0] = c.temp_sd
        sds[:, 1] = par_sd
        sds[:, 2] = c.flow_sd
        sds[:, 3] = c.o2_sd
        sds[:, 4] = c.temp_sd
        z = np.zeros(need.shape)
        z[need] = rack._rng.standard_normal(count)  # row-major: chamber by chamber
        noisy = np.where(need, true + sds * z, true)
    else:
        noisy = true
    noisy[:, :4] += 0.0  # what sensor faults add: nothing (one by one, -0.0 became 0.0 too)
    temperature = noisy[:, 0].tolist()
    par = np.maximum(noisy[:, 1], 0.0).tolist()
    flow = np.maximum(noisy[:, 2], 0.0).tolist()
    lost = 1.0 - rack._volume[idx] / c.volume_l
    level = (lost < rack._p.level_alarm_frac).tolist()
    o2 = np.maximum(noisy[:, 3], 0.0)
    sat, failures = _saturation(noisy[:, 4], c.salinity, rack._p.pressure_kpa, ask)
    pct = (100.0 * o2 / sat).tolist()
    o2_list = o2.tolist()
    for j, k in enumerate(slots):
        out.temperature_c[k] = temperature[j]
        out.par[k] = par[j]
        out.flow_cm_s[k] = flow[j]
        out.level_ok[k] = level[j]
        if failures[j] is not None:
            out.errors[k] = failures[j]
        elif ask[j]:
            out.o2_umol_l[k] = o2_list[j]
            out.o2_sat_pct[k] = pct[j]


def _saturation(
    temp_c: F, salinity: F, pressure_kpa: float, ask: NDArray[np.bool_]
) -> tuple[F, list[Exception | None]]:
    """Air saturation at the optodes' temperature readings (µmol L⁻¹), and per chamber the
    error the solubility raised for it (only chambers whose optode was asked count)."""
    failures: list[Exception | None] = [None] * len(temp_c)
    inside = (temp_c >= _SAT_MIN_C) & (temp_c <= _SAT_MAX_C)
    if bool(inside[ask].all()):
        safe = np.where(ask, temp_c, 20.0)  # unasked optodes: any valid temperature
        return np.asarray(solubility(safe, salinity, pressure_kpa, unit="umol/L")), failures
    sat = np.ones(len(temp_c))
    for j in np.flatnonzero(ask):
        try:
            sat[j] = float(saturation_umol_l(float(temp_c[j]), float(salinity[j]), pressure_kpa))
        except Exception as error:
            failures[j] = error
    return sat, failures


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
    indices = []
    for cid in chamber_ids:
        if cid not in index:
            raise KeyError(f"no chamber {cid!r} in this rack")
        indices.append(index[cid])
    touched = _touched(rack, indices, optode)
    start = 0
    for stop in [*(k for k in range(n) if touched[k]), n]:
        if stop > start:
            slots = list(range(start, stop))
            idx = np.array(indices[start:stop], dtype=np.intp)
            _group(rack, idx, np.array(optode[start:stop], dtype=bool), out, slots)
        if stop < n:
            _one(rack, chamber_ids[stop], optode[stop], out, stop)
        start = stop + 1
    return out
