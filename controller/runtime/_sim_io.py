"""Chamber I/O backed by an in-process simulated rack, advanced on the run's clock.

Rules of this module
--------------------
- The rack's simulated time follows the clock: before every read and write the rack is
  advanced to the clock's present (so a reading is what the probe shows at that instant and a
  command takes effect when it is given), and :meth:`SimulatedIO.run` also advances it on a
  fixed grid of ``step_s`` so the physics keeps pace with the clock when nobody asks.
- Devices behave as a transport sees them: a sensor dropout is an input the module flags as
  faulty (an immediate reply without that value); a comm-timeout or power loss is a device
  that does not answer, which costs ``reply_timeout_s`` of clock time under
  ``asyncio.timeout`` before the read or write gives up, as a real client's timeout would.
- The optode is polled every ``optode_period_s`` (optodes measure every few tens of
  seconds); between polls its latest measurement is reported. The E-stop contact belongs to
  the I/O module, so it lives here (:meth:`SimulatedIO.press_e_stop`), not in the rack.
- The background advance on the grid is a timer callback on the clock, not a task that wakes:
  at a grid point that is also a tick it runs before the control task resumes, so the tick
  finds nothing else due at its instant and needs no extra turn of the event loop. A failure
  in it fails :meth:`SimulatedIO.run`, as it did when the advance ran inside that task.
- :meth:`SimulatedIO.read_now` and :meth:`SimulatedIO.write_now` serve a whole tick's reads
  or writes at once when every device addressed answers (nothing to wait for): the same
  readings, noise draws and commands as :meth:`~SimulatedIO.read` and
  :meth:`~SimulatedIO.write` chamber by chamber in that order, without a task per chamber.
  When a device is silent they do nothing and say so (None), and the caller goes chamber by
  chamber, each silent device costing its reply timeout.
- Each chamber's I/O module has a device-side watchdog: when no command has reached it for
  ``watchdog_s``, it drives its safe outputs by itself (exactly at that moment of simulated
  time) until the next command arrives. So a controller that dies or loses the bus leaves the
  chambers safe, as the hardware's modules do.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable, Mapping, Sequence
from types import TracebackType
from typing import Any, Self

from controller.clock import Clock
from controller.control import Outputs
from controller.runtime._io import ChamberReadings, Quantity
from simulator import Rack, SensorNoReply

__all__ = ["SimulatedIO"]

_MODBUS = "modbus"
_OPTODE = "optode"
_MODBUS_QUANTITIES = frozenset(
    {Quantity.TEMPERATURE, Quantity.PAR, Quantity.FLOW, Quantity.LEVEL, Quantity.E_STOP}
)
_NONE_FAILED: frozenset[Quantity] = frozenset()


def _positive(value: float, name: str) -> float:
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a finite number above 0, got {value!r}")
    return value


class SimulatedIO:
    """A simulated rack presented as chamber I/O.

    Parameters
    ----------
    rack
        The simulated rack; its time 0 is mapped to the clock's present at construction.
    clock
        The run's clock.
    step_s
        Clock time between background advances of the rack, s; default the rack's physics
        step. Reads and writes advance the rack themselves, so a coarser grid only changes
        how current the rack is between them.
    reply_timeout_s
        How long a transport waits for a silent device before giving up, s.
    optode_period_s
        Time between optode measurements, s.
    watchdog_s
        Device-side watchdog of every I/O module, s; None for no watchdog. It starts with
        the first command a module receives.
    safe
        Outputs each module drives when its watchdog fires, % each; default everything off.
    """

    def __init__(
        self,
        rack: Rack,
        clock: Clock,
        *,
        step_s: float | None = None,
        reply_timeout_s: float = 1.0,
        optode_period_s: float = 30.0,
        watchdog_s: float | None = None,
        safe: Mapping[str, Outputs] | None = None,
    ) -> None:
        self._rack = rack
        self._clock = clock
        physics_step = rack.rig.sim.physics_step_s
        self._step_s = _positive(physics_step if step_s is None else step_s, "step_s")
        self._reply_timeout_s = _positive(reply_timeout_s, "reply_timeout_s")
        self._optode_period_s = _positive(optode_period_s, "optode_period_s")
        self._origin_s = clock.now_s() - rack.t_s
        self._e_stop: set[str] = set()
        self._optode: dict[str, tuple[float, float | None, float | None]] = {}
        self._comm_at_s: float | None = None
        self._comm_version = -1  # the rack's fault_version the answers below are for
        self._comm: dict[tuple[str, str], bool] = {}
        self._comm_of: dict[str, tuple[bool, ...]] = {}  # by device, in rig order
        self._all_up = (False, False)  # every module, every optode answered at _comm_at_s
        self._watchdog_s = None if watchdog_s is None else _positive(watchdog_s, "watchdog_s")
        off = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)
        self._safe = {c: (safe or {}).get(c, off) for c in rack.chamber_ids}
        self._fed_at: dict[str, float] = {}  # rack time of each module's latest command, s
        # No watchdog can fire before this rack time (s): a lower bound of min(_fed_at) +
        # watchdog_s, so that sync need not look at every module. Invalidated by a command
        # (which lowers it to now + watchdog_s, see _fed) and made exact again by the look
        # sync takes once the bound is reached (_trip_watchdogs).
        self._watchdog_due_s = math.inf
        self.last_written: dict[str, Outputs] = {}
        """The latest command each chamber's module accepted, % each."""
        self.watchdog_trips: list[tuple[float, str]] = []
        """(rack time in s, chamber) of every watchdog trip, in order."""

    # ------------------------------------------------------------------ properties
    @property
    def chambers(self) -> tuple[str, ...]:
        """Chamber identifiers in rig order."""
        return self._rack.chamber_ids

    @property
    def rack(self) -> Rack:
        """The simulated rack (for tests, fault injection and the bench)."""
        return self._rack

    # ------------------------------------------------------------------ lifecycle
    async def __aenter__(self) -> Self:
        """Nothing to open in-process; brings the rack up to the clock."""
        self.sync()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        """Bring the rack up to the clock one last time."""
        self.sync()

    async def run(self, ready: asyncio.Event) -> None:
        """Advance the rack on a fixed grid of ``step_s`` until cancelled.

        Parameters
        ----------
        ready
            Set at once: the in-process rack answers from the start.

        Raises
        ------
        Exception
            Whatever advancing the rack on the grid raised (the run then fails).
        """
        ready.set()
        clock = self._clock
        failed: asyncio.Future[None] = asyncio.get_running_loop().create_future()
        start_s = clock.now_s()
        step_s = self._step_s
        call_at = self._timer()  # the clock's own, or the event loop's (looked up once)
        handle: asyncio.TimerHandle

        def step(k: int) -> None:
            nonlocal handle
            try:
                self.sync()
            except Exception as error:  # fail run(), as the advance inside its task did
                if not failed.done():
                    failed.set_exception(error)
                return
            # A late wake-up (real time) skips grid points instead of catching up on them.
            k = max(k + 1, math.floor((clock.now_s() - start_s) / step_s) + 1)
            handle = call_at(start_s + k * step_s, step, k)

        handle = call_at(start_s + step_s, step, 1)
        try:
            await failed
        finally:
            handle.cancel()

    def _timer(self) -> Callable[..., asyncio.TimerHandle]:
        """A function ``(t_s, callback, *args)`` arming a timer that calls ``callback(*args)``
        at clock time ``t_s``: exactly, on a clock that can (its ``call_at``); otherwise after
        the clock time still to go, on the running event loop."""
        exact = getattr(self._clock, "call_at", None)
        if exact is not None:
            return exact  # type: ignore[no-any-return]
        loop = asyncio.get_running_loop()
        now_s = self._clock.now_s

        def later(t_s: float, callback: Callable[..., object], *args: Any) -> asyncio.TimerHandle:
            return loop.call_later(max(0.0, t_s - now_s()), callback, *args)

        return later

    def sync(self) -> None:
        """Advance the rack to the clock's present, firing module watchdogs on the way."""
        rack = self._rack
        target = self._clock.now_s() - self._origin_s
        if target >= self._watchdog_due_s:
            self._trip_watchdogs(target)
        dt = target - rack.t_s
        if dt > 1e-9:
            rack.advance(dt)

    def _trip_watchdogs(self, target: float) -> None:
        """Fire, in time order, every module watchdog due by rack time ``target`` (s),
        advancing the rack to each; then set the exact time the next one is due."""
        rack = self._rack
        fed_at, watchdog_s = self._fed_at, self._watchdog_s
        if watchdog_s is None:
            self._watchdog_due_s = math.inf
            return
        while fed_at:
            earliest = min(fed_at.values()) + watchdog_s
            if earliest > target:  # none due yet: the bound is exact again
                self._watchdog_due_s = earliest
                return
            chamber = min(fed_at.items(), key=lambda item: item[1])[0]
            if earliest > rack.t_s + 1e-9:
                rack.advance(earliest - rack.t_s)
            safe = self._safe[chamber]
            rack.set_outputs(
                chamber,
                heater_pct=safe.heater_pct,
                chiller_pct=safe.chiller_pct,
                lamp_pct=safe.lamp_pct,
                pump_pct=safe.pump_pct,
            )
            del fed_at[chamber]
            self.watchdog_trips.append((rack.t_s, chamber))
        self._watchdog_due_s = math.inf  # nobody fed: nothing due until a command arrives

    def _fed(self, t_s: float) -> None:
        """A command reached a module at rack time ``t_s`` (s): its watchdog is due at
        ``t_s + watchdog_s`` at the earliest (keeps :attr:`_watchdog_due_s` a lower bound)."""
        if self._watchdog_s is not None and t_s + self._watchdog_s < self._watchdog_due_s:
            self._watchdog_due_s = t_s + self._watchdog_s

    # ------------------------------------------------------------------ operator inputs
    def press_e_stop(self, chamber: str | None = None) -> None:
        """Press an E-stop: its contact opens on the chamber's module.

        Parameters
        ----------
        chamber
            Chamber identifier; None for every chamber.
        """
        self._e_stop.update(self._ids(chamber))

    def release_e_stop(self, chamber: str | None = None) -> None:
        """Release an E-stop (the interlock stays latched until acknowledged).

        Parameters
        ----------
        chamber
            Chamber identifier; None for every chamber.
        """
        self._e_stop.difference_update(self._ids(chamber))

    def _ids(self, chamber: str | None) -> tuple[str, ...]:
        if chamber is None:
            return self.chambers
        if chamber not in self.chambers:
            raise KeyError(f"no chamber {chamber!r} in this rack")
        return (chamber,)

    # ------------------------------------------------------------------ device calls
    def _all_answer(self) -> tuple[bool, bool]:
        """Whether every module, and every optode, answers now; asked of the rack once per
        simulated instant (the rack brings pending commands into effect on every question,
        which is costly). What a device answers changes only with the rack's time (faults
        begin and end as it advances; an injected fault starts at the present instant, so
        the rack answers for it once its time has moved on), which keys this cache; and at
        a new instant only when the rack's active faults changed (its ``fault_version``,
        the second key: the answers depend on nothing else)."""
        rack = self._rack
        t_s = rack.t_s
        if self._comm_at_s != t_s:
            self._comm_at_s = t_s
            version = rack.fault_version
            if version != self._comm_version:
                modbus, optode = rack.comm_ok_all(_MODBUS), rack.comm_ok_all(_OPTODE)
                self._comm_of = {_MODBUS: modbus, _OPTODE: optode}
                self._comm.clear()  # filled as asked (_answers)
                self._all_up = (all(modbus), all(optode))
                self._comm_version = version
        return self._all_up

    def _answers(self, chamber: str, device: str) -> bool:
        """Whether a device answers now (see :meth:`_all_answer`)."""
        self._all_answer()
        comm = self._comm
        if not comm:
            ids = self._rack.chamber_ids
            for kind, ups in self._comm_of.items():
                comm.update(((c, kind), up) for c, up in zip(ids, ups, strict=True))
        return comm[(chamber, device)]

    async def _silence(self) -> None:
        """Wait for a device that will not answer, as a transport's reply timeout does."""
        try:
            async with asyncio.timeout(self._reply_timeout_s):
                await asyncio.Event().wait()
        except TimeoutError:
            pass
        self.sync()

    async def read(self, chamber: str) -> ChamberReadings:
        """Read one chamber's I/O module and optode.

        Parameters
        ----------
        chamber
            Chamber identifier.

        Returns
        -------
        ChamberReadings
            Temperature (°C), PAR (µmol photons m⁻² s⁻¹), flow (cm s⁻¹), level and E-stop
            from the module; O2 (µmol L⁻¹, % air saturation) from the optode's latest
            measurement.
        """
        self.sync()
        rack = self._rack
        now = self._clock.now_s()
        modbus_up = self._answers(chamber, _MODBUS)
        poll_optode = self._optode_due(chamber, now)
        optode_up = self._answers(chamber, _OPTODE) if poll_optode else True
        failed: set[Quantity] = set()
        values: dict[str, float | bool | None] = {}
        if modbus_up:
            values["temperature_c"] = self._value(rack.read_temperature, chamber)
            values["par"] = self._value(rack.read_par, chamber)
            values["flow_cm_s"] = self._value(rack.read_flow, chamber)
            values["level_ok"] = rack.read_level_ok(chamber)
            values["e_stop"] = chamber in self._e_stop
            for key, quantity in (
                ("temperature_c", Quantity.TEMPERATURE),
                ("par", Quantity.PAR),
                ("flow_cm_s", Quantity.FLOW),
            ):
                if values[key] is None:
                    failed.add(quantity)
        else:
            failed |= _MODBUS_QUANTITIES
        if poll_optode:
            o2: tuple[float | None, float | None] = (None, None)
            if optode_up:
                try:
                    reading = rack.read_optode(chamber)
                    o2 = (reading.o2_umol_l, reading.o2_sat_pct)
                except SensorNoReply:
                    pass
            self._optode[chamber] = (now, *o2)
        _, o2_umol_l, o2_sat_pct = self._optode[chamber]
        if o2_umol_l is None:
            failed.add(Quantity.OXYGEN)
        if not (modbus_up and optode_up):
            await self._silence()
        return ChamberReadings(
            chamber=chamber,
            t_s=now,
            o2_umol_l=o2_umol_l,
            o2_sat_pct=o2_sat_pct,
            comm_ok=modbus_up and optode_up,
            failed=frozenset(failed),
            **values,  # type: ignore[arg-type]
        )

    def read_now(self, chambers: Sequence[str]) -> dict[str, ChamberReadings | Exception] | None:
        """Read several chambers at once, when every device to be asked answers now.

        Parameters
        ----------
        chambers
            Chamber identifiers, in the order :meth:`read` would be called on them.

        Returns
        -------
        dict or None
            Per chamber what :meth:`read` would return (°C, µmol L⁻¹, % air saturation,
            µmol photons m⁻² s⁻¹, cm s⁻¹, contacts), or the exception it would raise; None,
            having read nothing, when a device is silent, a chamber is unknown or a subclass
            reads its own way (then read chamber by chamber).
        """
        if type(self).read is not SimulatedIO.read:
            return None
        safe = self._safe
        if not all(map(safe.__contains__, chambers)):
            return None
        self.sync()
        now = self._clock.now_s()
        latest, age_s = self._optode, self._optode_period_s - 1e-9  # as _optode_due
        polls = [c not in latest or now - latest[c][0] >= age_s for c in chambers]
        modbus_up, optode_up = self._all_answer()
        if not modbus_up and not all(self._answers(c, _MODBUS) for c in chambers):
            return None
        if not optode_up and not all(
            self._answers(c, _OPTODE) for c, poll in zip(chambers, polls, strict=True) if poll
        ):
            return None
        sweep = self._rack.sweep(chambers, polls)
        found: dict[str, ChamberReadings | Exception] = {}
        e_stop = self._e_stop
        for chamber, poll, temperature, par, flow, level_ok, o2_new, sat_new, error in zip(
            chambers,
            polls,
            sweep.temperature_c,
            sweep.par,
            sweep.flow_cm_s,
            sweep.level_ok,
            sweep.o2_umol_l,
            sweep.o2_sat_pct,
            sweep.errors,
            strict=True,
        ):
            if error is not None:
                found[chamber] = error
                continue
            if poll:
                latest[chamber] = (now, o2_new, sat_new)
            _, o2_umol_l, o2_sat_pct = latest[chamber]
            failed = _NONE_FAILED
            if temperature is None or par is None or flow is None or o2_umol_l is None:
                failed = frozenset(
                    q
                    for q, value in (
                        (Quantity.TEMPERATURE, temperature),
                        (Quantity.PAR, par),
                        (Quantity.FLOW, flow),
                        (Quantity.OXYGEN, o2_umol_l),
                    )
                    if value is None
                )
            found[chamber] = ChamberReadings(
                chamber=chamber,
                t_s=now,
                temperature_c=temperature,
                par=par,
                flow_cm_s=flow,
                level_ok=level_ok,
                e_stop=chamber in e_stop,
                o2_umol_l=o2_umol_l,
                o2_sat_pct=o2_sat_pct,
                comm_ok=True,
                failed=failed,
            )
        return found

    def _optode_due(self, chamber: str, now: float) -> bool:
        last = self._optode.get(chamber)
        return last is None or now - last[0] >= self._optode_period_s - 1e-9

    @staticmethod
    def _value(reader: object, chamber: str) -> float | None:
        try:
            return float(reader(chamber))  # type: ignore[operator]
        except SensorNoReply:
            return None

    def write_now(self, outputs: Mapping[str, Outputs]) -> dict[str, bool | Exception] | None:
        """Command several chambers at once, when every module addressed answers now.

        Parameters
        ----------
        outputs
            Heater, chiller, lamp and pump drives (% each) by chamber, in the order
            :meth:`write` would be called.

        Returns
        -------
        dict or None
            Per chamber True (taken) or the exception :meth:`write` would raise; None,
            having sent nothing, when a module is silent, a chamber is unknown or a subclass
            writes its own way (then write chamber by chamber).
        """
        if type(self).write is not SimulatedIO.write:
            return None
        if not all(map(self._safe.__contains__, outputs)):
            return None
        self.sync()
        if not self._all_answer()[0] and not all(self._answers(c, _MODBUS) for c in outputs):
            return None
        rack = self._rack
        errors = rack.set_outputs_all(
            [
                (chamber, value.heater_pct, value.chiller_pct, value.lamp_pct, value.pump_pct)
                for chamber, value in outputs.items()
            ]
        )
        t_s = rack.t_s
        if not any(errors):  # every row taken (an error is an exception, never falsy)
            self.last_written.update(outputs)
            self._fed_at.update(dict.fromkeys(outputs, t_s))
            self._fed(t_s)
            return dict.fromkeys(outputs, True)
        done: dict[str, bool | Exception] = {}
        last_written, fed_at = self.last_written, self._fed_at
        for (chamber, value), error in zip(outputs.items(), errors, strict=True):
            if error is not None:
                done[chamber] = error
                continue
            last_written[chamber] = value
            fed_at[chamber] = t_s
            done[chamber] = True
        self._fed(t_s)
        return done

    async def write(self, chamber: str, outputs: Outputs) -> bool:
        """Command one chamber's actuators.

        Parameters
        ----------
        chamber
            Chamber identifier.
        outputs
            Heater, chiller, lamp and pump drives, % each.

        Returns
        -------
        bool
            False when the module did not answer (the command did not arrive).
        """
        self.sync()
        if not self._answers(chamber, _MODBUS):
            await self._silence()
            return False
        self._rack.set_outputs(
            chamber,
            heater_pct=outputs.heater_pct,
            chiller_pct=outputs.chiller_pct,
            lamp_pct=outputs.lamp_pct,
            pump_pct=outputs.pump_pct,
        )
        self.last_written[chamber] = outputs
        self._fed_at[chamber] = self._rack.t_s
        self._fed(self._rack.t_s)
        return True
