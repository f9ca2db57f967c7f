"""One tick's decisions: readings and setpoints in, outputs, alarms and interlock events out.

Rules of this module
--------------------
- No I/O, no clock, no asyncio: :class:`Decider` keeps the loop's memory (interlock, PID,
  rate-limiter, time-proportioning and trim states) and :meth:`Decider.decide` is called once
  per tick with what was read and the protocol's setpoints at that time.
- Order within a tick: interlocks of every chamber first (independently of control), then one
  temperature loop per thermal node, then lamps and pumps per chamber. A chamber whose
  interlocks force outputs gets exactly the forced outputs; a thermal node's heater and
  chiller take the lowest forced value of any of its chambers (one trip in a bath makes the
  whole bath's heating safe). Loops that are overridden track the applied output, so control
  resumes without a bump.
- Temperature: the node's measurement is the mean of its chambers' fresh, plausible probe
  readings. The setpoint applied to the PID starts at the measured temperature and moves
  toward the protocol's setpoint no faster than the node's ramp limit. The PID output
  (−100 … 100 %) is split into heater and chiller drives; an on/off heater is
  time-proportioned. Without a fresh measurement the last output is held until the stale
  interlock takes over. An uncontrolled temperature (no setpoint) leaves heater and chiller
  off; so do uncontrolled light and flow for lamps and pumps.
- The heater and chiller commands go to the node's driver chamber; the node's other chambers
  are sent 0 % for them (and their log rows show the node's drives, which heat their water).
- Closed incubation: after the interlocks, each chamber with a cycle
  (:func:`~controller.control.cycle_step`) learns its fresh O2 reading, whether its light is
  on (PAR setpoint above the cycle's threshold), the schedule look-ahead the loop passes in
  and whether its outputs are forced. A closed chamber's pump is off (its flow trim is frozen
  meanwhile, so the flow comes back without a bump); a forced chamber gets the forced pump,
  and its window ends with reason ``alarm``.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass

from controller.control import (
    ClosedWindow,
    Condition,
    CycleInputs,
    IncubationStatus,
    InterlockEvent,
    InterlockState,
    Outputs,
    SafetyState,
    WindowEnd,
    cycle_step,
    end_window,
    time_proportion_step,
)
from controller.runtime._decide_state import ChamberMemory, NodeMemory
from controller.runtime._io import ChamberReadings, Quantity
from controller.runtime._settings import ControlPlan

__all__ = ["OFF", "ChamberDecision", "Decider", "Decision", "Schedule", "Target"]

_log = logging.getLogger(__name__)

OFF = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)
"""Every actuator off (idle chambers), %."""


@dataclass(frozen=True, slots=True, kw_only=True)
class Target:
    """The protocol's setpoints for one chamber at one tick (None = uncontrolled).

    Attributes
    ----------
    temperature_c
        Water temperature, °C.
    par
        PAR, µmol photons m⁻² s⁻¹.
    flow_cm_s
        Flow, cm s⁻¹.
    """

    temperature_c: float | None
    par: float | None
    flow_cm_s: float | None


@dataclass(frozen=True, kw_only=True)  # no slots: Decider.decide fills its __dict__
class ChamberDecision:
    """What was decided for one protocol chamber.

    Attributes
    ----------
    outputs
        Drives of the chamber's water and its own lamp and pump, % (heater and chiller are
        the node's).
    alarm
        The most severe holding interlock condition, or None.
    safety
        The chamber's interlock state.
    setpoint_c
        Temperature setpoint applied to the node's PID after rate limiting, °C, or None.
    incubation
        The chamber's incubation status after this tick, or None when it does not cycle.
    """

    outputs: Outputs
    alarm: Condition | None
    safety: SafetyState
    setpoint_c: float | None
    incubation: IncubationStatus | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class Schedule:
    """What the incubation cycles learn about the protocol at one tick.

    Attributes
    ----------
    phase
        Phase in force.
    phase_ends_in_s
        Protocol time until the phase ends, s.
    light_change_in_s
        Protocol time until each cycling chamber's light next switches, s (``inf`` if never).
    """

    phase: str
    phase_ends_in_s: float
    light_change_in_s: Mapping[str, float]


@dataclass(frozen=True, slots=True, kw_only=True)
class Decision:
    """The outcome of one tick.

    Attributes
    ----------
    writes
        Outputs to send, by chamber (protocol chambers and idle drivers of a node), %.
    chambers
        Per protocol chamber, what was decided.
    events
        Interlock events of this tick, with their chamber.
    windows
        Closed incubation windows that ended at this tick, with their chamber.
    """

    writes: Mapping[str, Outputs]
    chambers: Mapping[str, ChamberDecision]
    events: tuple[tuple[str, InterlockEvent], ...]
    windows: tuple[tuple[str, ClosedWindow], ...] = ()


class Decider:
    """The loop's memory and per-tick decisions.

    Parameters
    ----------
    plan
        Nodes, chambers and settings of the run.

    Notes
    -----
    Settings the ticks need are taken from ``plan`` once, here. The plan is frozen and
    :attr:`plan` cannot be replaced, so nothing taken from it can go stale.
    """

    def __init__(self, plan: ControlPlan) -> None:
        self._plan = plan
        drivers = frozenset(plan.drivers)
        self._chambers = {
            c: ChamberMemory(c, cs, c in plan.incubation, c in drivers)
            for c, cs in plan.chambers.items()
        }
        self._order = tuple(self._chambers.values())  # rig order
        self._nodes = tuple(
            NodeMemory(n, tuple(self._chambers[c] for c in n.chambers)) for n in plan.nodes
        )
        for node in self._nodes:
            for member in node.members:
                member.node = node
        self._idle_drivers = tuple(  # an idle chamber carries the bath's heater
            (n.settings.driver, n) for n in self._nodes if n.settings.driver not in plan.chambers
        )
        # cycling chambers: their pump is decided after their cycle's step
        self._cycling = tuple(c for c in self._order if c.cycle is not None)
        # what each tick's passes over the chambers read, in rig order (all fixed objects)
        self._inputs = tuple((c, c.name, c.interlock, c.lamp, c.pump) for c in self._order)
        self._outputs = tuple((c, c.name, c.interlock, c.node, c.driver) for c in self._order)
        settings = plan.settings
        self._deadband_pct = settings.split_deadband_pct
        self._period_s = settings.period_s
        self._last_t_s: float | None = None

    @property
    def plan(self) -> ControlPlan:
        """Nodes, chambers and settings of the run (read-only)."""
        return self._plan

    def note_write(self, chamber: str, ok: bool) -> None:
        """Record whether the latest write to a chamber arrived.

        Parameters
        ----------
        chamber
            Chamber identifier (idle chambers are ignored).
        ok
            Whether the devices took the command, dimensionless; a failed write counts as a
            communication problem at the next tick.
        """
        state = self._chambers.get(chamber)
        if state is not None:
            state.write_ok = ok

    def stop_outputs(self, chamber: str) -> Outputs:
        """Outputs to leave a protocol chamber in when the run stops.

        Parameters
        ----------
        chamber
            Protocol chamber identifier.

        Returns
        -------
        Outputs
            The chamber's default safe state, lowered further by whatever its interlocks
            force at the latest tick (a leak keeps the pump off), % each.
        """
        safe = self._chambers[chamber].limits.safe_outputs()
        force = self._chambers[chamber].force
        if force is None:
            return safe
        return Outputs(
            heater_pct=min(safe.heater_pct, force.heater_pct),
            chiller_pct=min(safe.chiller_pct, force.chiller_pct),
            lamp_pct=min(safe.lamp_pct, force.lamp_pct),
            pump_pct=min(safe.pump_pct, force.pump_pct),
        )

    def interlock_state(self, chamber: str) -> InterlockState:
        """The interlock state of a protocol chamber after the latest tick.

        Parameters
        ----------
        chamber
            Protocol chamber identifier.

        Returns
        -------
        InterlockState
            Condition states, overall safety and the interlocks' memory (times in s).
        """
        return self._chambers[chamber].interlock.state

    def incubation(self, chamber: str) -> IncubationStatus | None:
        """The incubation status of a protocol chamber after the latest tick.

        Parameters
        ----------
        chamber
            Protocol chamber identifier.

        Returns
        -------
        IncubationStatus or None
            Open or closed; None when the chamber does not cycle.
        """
        cycle = self._chambers[chamber].cycle
        return None if cycle is None else cycle.status

    def acknowledge(
        self, chamber: str, condition: Condition, t_s: float
    ) -> tuple[InterlockEvent, ...]:
        """Acknowledge one interlock condition of a chamber (an operator action).

        Parameters
        ----------
        chamber
            Protocol chamber identifier.
        condition
            The condition acknowledged.
        t_s
            Clock time, s.

        Returns
        -------
        tuple of InterlockEvent
            The acknowledgement event(s).

        Raises
        ------
        IllegalInterlockEvent
            Nothing to acknowledge; the state is unchanged.
        """
        return self._chambers[chamber].interlock.acknowledge(condition, t_s)

    def end_windows(
        self, t_s: float, reason: WindowEnd, detail: str = ""
    ) -> tuple[tuple[str, ClosedWindow], ...]:
        """End every closed window now and restart the flush of every cycling chamber.

        Parameters
        ----------
        t_s
            Clock time, s.
        reason
            Why (operator, end of the run).
        detail
            Words for the log.

        Returns
        -------
        tuple
            (chamber, window) of the windows that were closed, clock times in s.
        """
        ended: list[tuple[str, ClosedWindow]] = []
        for chamber, state in self._chambers.items():
            if state.cycle is not None:
                step = end_window(state.cycle, t_s, reason, detail)
                state.cycle = step.state
                if step.window is not None:
                    ended.append((chamber, step.window))
        return tuple(ended)

    def decide(
        self,
        readings: Mapping[str, ChamberReadings],
        targets: Mapping[str, Target],
        t_s: float,
        schedule: Schedule | None = None,
    ) -> Decision:
        """Decide one tick.

        Parameters
        ----------
        readings
            This tick's readings of every protocol chamber.
        targets
            The protocol's setpoints of every protocol chamber at this tick.
        t_s
            Clock time of the tick, s (not before the previous tick).
        schedule
            Phase and look-ahead for the incubation cycles (protocol time in s); without it
            the cycles stand still.

        Returns
        -------
        Decision
            Outputs to write, per-chamber decisions, interlock events and ended windows.
        """
        last_t_s = self._last_t_s
        dt_s = self._period_s if last_t_s is None else t_s - last_t_s
        if 1e-6 > dt_s:  # max(dt_s, 1e-6), NaN kept as max keeps it
            dt_s = 1e-6
        self._last_t_s = t_s
        events: list[tuple[str, InterlockEvent]] = []
        forcing = False  # whether any chamber's outputs are forced this tick
        # Interlocks of every chamber, and with them each chamber's lamp and pump: an
        # actuator's drive depends only on its own chamber's forced outputs, its setpoint,
        # its sensor and its own trim, so it can be decided as soon as the chamber's
        # interlocks are. A cycling chamber's pump waits for its cycle's step (below).
        for ch, name, interlock, lamp, pump in self._inputs:
            reading = readings[name]
            happened = interlock.evaluate(
                reading.temperature_c,
                reading.level_ok,
                reading.comm_ok and ch.write_ok,
                reading.e_stop,
                t_s,
            )
            if happened:
                events.extend((name, event) for event in happened)
            force = ch.force = interlock.force
            if force is not None:
                forcing = True
                ch.lamp_pct, ch.pump_pct = force.lamp_pct, force.pump_pct
            else:
                target = targets[name]
                ch.lamp_pct = lamp.drive(target.par, reading.par, dt_s)
                if ch.cycle is None:
                    ch.pump_pct = pump.drive(target.flow_cm_s, reading.flow_cm_s, dt_s)
        windows = self._cycles(readings, targets, t_s, schedule)
        closed = IncubationStatus.CLOSED
        for ch in self._cycling:
            if ch.force is None:
                if ch.cycle is not None and ch.cycle.status is closed:
                    ch.pump_pct = 0.0  # flushing pump off; the trim waits for the window's end
                else:
                    name = ch.name
                    ch.pump_pct = ch.pump.drive(
                        targets[name].flow_cm_s, readings[name].flow_cm_s, dt_s
                    )
        for node in self._nodes:
            self._node(node, readings, targets, t_s, dt_s, forcing)
        # Outputs and ChamberDecision built as Outputs.unchecked builds outputs: every drive
        # is clipped or from checked outputs, the other fields are the decider's own values,
        # so nothing needs the checks of __init__; written out here, as a call each would
        # cost more than the building.
        writes: dict[str, Outputs] = {}
        decided: dict[str, ChamberDecision] = {}
        new = object.__new__
        for ch, name, interlock, node, driver in self._outputs:
            lamp, pump, cycle = ch.lamp_pct, ch.pump_pct, ch.cycle
            shown = new(Outputs)
            fields = shown.__dict__  # filled in place: a frozen instance refuses writes
            fields["heater_pct"] = node.heater
            fields["chiller_pct"] = node.chiller
            fields["lamp_pct"] = lamp
            fields["pump_pct"] = pump
            decision = new(ChamberDecision)
            fields = decision.__dict__
            fields["outputs"] = shown
            fields["alarm"] = interlock.alarm
            fields["safety"] = interlock.safety
            fields["setpoint_c"] = node.shown_setpoint_c
            fields["incubation"] = None if cycle is None else cycle.status
            decided[name] = decision
            if driver:
                writes[name] = shown
            else:
                own = writes[name] = new(Outputs)
                fields = own.__dict__
                fields["heater_pct"] = 0.0
                fields["chiller_pct"] = 0.0
                fields["lamp_pct"] = lamp
                fields["pump_pct"] = pump
        unchecked = Outputs.unchecked  # the node's drives are clipped
        for driver, node in self._idle_drivers:
            writes[driver] = unchecked(node.heater, node.chiller, 0.0, 0.0)
        return Decision(writes=writes, chambers=decided, events=tuple(events), windows=windows)

    def _cycles(
        self,
        readings: Mapping[str, ChamberReadings],
        targets: Mapping[str, Target],
        t_s: float,
        schedule: Schedule | None,
    ) -> tuple[tuple[str, ClosedWindow], ...]:
        """Step every chamber's incubation cycle; return the windows that ended."""
        if schedule is None:
            return ()
        ended: list[tuple[str, ClosedWindow]] = []
        for chamber, settings in self._plan.incubation.items():
            state = self._chambers[chamber]
            assert state.cycle is not None
            reading, par = readings[chamber], targets[chamber].par
            o2 = reading.o2_sat_pct if reading.fresh(Quantity.OXYGEN) else None
            step = cycle_step(
                state.cycle,
                CycleInputs(
                    t_s=t_s,
                    o2_sat_pct=o2,
                    light=par is not None and par > settings.light_threshold_par,
                    light_change_in_s=schedule.light_change_in_s.get(chamber, math.inf),
                    phase=schedule.phase,
                    phase_ends_in_s=schedule.phase_ends_in_s,
                    forced=state.force is not None,
                ),
                settings,
            )
            state.cycle = step.state
            if step.window is not None:
                ended.append((chamber, step.window))
        return tuple(ended)

    def _node(
        self,
        node: NodeMemory,
        readings: Mapping[str, ChamberReadings],
        targets: Mapping[str, Target],
        t_s: float,
        dt_s: float,
        forcing: bool,
    ) -> None:
        """Set the node's heater and chiller drives (%) and shown setpoint (°C) of this tick;
        ``forcing``: whether any chamber's outputs are forced this tick."""
        lone = node.lone
        if lone is not None:  # a chamber's own water: its probe and its setpoint
            name, low, high = lone
            value = readings[name].temperature_c
            # math.fsum([value]) / 1, bit for bit (−0.0 becomes 0.0)
            measured = value + 0.0 if value is not None and low < value < high else None
            target = targets[name].temperature_c
        else:
            temps = []
            for c, low, high in node.probes:
                value = readings[c].temperature_c
                if value is not None and low < value < high:
                    temps.append(value)
            if not temps:
                measured = None
            elif len(temps) == 1:
                measured = temps[0] + 0.0  # as above
            else:
                measured = math.fsum(temps) / len(temps)
            target = None
            for member in node.members:
                target = targets[member.name].temperature_c
                if target is not None:
                    break
        forced = forcing and any(member.force is not None for member in node.members)
        if forced or target is None:
            forces = [f for member in node.members if (f := member.force) is not None]
            heater = min((f.heater_pct for f in forces), default=0.0)
            chiller = min((f.chiller_pct for f in forces), default=0.0)
            manual = heater - chiller
            if measured is not None:
                # automatic control restarts its rate-limited setpoint at the measurement, so
                # the integral is tracked against that setpoint (tracking the protocol's
                # setpoint instead left an integral that slammed the chiller or heater to
                # full drive on the first tick after a trip cleared)
                node.pid.track(manual, measured, measured, dt_s)
                node.setpoint_c = measured
            node.output_pct = manual
            node.heater, node.chiller = heater, chiller
            node.shown_setpoint_c = None if target is None else node.setpoint_c
            return
        if measured is not None:
            previous = measured if node.setpoint_c is None else node.setpoint_c
            # rate_limit(previous, target, node.ramp_per_s, dt_s) written out: both setpoints
            # are finite floats (a probe mean or an earlier setpoint; the protocol's), dt_s > 0
            step = node.ramp_per_s * dt_s
            change = target - previous
            change = change if change < step else step  # min(step, change)
            change = change if change > -step else -step  # max(-step, change)
            node.setpoint_c = setpoint = previous + change
            node.output_pct = node.pi_step(node.pid, measured, setpoint, dt_s)
        heater, chiller = node.settings.split(node.output_pct, self._deadband_pct)
        if node.heater_on_off:
            settings = self._plan.settings
            node.cycle, on = time_proportion_step(
                node.cycle,
                heater,
                settings.on_off_cycle_s,
                t_s,
                settings.on_off_min_switch_s,
            )
            heater = 100.0 if on else 0.0
        node.heater, node.chiller = heater, chiller
        node.shown_setpoint_c = node.setpoint_c
