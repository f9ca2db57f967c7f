"""What the control loop needs to know per run, per thermal node and per chamber.

Rules of this module
--------------------
- :class:`RunSettings` holds the run-wide choices (tick period, timeouts, tuning aggressiveness,
  which heaters are on/off devices). :func:`plan_control` turns a rig, the protocol's chambers
  and those settings into a :class:`ControlPlan`: one :class:`NodeSettings` per thermal node
  (a chamber with its own water, or a shared bath with every protocol chamber in it) and one
  :class:`ChamberSettings` per protocol chamber. Everything here is pure and frozen.
- Temperature gains come from the rig file's ``[chambers.control]`` when it gives them (e.g.
  from ``squall tune``; tracking time a quarter of Ti unless given), else from the rig's
  description of each node (heater power, heat-loss coefficient, water volumes, dead time,
  probe lag): a first-order-plus-dead-time model (:func:`~controller.rig.node_model`), tuned
  by the SIMC rules (Skogestad 2003). The sampling delay of a zero-order hold adds half a
  period to the dead time (Skogestad's half rule).
  The anti-windup tracking time is the closed loop's own time scale, τc + θ: a heater that
  saturates for many minutes (a large setpoint step) must not leave an integral behind that
  overshoots; the default of the PID step (Tt = Ti) is four times slower and lets a 5 °C step
  overshoot by almost 0.4 °C on the example rig (bench/bench_control.py).
- The PID output is heater-equivalent drive: +100 % is the full heater, cooling is counted
  in the heater's watts, so full cooling is −100 · chiller_max_w / heater_max_w and the
  chiller's drive is the cooling demand scaled by heater_max_w / chiller_max_w
  (:meth:`NodeSettings.split`). The loop gain is then the same on both sides of the split;
  with the chiller's own % as output a chiller four times the heater would see four times
  the loop gain the gains were tuned for. ``squall tune`` drives the relay the same way.
- Interlock limits come from the chamber's limits with a margin: a protocol may hold a
  chamber at its limit, and probe noise there must not trip it. Time-based limits never go
  below a few ticks, so one missed reply does not trip a chamber. The rig file's
  ``[chambers.interlocks]`` replaces any of them (:mod:`controller.rig._interlocks`).
- Lamps and pumps are driven by feed-forward through their drive curve: the rig file's
  measured table when given (``[chambers.lamp] drive_pct_par``, ``[chambers.pump]
  drive_pct_flow_cm_s``), else a straight line (0 % → 0, 100 % → the chamber's ``max_par`` /
  ``max_flow_cm_s``). A slow PI trim on the PAR or flow sensor corrects it; the trim works
  in % of drive, on the sensor reading passed back through the curve, so its loop gain is
  the same all along a curved lamp (and equals the old PAR-unit trim on a straight line).
- The closed-incubation cycle of a chamber (:func:`incubation_settings`) takes each setting
  from the protocol's ``[incubation]`` table, else the rig's, else the built-in default of
  :class:`~controller.control.IncubationSettings`. One pump both flushes a chamber and makes
  the flow over its community, so a closed chamber has neither: the flow setpoint applies
  while the chamber is open.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from enum import Enum
from types import MappingProxyType
from typing import TYPE_CHECKING

from controller.control import (
    Condition,
    ConditionPolicy,
    Fopdt,
    IncubationSettings,
    InterlockLimits,
    PidParams,
    simc,
    split_range,
)
from controller.errors import SquallError
from controller.rig import ChamberInterlocks, DriveCurve, Rig, node_control
from controller.rig._control import chiller_ratio, node_model
from controller.rig._interlocks import derived_limits, merged_policies

if TYPE_CHECKING:
    from controller.protocol import Protocol

__all__ = [
    "ChamberSettings",
    "ControlPlan",
    "GainSource",
    "NodeSettings",
    "RunSettings",
    "incubation_settings",
    "node_model",
    "plan_control",
]

_log = logging.getLogger(__name__)


def _positive(value: float, name: str) -> None:
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a finite number above 0, got {value!r}")


@dataclass(frozen=True, kw_only=True)
class RunSettings:
    """Run-wide choices of the control loop.

    Parameters
    ----------
    period_s
        Control tick period, s.
    read_timeout_s
        Longest wait for one chamber's read, s.
    write_timeout_s
        Longest wait for one chamber's write, s.
    ready_timeout_s
        Longest wait for the devices to become ready before the first tick, s.
    commit_interval_s
        Run-log commit interval in clock time, s (bounds the data a crash loses); default
        half a second on a real-time clock (so with ticks of 1 s or more every tick is
        committed and a crash loses at most the tick in progress), scaled by the speed of a
        simulated clock, and 600 s simulated on one that runs as fast as possible (well under
        a second of wall time).
    tau_c_factor
        SIMC closed-loop time constant as a multiple of the dead time, dimensionless
        (1 = "tight" control, larger = smoother and more robust).
    split_deadband_pct
        Half-width of the heater/chiller dead band around zero demand, %.
    on_off_heaters
        Thermal nodes (bath or chamber ids) whose heater is an on/off device driven by
        time-proportioning.
    on_off_cycle_s
        Time-proportioning cycle, s.
    on_off_min_switch_s
        Shortest on or off pulse of an on/off heater, s.
    trip_margin_c
        Distance of the temperature trip limits outside the chamber's limits, °C.
    lamp_trim_kc, flow_trim_kc
        Proportional gain of the PAR and flow trims, dimensionless (% of drive per % of
        drive, the reading passed back through the actuator's curve; on a straight line the
        same as PAR per PAR or flow per flow).
    trim_ti_s
        Integral time of the PAR and flow trims, s; default the larger of 60 s and four
        tick periods (slower than the lamp's warm-up, stable at any period).
    late_after_s
        Lateness beyond which a tick counts as late, s; default a tenth of the period.
    policies
        Interlock policy overrides for every chamber (level, latching, safe outputs).
    """

    period_s: float = 10.0
    read_timeout_s: float = 2.0
    write_timeout_s: float = 2.0
    ready_timeout_s: float = 30.0
    commit_interval_s: float | None = None
    tau_c_factor: float = 1.0
    split_deadband_pct: float = 2.0
    on_off_heaters: frozenset[str] = frozenset()
    on_off_cycle_s: float = 120.0
    on_off_min_switch_s: float = 10.0
    trip_margin_c: float = 1.0
    lamp_trim_kc: float = 0.3
    flow_trim_kc: float = 0.3
    trim_ti_s: float | None = None
    late_after_s: float | None = None
    policies: Mapping[Condition, ConditionPolicy] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in (
            "period_s",
            "read_timeout_s",
            "write_timeout_s",
            "ready_timeout_s",
            "tau_c_factor",
            "on_off_cycle_s",
            "lamp_trim_kc",
            "flow_trim_kc",
        ):
            _positive(getattr(self, name), name)
        if self.commit_interval_s is not None and not (
            math.isfinite(self.commit_interval_s) and self.commit_interval_s >= 0
        ):
            raise ValueError(f"commit_interval_s must be 0 or more, got {self.commit_interval_s!r}")
        for name in ("trip_margin_c", "on_off_min_switch_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be 0 or more, got {value!r}")
        if self.read_timeout_s >= self.period_s or self.write_timeout_s >= self.period_s:
            raise ValueError("read and write timeouts must be shorter than the tick period")
        if self.on_off_min_switch_s > self.on_off_cycle_s / 2:
            raise ValueError("on_off_min_switch_s must be at most half of on_off_cycle_s")
        if not 0 <= self.split_deadband_pct < 100:
            raise ValueError("split_deadband_pct must be in [0, 100)")
        if self.late_after_s is not None:
            _positive(self.late_after_s, "late_after_s")
        if self.trim_ti_s is not None:
            _positive(self.trim_ti_s, "trim_ti_s")
        object.__setattr__(self, "policies", MappingProxyType(dict(self.policies)))

    def commit_interval_for(self, speed: float | None) -> float:
        """Commit interval in clock time for a clock of this speed.

        Parameters
        ----------
        speed
            Clock seconds per real second (1 for real time); None for as fast as possible.

        Returns
        -------
        float
            Commit interval, s of clock time.
        """
        if self.commit_interval_s is not None:
            return self.commit_interval_s
        return 600.0 if speed is None else 0.5 * max(1.0, speed)

    @property
    def trim_integral_s(self) -> float:
        """Integral time of the PAR and flow trims, s."""
        return max(60.0, 4.0 * self.period_s) if self.trim_ti_s is None else self.trim_ti_s

    @property
    def lateness_limit_s(self) -> float:
        """Lateness beyond which a tick counts as late, s."""
        return self.period_s / 10.0 if self.late_after_s is None else self.late_after_s


class GainSource(Enum):
    """Where a thermal node's temperature gains come from."""

    RIG = "rig"  # the rig file's [chambers.control]
    SIMC = "simc"  # derived from the thermal description by the SIMC rules


@dataclass(frozen=True, kw_only=True)
class NodeSettings:
    """One temperature loop: a chamber's own water, or a bath shared by several chambers.

    Attributes
    ----------
    name
        Bath id, or the chamber id of a chamber with its own water.
    chambers
        Protocol chambers in this water, rig order; their probes are averaged.
    driver
        Chamber whose I/O module carries the node's heater and chiller (the first of the
        bath's chambers in rig order, whether or not the protocol uses it).
    model
        The plant model of the thermal description (°C per % heater drive, s, s).
    pid
        Gains and output limits in heater-equivalent % (100 % full heating, −100 ·
        chiller_max_w / heater_max_w full cooling).
    max_ramp_c_per_h
        Fastest setpoint change, °C h⁻¹ (the slowest member's limit).
    heater_on_off
        Whether the heater is an on/off device (time-proportioned).
    gains
        Where ``pid``'s gains come from.
    chiller_ratio
        chiller_max_w / heater_max_w of the node, dimensionless (1 when the chiller is as
        strong as the heater; 0 for a node without cooling).
    """

    name: str
    chambers: tuple[str, ...]
    driver: str
    model: Fopdt
    pid: PidParams
    max_ramp_c_per_h: float
    heater_on_off: bool
    gains: GainSource = GainSource.SIMC
    chiller_ratio: float = 1.0

    def split(self, output_pct: float, deadband_pct: float) -> tuple[float, float]:
        """Heater and chiller drives for a PID output.

        Parameters
        ----------
        output_pct
            PID output, heater-equivalent %.
        deadband_pct
            Half-width of the band around zero demand where both stay off, % of each
            actuator's drive.

        Returns
        -------
        tuple of float
            ``(heater_pct, chiller_pct)``, each 0–100 %: the chiller's drive is the cooling
            demand divided by ``chiller_ratio``, so a watt of demand is a watt either side.
        """
        ratio = self.chiller_ratio
        if output_pct >= 0.0 or ratio <= 0.0:
            u = output_pct if output_pct > 0.0 else 0.0  # max(0.0, output_pct)
        else:
            u = output_pct / ratio
        if not (-100.0 < u < 100.0 and 0.0 <= deadband_pct < 100.0):
            return split_range(u, deadband_pct)  # clips to ±100 %, or names the bad input
        # split_range(u, deadband_pct) for a u inside ±100 % (every tick's case), written out:
        # the same arithmetic without its input checks and clipping
        if u > deadband_pct:
            drive = 100.0 * (u - deadband_pct) / (100.0 - deadband_pct)
            return (drive if drive < 100.0 else 100.0), 0.0
        if u < -deadband_pct:
            drive = 100.0 * (-u - deadband_pct) / (100.0 - deadband_pct)
            return 0.0, (drive if drive < 100.0 else 100.0)
        return 0.0, 0.0


@dataclass(frozen=True, kw_only=True)
class ChamberSettings:
    """Per-chamber settings of the loop.

    Attributes
    ----------
    chamber
        Chamber identifier.
    node
        Name of the chamber's thermal node.
    interlocks
        Interlock limits and policies.
    lamp_curve
        Lamp drive (%) against PAR (µmol photons m⁻² s⁻¹): the rig's table or a straight line.
    pump_curve
        Pump drive (%) against flow (cm s⁻¹): the rig's table or a straight line.
    lamp_trim
        PI trim of the lamp on the PAR sensor (output in % of drive), or None for open loop.
    flow_trim
        PI trim of the pump on the flow sensor (output in % of drive), or None for open loop.
    """

    chamber: str
    node: str
    interlocks: InterlockLimits
    lamp_curve: DriveCurve
    pump_curve: DriveCurve
    lamp_trim: PidParams | None
    flow_trim: PidParams | None

    @property
    def par_full(self) -> float:
        """PAR at 100 % lamp drive, µmol photons m⁻² s⁻¹."""
        return self.lamp_curve.full

    @property
    def flow_full_cm_s(self) -> float:
        """Flow at 100 % pump drive, cm s⁻¹."""
        return self.pump_curve.full

    def lamp_drive_pct(self, par: float | None, *, reading: bool = False) -> float | None:
        """Feed-forward lamp drive for a PAR setpoint, or the drive a PAR reading stands for.

        Parameters
        ----------
        par
            PAR setpoint (or, with ``reading``, measured PAR), µmol photons m⁻² s⁻¹, or None.
        reading
            True for a measurement: the drive that would give it, straight on beyond the
            curve's ends (what the trim compares with the feed-forward).

        Returns
        -------
        float or None
            Drive, % (a setpoint of 0 or less gives 0), or None when ``par`` is None.
        """
        if par is None:
            return None
        return self.lamp_curve.equivalent_drive(par) if reading else self.lamp_curve.drive_for(par)

    def pump_drive_pct(self, flow_cm_s: float | None, *, reading: bool = False) -> float | None:
        """Feed-forward pump drive for a flow setpoint, or the drive a flow reading stands for.

        Parameters
        ----------
        flow_cm_s
            Flow setpoint (or, with ``reading``, measured flow), cm s⁻¹, or None.
        reading
            True for a measurement, as for :meth:`lamp_drive_pct`.

        Returns
        -------
        float or None
            Drive, % (0 for no flow, else at least the dead band's edge), or None.
        """
        if flow_cm_s is None:
            return None
        curve = self.pump_curve
        return curve.equivalent_drive(flow_cm_s) if reading else curve.drive_for(flow_cm_s)


@dataclass(frozen=True, kw_only=True)
class ControlPlan:
    """Everything the loop needs about the rig for one protocol.

    Attributes
    ----------
    settings
        The run-wide settings.
    nodes
        Thermal nodes of the protocol's chambers, in rig order of their first chamber.
    chambers
        Per protocol chamber, in rig order.
    idle
        Rig chambers the protocol does not use; they are kept off.
    incubation
        Closed-incubation cycle settings of the chambers that cycle (others never close).
    """

    settings: RunSettings
    nodes: tuple[NodeSettings, ...]
    chambers: Mapping[str, ChamberSettings]
    idle: tuple[str, ...]
    incubation: Mapping[str, IncubationSettings] = field(
        default_factory=lambda: MappingProxyType({})
    )

    @property
    def drivers(self) -> Mapping[str, NodeSettings]:
        """Node by the chamber that carries its heater and chiller."""
        return {node.driver: node for node in self.nodes}


def _interlocks(
    rig: Rig, index: int, s: RunSettings, table: ChamberInterlocks | None
) -> InterlockLimits:
    """The chamber's interlock limits: derived from its limits, then the rig file's values."""
    derived = derived_limits(
        rig.chambers[index].limits,
        trip_margin_c=s.trip_margin_c,
        period_s=s.period_s,
        policies=merged_policies(table, s.policies),
    )
    if table is None:
        return derived
    return table.apply(derived, period_s=s.period_s, where=f"chambers.{index}.interlocks")


def _node_pid(
    rig: Rig, members: Sequence[str], model: Fopdt, s: RunSettings, out_min: float
) -> tuple[PidParams, GainSource]:
    """The node's PID: the rig file's gains when it gives them, else SIMC on the model."""
    given = node_control(rig, members)
    if given is None:
        tau_c = s.tau_c_factor * model.theta_s
        gains = simc(model, tau_c)
        pid = gains.params(out_min=out_min, out_max=100.0, tracking_time_s=tau_c + model.theta_s)
        return pid, GainSource.SIMC
    if given.period_s is not None and not 0.5 <= given.period_s / s.period_s <= 2.0:
        _log.warning(
            "node %s: the rig's gains were tuned for a %g s tick, this run ticks every %g s",
            members[0],
            given.period_s,
            s.period_s,
        )
    return given.params(out_min=out_min, out_max=100.0), GainSource.RIG


def plan_control(
    rig: Rig,
    chambers: Sequence[str],
    settings: RunSettings,
    incubation: Mapping[str, IncubationSettings] | None = None,
) -> ControlPlan:
    """Build the control plan for the protocol's chambers on a rig.

    Parameters
    ----------
    rig
        The rig (every chamber in ``chambers`` must be in it).
    chambers
        The protocol's chamber ids.
    settings
        Run-wide settings.
    incubation
        Closed-incubation cycle settings by chamber (see :func:`incubation_settings`);
        default none: no chamber closes.

    Returns
    -------
    ControlPlan
        Nodes, chambers (both in rig order) and the idle rig chambers.
    """
    wanted = set(chambers)
    missing = wanted - {c.id for c in rig.chambers}
    if missing:
        raise KeyError(f"chambers not in the rig: {', '.join(sorted(missing))}")
    groups: dict[str, list[str]] = {}
    driver: dict[str, str] = {}
    for chamber in rig.chambers:
        name = chamber.bath if chamber.bath is not None else chamber.id
        driver.setdefault(name, chamber.id)
        if chamber.id in wanted:
            groups.setdefault(name, []).append(chamber.id)
    nodes: list[NodeSettings] = []
    for name, members in groups.items():
        model = node_model(rig, members, settings.period_s)
        ratio = chiller_ratio(rig, members)
        pid, source = _node_pid(rig, members, model, settings, -100.0 * ratio)
        _log.info(
            "node %s: kc %.4g %%/°C, Ti %.4g s, Td %.4g s (%s)",
            name,
            pid.kc,
            pid.ti_s,
            pid.td_s,
            "rig file [chambers.control]"
            if source is GainSource.RIG
            else "SIMC on the rig's thermal description",
        )
        nodes.append(
            NodeSettings(
                name=name,
                chambers=tuple(members),
                driver=driver[name],
                model=model,
                pid=pid,
                max_ramp_c_per_h=min(rig.chamber(c).limits.max_ramp_c_per_h for c in members),
                heater_on_off=name in settings.on_off_heaters,
                gains=source,
                chiller_ratio=ratio,
            )
        )
    node_of = {c: node.name for node in nodes for c in node.chambers}
    per_chamber: dict[str, ChamberSettings] = {}
    trim = settings.trim_integral_s
    for index, chamber in enumerate(rig.chambers):
        if chamber.id not in wanted:
            continue
        lim = chamber.limits
        per_chamber[chamber.id] = ChamberSettings(
            chamber=chamber.id,
            node=node_of[chamber.id],
            interlocks=_interlocks(rig, index, settings, chamber.interlocks),
            lamp_curve=chamber.lamp.curve() or DriveCurve.linear(lim.max_par or 1.0),
            pump_curve=chamber.pump.curve() or DriveCurve.linear(lim.max_flow_cm_s or 1.0),
            lamp_trim=PidParams(kc=settings.lamp_trim_kc, ti_s=trim, out_min=-50.0, out_max=50.0),
            flow_trim=PidParams(kc=settings.flow_trim_kc, ti_s=trim, out_min=-50.0, out_max=50.0),
        )
    idle = tuple(c.id for c in rig.chambers if c.id not in wanted)
    cycling = dict(incubation or {})
    strays = set(cycling) - wanted
    if strays:
        raise KeyError(f"incubation settings for chambers not in the run: {sorted(strays)}")
    return ControlPlan(
        settings=settings,
        nodes=tuple(nodes),
        chambers=MappingProxyType(per_chamber),
        idle=idle,
        incubation=MappingProxyType(cycling),
    )


#: Protocol [incubation] key -> (rig [incubation] key, IncubationSettings field).
_INCUBATION_KEYS = {
    "o2_low_pct": ("o2_low_pct", "o2_low_pct"),
    "o2_high_pct": ("o2_high_pct", "o2_high_pct"),
    "min_closed": ("min_closed_s", "min_closed_s"),
    "max_closed": ("max_closed_s", "max_closed_s"),
    "flush": ("flush_s", "flush_s"),
    "settle": ("settle_s", "settle_s"),
    "pinned_to_light": ("pinned_to_light", "pinned_to_light"),
    "reclose_margin_pct": ("reclose_margin_pct", "reclose_margin_pct"),
    "light_threshold_par": ("light_threshold_par", "light_threshold_par"),
}


def incubation_settings(
    protocol: Protocol, rig: Rig, chambers: Sequence[str]
) -> dict[str, IncubationSettings]:
    """The closed-incubation cycle of each protocol chamber that cycles.

    Parameters
    ----------
    protocol
        The validated protocol; its ``[incubation]`` table (if any) wins setting by setting.
    rig
        The rig; its ``[incubation]`` table gives the defaults (and switches the cycle on for
        protocols without a table of their own).
    chambers
        The protocol's chamber ids.

    Returns
    -------
    dict
        Settings by chamber id (band in % air saturation, durations in s); empty when neither
        file asks for the cycle or the protocol sets ``enabled = false``.

    Raises
    ------
    SquallError
        The merged settings contradict each other (e.g. the protocol's low edge above the
        rig's high edge), with the field ``incubation``.
    """
    table, default = protocol.incubation, rig.incubation
    if (table is None and default is None) or (table is not None and not table.enabled):
        return {}
    values: dict[str, object] = {}
    for key, (rig_key, name) in _INCUBATION_KEYS.items():
        value = getattr(table, key) if table is not None else None
        if value is None and default is not None:
            value = getattr(default, rig_key)
        if value is not None:
            values[name] = value
    try:
        merged = IncubationSettings(**values)  # type: ignore[arg-type]
    except ValueError as exc:
        where = "the protocol's [incubation] with the rig's defaults" if default else ""
        raise SquallError(f"{exc}{f' ({where})' if where else ''}", field="incubation") from None
    chosen = table.chambers if table is not None and table.chambers is not None else chambers
    return {c: merged for c in chambers if c in set(chosen)}
