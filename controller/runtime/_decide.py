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
from dataclasses import dataclass, field

from controller.control import (
    Actions,
    ClosedWindow,
    Condition,
    CycleInputs,
    CycleState,
    IncubationStatus,
    InterlockEvent,
    InterlockState,
    Outputs,
    PidParams,
    PidState,
    Readings,
    SafetyState,
    TimeProportionState,
    WindowEnd,
    acknowledge,
    cycle_step,
    end_window,
    evaluate,
    pid_step,
    pid_track,
    rate_limit,
    time_proportion_step,
)
from controller.runtime._io import ChamberReadings, Quantity
from controller.runtime._settings import ControlPlan, NodeSettings

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


@dataclass(frozen=True, slots=True, kw_only=True)
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


@dataclass(slots=True)
class _NodeState:
    pid: PidState
    setpoint_c: float | None = None
    output_pct: float = 0.0
    cycle: TimeProportionState = field(default_factory=TimeProportionState)


@dataclass(slots=True)
class _ChamberState:
    interlock: InterlockState
    lamp: PidState
    pump: PidState
    write_ok: bool = True
    force: Outputs | None = None
    cycle: CycleState | None = None


def _feed(
    state: PidState,
    trim: PidParams | None,
    full_scale: float,
    setpoint: float | None,
    measured: float | None,
    dt_s: float,
) -> tuple[PidState, float]:
    """Drive of a lamp or pump: linear feed-forward plus a PI trim on its sensor, %."""
    if setpoint is None or setpoint <= 0.0:
        return state, 0.0
    correction = state.last_output or 0.0
    if trim is not None and measured is not None:
        result = pid_step(state, trim, measured, setpoint, dt_s)
        state, correction = result.state, result.output
    drive = 100.0 * (setpoint + correction) / full_scale
    return state, min(100.0, max(0.0, drive))


def _trimmed(setpoint: float | None, trim: PidParams | None) -> bool:
    """Whether :func:`_feed` looks at the measurement (a trim, and a setpoint above 0)."""
    return trim is not None and setpoint is not None and setpoint > 0.0


class Decider:
    """The loop's memory and per-tick decisions.

    Parameters
    ----------
    plan
        Nodes, chambers and settings of the run.
    """

    def __init__(self, plan: ControlPlan) -> None:
        self.plan = plan
        self._nodes = {n.name: _NodeState(pid=PidState()) for n in plan.nodes}
        self._chambers = {
            c: _ChamberState(
                interlock=InterlockState(),
                lamp=PidState(),
                pump=PidState(),
                cycle=CycleState() if c in plan.incubation else None,
            )
            for c in plan.chambers
        }
        self._last_t_s: float | None = None
        self._drivers = frozenset(plan.drivers)
        self._probes = {  # each node's chambers with their probes' plausible range, °C
            n.name: tuple(
                (
                    c,
                    plan.chambers[c].interlocks.sensor_min_c,
                    plan.chambers[c].interlocks.sensor_max_c,
                )
                for c in n.chambers
            )
            for n in plan.nodes
        }

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
        safe = self.plan.chambers[chamber].interlocks.safe_outputs()
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
        return self._chambers[chamber].interlock

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
        state = self._chambers[chamber]
        limits = self.plan.chambers[chamber].interlocks
        state.interlock, _, events = acknowledge(state.interlock, condition, limits, t_s)
        return events

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
        plan = self.plan
        dt_s = plan.settings.period_s if self._last_t_s is None else t_s - self._last_t_s
        dt_s = max(dt_s, 1e-6)
        self._last_t_s = t_s
        actions: dict[str, Actions] = {}
        events: list[tuple[str, InterlockEvent]] = []
        for chamber, cs in plan.chambers.items():
            state = self._chambers[chamber]
            reading = readings[chamber]
            new, action, happened = evaluate(
                state.interlock,
                Readings(
                    temperature_c=reading.temperature_c,
                    level_ok=reading.level_ok,
                    comm_ok=reading.comm_ok and state.write_ok,
                    e_stop=reading.e_stop,
                ),
                cs.interlocks,
                t_s,
            )
            state.interlock = new
            state.force = action.force
            actions[chamber] = action
            events.extend((chamber, event) for event in happened)
        windows = self._cycles(readings, targets, actions, t_s, schedule)
        drives: dict[str, tuple[float, float, float | None]] = {}
        for node in plan.nodes:
            drives[node.name] = self._node(node, readings, targets, actions, t_s, dt_s)
        writes: dict[str, Outputs] = {}
        decided: dict[str, ChamberDecision] = {}
        for chamber, cs in plan.chambers.items():
            state = self._chambers[chamber]
            action = actions[chamber]
            heater, chiller, setpoint = drives[cs.node]
            closed = state.cycle is not None and state.cycle.status is IncubationStatus.CLOSED
            if action.force is not None:
                lamp, pump = action.force.lamp_pct, action.force.pump_pct
            else:
                target, reading = targets[chamber], readings[chamber]
                # a reading is passed through the curve only when its trim will use it
                lamp_set = cs.lamp_drive_pct(target.par)
                state.lamp, lamp = _feed(  # in % of drive, through the lamp's curve
                    state.lamp,
                    cs.lamp_trim,
                    100.0,
                    lamp_set,
                    cs.lamp_drive_pct(reading.par, reading=True)
                    if _trimmed(lamp_set, cs.lamp_trim)
                    else None,
                    dt_s,
                )
                if closed:  # flushing pump off; the flow trim waits for the window's end
                    pump = 0.0
                else:
                    pump_set = cs.pump_drive_pct(target.flow_cm_s)
                    state.pump, pump = _feed(  # in % of drive, through the pump's curve
                        state.pump,
                        cs.flow_trim,
                        100.0,
                        pump_set,
                        cs.pump_drive_pct(reading.flow_cm_s, reading=True)
                        if _trimmed(pump_set, cs.flow_trim)
                        else None,
                        dt_s,
                    )
            shown = Outputs(heater_pct=heater, chiller_pct=chiller, lamp_pct=lamp, pump_pct=pump)
            decided[chamber] = ChamberDecision(
                outputs=shown,
                alarm=action.alarm,
                safety=state.interlock.safety,
                setpoint_c=setpoint,
                incubation=None if state.cycle is None else state.cycle.status,
            )
            writes[chamber] = (
                shown
                if chamber in self._drivers
                else Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=lamp, pump_pct=pump)
            )
        for node in plan.nodes:
            if node.driver not in plan.chambers:  # an idle chamber carries the bath's heater
                heater, chiller, _ = drives[node.name]
                writes[node.driver] = Outputs(
                    heater_pct=heater, chiller_pct=chiller, lamp_pct=0.0, pump_pct=0.0
                )
        return Decision(writes=writes, chambers=decided, events=tuple(events), windows=windows)

    def _cycles(
        self,
        readings: Mapping[str, ChamberReadings],
        targets: Mapping[str, Target],
        actions: Mapping[str, Actions],
        t_s: float,
        schedule: Schedule | None,
    ) -> tuple[tuple[str, ClosedWindow], ...]:
        """Step every chamber's incubation cycle; return the windows that ended."""
        if schedule is None:
            return ()
        ended: list[tuple[str, ClosedWindow]] = []
        for chamber, settings in self.plan.incubation.items():
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
                    forced=actions[chamber].force is not None,
                ),
                settings,
            )
            state.cycle = step.state
            if step.window is not None:
                ended.append((chamber, step.window))
        return tuple(ended)

    def _node(
        self,
        node: NodeSettings,
        readings: Mapping[str, ChamberReadings],
        targets: Mapping[str, Target],
        actions: Mapping[str, Actions],
        t_s: float,
        dt_s: float,
    ) -> tuple[float, float, float | None]:
        """Heater and chiller drives (%) of one node, and its applied setpoint (°C)."""
        state = self._nodes[node.name]
        forced = [f for c in node.chambers if (f := actions[c].force) is not None]
        temps = []
        for c, low, high in self._probes[node.name]:
            value = readings[c].temperature_c
            if value is not None and low < value < high:
                temps.append(value)
        measured = math.fsum(temps) / len(temps) if temps else None
        target = next(
            (
                targets[c].temperature_c
                for c in node.chambers
                if targets[c].temperature_c is not None
            ),
            None,
        )
        params = node.pid
        if forced or target is None:
            heater = min((f.heater_pct for f in forced), default=0.0)
            chiller = min((f.chiller_pct for f in forced), default=0.0)
            manual = heater - chiller
            if measured is not None:
                # automatic control restarts its rate-limited setpoint at the measurement, so
                # the integral is tracked against that setpoint (tracking the protocol's
                # setpoint instead left an integral that slammed the chiller or heater to
                # full drive on the first tick after a trip cleared)
                state.pid = pid_track(state.pid, params, manual, measured, measured, dt_s).state
                state.setpoint_c = measured
            state.output_pct = manual
            return heater, chiller, (None if target is None else state.setpoint_c)
        if measured is not None:
            previous = measured if state.setpoint_c is None else state.setpoint_c
            state.setpoint_c = rate_limit(previous, target, node.max_ramp_c_per_h / 3600.0, dt_s)
            result = pid_step(state.pid, params, measured, state.setpoint_c, dt_s)
            state.pid, state.output_pct = result.state, result.output
        heater, chiller = node.split(state.output_pct, self.plan.settings.split_deadband_pct)
        if node.heater_on_off:
            state.cycle, on = time_proportion_step(
                state.cycle,
                heater,
                self.plan.settings.on_off_cycle_s,
                t_s,
                self.plan.settings.on_off_min_switch_s,
            )
            heater = 100.0 if on else 0.0
        return heater, chiller, state.setpoint_c
