"""How the rig file says its loops are driven: temperature-loop gains (``[chambers.control]``,
e.g. from ``squall tune``) and the drive curves of lamps and pumps (:class:`DriveCurve`).

Rules of this module
--------------------
- The gains table is optional and additive: a rig without it keeps the gains the runtime derives
  from the rig's thermal description (first-order-plus-dead-time model, SIMC rules).
- Gains belong to a thermal node, as thermal parameters do. A chamber with its own water gives
  them under its own ``[chambers.control]``; the chambers of a shared bath form one loop, so
  every one of them that gives the table must give the same gains (``squall tune --write``
  writes the table to each chamber of the bath). :func:`node_control` returns a node's gains.
- Gains are in the standard (ISA) form u = Kc·(e + (1/Ti)∫e dt + Td·de/dt), with u the
  heater drive in % (negative: cooling) and e in °C, as :class:`~controller.control.PidParams`.
  Cooling is counted in heater-equivalent % (the chiller's drive scaled by heater_max_w /
  chiller_max_w), as ``squall tune`` drives it, so the gains hold on both sides.
- A drive curve is a table of (drive %, delivered quantity) rows measured on the rig
  (``hardware-notes/calibration.md``): it starts at 0 %, ends at 100 %, the drive rises row by
  row and so does the quantity, except for a flat start (a dead band: the pump does not turn,
  the lamp driver does not strike). :func:`check_curve_rows` refuses anything else, each
  problem at its row; :class:`DriveCurve` inverts the table by linear interpolation for the
  feed-forward.
"""

from __future__ import annotations

import math
from bisect import bisect_right
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, NoReturn

from pydantic import Field
from pydantic_core import InitErrorDetails, PydanticCustomError, ValidationError

from controller._model import FileModel
from controller.control import Fopdt, PidParams
from controller.rig._sim import ThermalSim

if TYPE_CHECKING:
    from controller.rig._models import Rig

#: Water temperature at which heat capacities for tuning are evaluated, °C.
_TUNING_TEMPERATURE_C = 20.0

__all__ = [
    "ChamberControl",
    "DriveCurve",
    "check_curve_rows",
    "chiller_ratio",
    "node_control",
    "node_model",
    "raise_at",
]


class ChamberControl(FileModel):
    """Gains of the temperature loop of a chamber's thermal node (``[chambers.control]``)."""

    kc: float = Field(
        gt=0,
        le=1e6,
        description="Controller gain, % heater drive per °C (standard ISA form).",
    )
    ti_s: float = Field(
        gt=0,
        description="Integral time, s (inf for no integral action).",
    )
    td_s: float = Field(0.0, ge=0, le=1e5, description="Derivative time, s (0 for none).")
    tracking_time_s: float | None = Field(
        None,
        gt=0,
        le=1e6,
        description="Anti-windup tracking time, s; absent = a quarter of ti_s (the closed "
        "loop's time scale under the SIMC rules, where ti_s = 4·(τc + θ) for slow plants).",
    )
    period_s: float | None = Field(
        None,
        gt=0,
        le=3600,
        description="Control tick period the gains were tuned for, s (half of it counts as "
        "dead time); absent = not stated.",
    )
    source: str | None = Field(
        None,
        max_length=200,
        description="Where the gains come from, in words (e.g. the tuning run that found them).",
    )

    def params(self, *, out_min: float, out_max: float) -> PidParams:
        """The gains as PID parameters.

        Parameters
        ----------
        out_min, out_max
            Output limits, heater-equivalent %.

        Returns
        -------
        PidParams
            kc (% per °C), ti_s, td_s (s); tracking time ``tracking_time_s`` or, absent, a
            quarter of ti_s (none without integral action).
        """
        tracking = self.tracking_time_s
        if tracking is None and math.isfinite(self.ti_s):
            tracking = self.ti_s / 4.0
        return PidParams(
            kc=self.kc,
            ti_s=self.ti_s,
            td_s=self.td_s,
            out_min=out_min,
            out_max=out_max,
            tracking_time_s=tracking,
        )

    def same_gains(self, other: ChamberControl) -> bool:
        """Whether two tables give the same gains and tick (``source`` may differ).

        Parameters
        ----------
        other
            The other table (no unit).

        Returns
        -------
        bool
            True when kc (% per °C), ti_s (s), td_s (s) and period_s (s) agree to 1e-9
            relative, dimensionless.
        """

        def close(a: float | None, b: float | None) -> bool:
            if a is None or b is None:
                return a is b
            return a == b or math.isclose(a, b, rel_tol=1e-9)

        return (
            close(self.kc, other.kc)
            and close(self.ti_s, other.ti_s)
            and close(self.td_s, other.td_s)
            and close(self.period_s, other.period_s)
        )


def node_control(rig: Rig, members: Sequence[str]) -> ChamberControl | None:
    """The gains the rig file gives for one thermal node, if any.

    Parameters
    ----------
    rig
        A validated rig (chambers of one bath already agree on their gains; no unit).
    members
        Chamber ids of the node: one chamber with its own water, or chambers of one bath
        (no unit).

    Returns
    -------
    ChamberControl or None
        The node's ``[chambers.control]`` (for a bath: that of any of its chambers, since
        they agree), or None when the rig gives none (no unit).
    """
    if not members:
        raise ValueError("a thermal node has at least one chamber")
    first = rig.chamber(members[0])
    if first.bath is None:
        return first.control
    for chamber in rig.chambers:
        if chamber.bath == first.bath and chamber.control is not None:
            return chamber.control
    return None


def raise_at(loc: tuple[str | int, ...], message: str, value: object) -> NoReturn:
    """Raise a validation error at a path below the value being validated.

    A validator of a field or model that raises this gets the error reported at
    ``<its own location>.<loc>``, so the file loader points at the offending key or row
    rather than at the table holding it.

    Parameters
    ----------
    loc
        Keys and 0-based indices below the validated value (no unit).
    message
        What is wrong (no unit).
    value
        The offending input, shown in the error (its own unit).
    """
    raise ValidationError.from_exception_data(
        "rig",
        [InitErrorDetails(type=PydanticCustomError("value_error", message), loc=loc, input=value)],
    )


def _row_error(rows: Sequence[tuple[float, float]], index: int, column: int, message: str) -> None:
    """Raise a validation error located at one cell of a curve table (its row's line)."""
    raise_at((index, column), message, rows[index][column])


def check_curve_rows(rows: Sequence[tuple[float, float]], quantity: str) -> None:
    """Refuse a drive curve table that cannot be inverted.

    Parameters
    ----------
    rows
        (drive %, quantity) rows in file order; bounds of each cell are the model's to check
        (drive 0–100 %, quantity 0 or more, in the quantity's unit).
    quantity
        Name of the delivered quantity with its unit, for messages (e.g. ``"PAR"``).

    Raises
    ------
    pydantic_core.ValidationError
        Located at the offending row (and column): fewer than two rows; first drive not 0 %;
        last drive not 100 %; a drive not above the row before; a quantity below the row
        before, or equal to it after the flat start; the same quantity at 0 % and 100 %.
    """
    if len(rows) < 2:
        raise ValueError("give at least two rows: [0.0, ...] and [100.0, ...]")
    if rows[0][0] != 0.0:
        _row_error(rows, 0, 0, "the first row must be at 0 % drive")
    rising = False
    for i in range(1, len(rows)):
        (d0, v0), (d1, v1) = rows[i - 1], rows[i]
        if d1 <= d0:
            _row_error(rows, i, 0, f"drive {d1:g} % must be above {d0:g} % of the row before")
        if v1 < v0 or (rising and v1 == v0):
            _row_error(
                rows,
                i,
                1,
                f"{quantity} must rise with the drive: {v1:g} at {d1:g} % is not above "
                f"{v0:g} at {d0:g} % (only a flat start, a dead band, may repeat a value)",
            )
        rising = rising or v1 > v0
    if rows[-1][0] != 100.0:
        _row_error(rows, len(rows) - 1, 0, "the last row must be at 100 % drive")
    if not rising:
        _row_error(rows, len(rows) - 1, 1, f"{quantity} at 100 % must be above that at 0 %")


@dataclass(frozen=True, slots=True)
class DriveCurve:
    """Monotone map between an actuator's drive (%) and what it delivers, and its inverse.

    Build it with :meth:`linear` or :meth:`from_rows`; the points kept are strictly rising in
    both coordinates (a flat start is reduced to its last row, the edge of the dead band).

    Attributes
    ----------
    drive_pct
        Drive of each point, %, rising.
    value
        What the actuator delivers at each point (PAR in µmol photons m⁻² s⁻¹, flow in
        cm s⁻¹), rising.
    """

    drive_pct: tuple[float, ...]
    value: tuple[float, ...]

    @classmethod
    def linear(cls, full: float) -> DriveCurve:
        """The straight line from 0 at 0 % to ``full`` at 100 %.

        Parameters
        ----------
        full
            What the actuator delivers at 100 % drive, above 0 (quantity's unit).

        Returns
        -------
        DriveCurve
            Two points.
        """
        if not (math.isfinite(full) and full > 0):
            raise ValueError(f"full must be a finite number above 0, got {full!r}")
        return cls(drive_pct=(0.0, 100.0), value=(0.0, float(full)))

    @classmethod
    def from_rows(cls, rows: Sequence[tuple[float, float]]) -> DriveCurve:
        """The curve of a table that passed :func:`check_curve_rows`.

        Parameters
        ----------
        rows
            (drive %, quantity) rows (quantity's unit).

        Returns
        -------
        DriveCurve
            The rows from the flat start's last row on.
        """
        start = 0
        while start + 1 < len(rows) and rows[start + 1][1] == rows[start][1]:
            start += 1
        kept = rows[start:]
        return cls(
            drive_pct=tuple(float(d) for d, _ in kept), value=tuple(float(v) for _, v in kept)
        )

    @property
    def full(self) -> float:
        """What the actuator delivers at 100 % drive (quantity's unit)."""
        return self.value[-1]

    def drive_for(self, value: float) -> float:
        """Feed-forward drive for a setpoint.

        Parameters
        ----------
        value
            Wanted quantity (its unit).

        Returns
        -------
        float
            Drive, %: 0 for a setpoint of 0 or less, else interpolated on the curve and held
            between the curve's first drive (the dead band's edge) and 100 %.
        """
        if value <= 0.0:
            return 0.0
        drive = self.equivalent_drive(value)
        edge = self.drive_pct[0]
        # min(100, max(edge, drive)), written out: the builtins' call costs more than the test
        drive = drive if drive > edge else edge
        return drive if drive < 100.0 else 100.0

    def equivalent_drive(self, value: float) -> float:
        """The drive that would deliver a quantity, extended straight beyond the table.

        Used for a measured quantity, so a trim loop on it sees errors in % of drive with the
        same gain everywhere on the curve (and keeps seeing them past either end).

        Parameters
        ----------
        value
            Quantity (its unit).

        Returns
        -------
        float
            Drive, %, not clipped.
        """
        xs, ys = self.value, self.drive_pct
        last = len(xs) - 1
        if last == 1:  # a straight line: its one segment, whichever side the value is
            k = 1
        else:
            k = bisect_right(xs, value)
            k = 1 if k < 1 else last if k > last else k
        x0, x1, y0, y1 = xs[k - 1], xs[k], ys[k - 1], ys[k]
        return y0 + (value - x0) * (y1 - y0) / (x1 - x0)

    def value_at(self, drive_pct: float) -> float:
        """What the curve says the actuator delivers at a drive.

        Parameters
        ----------
        drive_pct
            Drive, %, 0–100.

        Returns
        -------
        float
            Quantity (its unit): interpolated; below the curve's first drive (inside a dead
            band) the value of the flat start.
        """
        xs, ys = self.drive_pct, self.value
        if drive_pct < xs[0]:
            return ys[0]
        k = min(max(bisect_right(xs, drive_pct), 1), len(xs) - 1)
        x0, x1, y0, y1 = xs[k - 1], xs[k], ys[k - 1], ys[k]
        return y0 + (drive_pct - x0) * (y1 - y0) / (x1 - x0)


def _rho_cp_j_l_k(salinity: float) -> float:
    """Volumetric heat capacity of water at the tuning temperature, J L⁻¹ K⁻¹ (TEOS-10)."""
    import gsw  # only a run or a tuning needs it, not reading a rig file

    sr = gsw.SR_from_SP(salinity)
    t = _TUNING_TEMPERATURE_C
    return float(gsw.rho_t_exact(sr, t, 0.0) * gsw.cp_t_exact(sr, t, 0.0) / 1000.0)


def _node_thermal(rig: Rig, members: Sequence[str]) -> ThermalSim:
    """Thermal description of the node holding these chambers (bath's or chamber's own)."""
    first = rig.chamber(members[0])
    if first.bath is not None:
        bath = rig.bath(first.bath)
        return bath.thermal if bath is not None else ThermalSim()
    return first.sim.thermal or ThermalSim()


def node_model(rig: Rig, members: Sequence[str], period_s: float) -> Fopdt:
    """First-order-plus-dead-time model of one thermal node from the rig's description.

    Parameters
    ----------
    rig
        The rig.
    members
        Chamber ids in the node (one chamber, or every chamber of one bath).
    period_s
        Control tick period, s (half of it is added to the dead time).

    Returns
    -------
    Fopdt
        Gain (°C per % heater drive) = heater_max_w / 100 / UA; time constant (s) = heat
        capacity of the node's water / UA; dead time (s) = actuator dead time + the slowest
        probe's lag + half a tick.

    Notes
    -----
    The heat balance C·dT/dt = P − UA·(T − T_room) is first order with gain 1/UA and time
    constant C/UA. A first-order probe lag much shorter than C/UA is folded into the dead
    time (Skogestad 2003, half rule with the lag as the neglected small time constant).
    """
    chambers = [rig.chamber(c) for c in members]
    first = chambers[0]
    thermal = _node_thermal(rig, members)
    if first.bath is not None:
        bath = rig.bath(first.bath)
        every = [c for c in rig.chambers if c.bath == first.bath]
        capacity = sum(c.water_volume_l * _rho_cp_j_l_k(c.salinity) for c in every)
        if bath is not None:
            capacity += bath.water_volume_l * _rho_cp_j_l_k(bath.salinity)
    else:
        capacity = first.water_volume_l * _rho_cp_j_l_k(first.salinity)
    probe_lag_s = max(c.sim.sensors.temperature_tau_s for c in chambers)
    return Fopdt(
        gain=thermal.heater_max_w / 100.0 / thermal.ua_w_k,
        tau_s=capacity / thermal.ua_w_k,
        theta_s=thermal.dead_time_s + probe_lag_s + period_s / 2.0,
    )


def chiller_ratio(rig: Rig, members: Sequence[str]) -> float:
    """How strong the node's chiller is against its heater.

    Parameters
    ----------
    rig
        The rig (no unit).
    members
        Chamber ids of one thermal node (no unit).

    Returns
    -------
    float
        chiller_max_w / heater_max_w of the node's thermal description, dimensionless (1
        for a node without heater power, where the ratio means nothing).
    """
    thermal = _node_thermal(rig, members)
    return thermal.chiller_max_w / thermal.heater_max_w if thermal.heater_max_w > 0 else 1.0
