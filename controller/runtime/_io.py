"""The chamber I/O interface the control loop talks to, and the guards around every call.

Rules of this module
--------------------
- The loop sees a rack only through :class:`ChamberIO`: ``read(chamber)`` returns a
  :class:`ChamberReadings`, ``write(chamber, outputs)`` returns whether the devices took the
  command. The simulated rack (:class:`~controller.runtime.SimulatedIO`) and hardware
  transports (Modbus through the register-map codec, the optode line protocol) implement the
  same class, so the loop cannot tell them apart.
- A reading that did not arrive is ``None`` and named in ``ChamberReadings.failed``; a
  device that did not answer makes ``comm_ok`` False. Implementations put every device call
  under ``asyncio.timeout``; the loop bounds every read and write once more by the tick's
  deadline and catches what escapes, so a timeout, a transport error or a bug in a driver
  becomes a stale reading or a failed write, never an exception in the loop.
  ``CancelledError`` is never caught: cancelling the loop still cancels it.
- ``run(ready)`` is the implementation's background work (stepping a simulator, keeping a
  connection, feeding device watchdogs). It sets ``ready`` once reads and writes work, and
  runs until cancelled. ``async with io:`` opens and closes the transports around it, so the
  shutdown path can still write safe outputs after ``run`` has stopped.
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass, field, fields
from enum import StrEnum
from types import TracebackType
from typing import Protocol, Self, runtime_checkable

from controller.control import Outputs

__all__ = ["ChamberIO", "ChamberReadings", "Quantity", "stale_readings"]


class Quantity(StrEnum):
    """What a chamber's devices report; names a reading that failed."""

    TEMPERATURE = "temperature"
    OXYGEN = "oxygen"
    PAR = "par"
    FLOW = "flow"
    LEVEL = "level"
    E_STOP = "e-stop"


_NO_FAILURES: frozenset[Quantity] = frozenset()


@dataclass(frozen=True, slots=True, kw_only=True, init=False)
class ChamberReadings:
    """What one chamber's devices reported at one read.

    A value is ``None`` when it is not fresh: its device did not answer, flagged the input as
    faulty, or (optode) its latest measurement is too old. Quantities that were expected but
    did not arrive are listed in ``failed``; a quantity the chamber has no device for is
    ``None`` without being listed.

    Attributes
    ----------
    chamber
        Chamber identifier.
    t_s
        Clock time of the read, s.
    temperature_c
        Water temperature probe, °C.
    o2_umol_l
        Dissolved oxygen from the optode, µmol L⁻¹.
    o2_sat_pct
        Dissolved oxygen from the optode, % air saturation.
    par
        PAR sensor, µmol photons m⁻² s⁻¹.
    flow_cm_s
        Flow sensor, cm s⁻¹.
    level_ok
        Level switch: True when the water level is good, dimensionless.
    e_stop
        True while the emergency stop is pressed, dimensionless.
    comm_ok
        True when every device exchange of this read succeeded, dimensionless.
    failed
        Quantities that were expected but did not arrive fresh.
    """

    chamber: str
    t_s: float
    temperature_c: float | None = None
    o2_umol_l: float | None = None
    o2_sat_pct: float | None = None
    par: float | None = None
    flow_cm_s: float | None = None
    level_ok: bool | None = None
    e_stop: bool | None = None
    comm_ok: bool = True
    failed: frozenset[Quantity] = field(default_factory=frozenset)

    def __init__(
        self,
        *,
        chamber: str,
        t_s: float,
        temperature_c: float | None = None,
        o2_umol_l: float | None = None,
        o2_sat_pct: float | None = None,
        par: float | None = None,
        flow_cm_s: float | None = None,
        level_ok: bool | None = None,
        e_stop: bool | None = None,
        comm_ok: bool = True,
        failed: frozenset[Quantity] = _NO_FAILURES,
    ) -> None:
        # Built for every chamber at every tick: each slot is set through its own descriptor,
        # which costs half of what a frozen dataclass's __init__ pays per field (a lookup and
        # object.__setattr__); from outside the instance stays frozen (dataclass __setattr__).
        _SET_CHAMBER(self, chamber)
        _SET_T_S(self, t_s)
        _SET_TEMPERATURE_C(self, temperature_c)
        _SET_O2_UMOL_L(self, o2_umol_l)
        _SET_O2_SAT_PCT(self, o2_sat_pct)
        _SET_PAR(self, par)
        _SET_FLOW_CM_S(self, flow_cm_s)
        _SET_LEVEL_OK(self, level_ok)
        _SET_E_STOP(self, e_stop)
        _SET_COMM_OK(self, comm_ok)
        _SET_FAILED(self, failed)

    def fresh(self, quantity: Quantity) -> bool:
        """Whether a quantity arrived fresh in this read.

        Parameters
        ----------
        quantity
            The quantity asked about.

        Returns
        -------
        bool
            True when its value is present and it is not listed in ``failed``, dimensionless.
        """
        value = {
            Quantity.TEMPERATURE: self.temperature_c,
            Quantity.OXYGEN: self.o2_umol_l,
            Quantity.PAR: self.par,
            Quantity.FLOW: self.flow_cm_s,
            Quantity.LEVEL: self.level_ok,
            Quantity.E_STOP: self.e_stop,
        }[quantity]
        return value is not None and quantity not in self.failed


(
    _SET_CHAMBER,
    _SET_T_S,
    _SET_TEMPERATURE_C,
    _SET_O2_UMOL_L,
    _SET_O2_SAT_PCT,
    _SET_PAR,
    _SET_FLOW_CM_S,
    _SET_LEVEL_OK,
    _SET_E_STOP,
    _SET_COMM_OK,
    _SET_FAILED,
) = (getattr(ChamberReadings, f.name).__set__ for f in fields(ChamberReadings))


def stale_readings(chamber: str, t_s: float) -> ChamberReadings:
    """Readings of a chamber whose devices did not answer at all.

    Parameters
    ----------
    chamber
        Chamber identifier.
    t_s
        Clock time of the failed read, s.

    Returns
    -------
    ChamberReadings
        Every value ``None``, ``comm_ok`` False, every quantity failed.
    """
    return ChamberReadings(chamber=chamber, t_s=t_s, comm_ok=False, failed=frozenset(Quantity))


@runtime_checkable
class ChamberIO(Protocol):
    """A rack's devices as the control loop sees them (simulated or real)."""

    @property
    def chambers(self) -> tuple[str, ...]:
        """Chamber identifiers the devices serve, in rig order."""
        ...

    async def __aenter__(self) -> Self:
        """Open the transports."""
        ...

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        """Close the transports."""
        ...

    async def run(self, ready: asyncio.Event) -> None:
        """Do the background work until cancelled.

        Parameters
        ----------
        ready
            Set once reads and writes work; the loop energises nothing before.
        """
        ...

    async def read(self, chamber: str) -> ChamberReadings:
        """Read every device of one chamber, each device call under a timeout.

        Parameters
        ----------
        chamber
            Chamber identifier.

        Returns
        -------
        ChamberReadings
            Fresh values (°C, µmol L⁻¹, % air saturation, µmol photons m⁻² s⁻¹, cm s⁻¹, level
            and E-stop contacts) or None for what did not arrive; never raises for a device
            that fails.
        """
        ...

    async def write(self, chamber: str, outputs: Outputs) -> bool:
        """Drive one chamber's actuators.

        Parameters
        ----------
        chamber
            Chamber identifier.
        outputs
            Heater, chiller, lamp and pump drives, % each.

        Returns
        -------
        bool
            True when the devices took the command, dimensionless.
        """
        ...
