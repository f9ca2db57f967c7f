"""Chamber I/O on real devices (or the simulator's endpoints): Modbus blocks and optode lines.

Rules of this module
--------------------
- :class:`HardwareIO` implements :class:`~controller.runtime.ChamberIO` from a rig's I/O map
  (:class:`~controller.rig.RigIo`) through the async transports and the pure codecs of
  :mod:`controller.drivers`; the loop cannot tell it from the simulated rack.
- Modbus: the blocks of every link are grouped into runs of neighbours
  (:class:`~controller.drivers._transport_runs.BlockRun`), and the reads (and writes) the
  loop makes for all chambers at once are joined into one request per run: input registers
  0..6 (readings, fault bits, contacts) in one read; holding registers 0..10 (drives,
  watchdog timeout, a new watchdog count, safe drives, relay bits closed where the drive is
  above 0) in one write, so drives, relays and feed arrive together and every write sets the
  module up afresh. A run that fails jointly is exchanged with block by block until every
  block answers again; a module busy with a tripped watchdog is fed alone, then written
  again. Links are exchanged with concurrently. The rig's calibration corrections
  (``[io.corrections]``) are applied to temperature, PAR and flow.
- The optode is **not** asked during a read: every optode has its own poller in
  :meth:`HardwareIO.run`, measuring on a fixed grid of ``optode_period_s``, and a read
  reports the latest measurement. So a slow or silent optode never stalls a tick. The
  optodes' grids are staggered evenly over the period (the k-th of n at ``k * period / n``),
  so that 64 of them do not all answer at the instant a control tick is due.
- Start-up, per module, before ``ready`` is set (register-map's sequence): read
  ``watchdog_tripped``; write the watchdog timeout, a first feed and the rig's safe drives.
  Each request is bounded by its link's timeouts, which start when it is sent, not while it
  waits behind the other modules' requests; a module that fails is tried again after a
  back-off with jitter, so modules that failed together do not retry in lock-step. A module
  that later loses power (and boots with the watchdog off and every safe drive 0) is whole
  again after the next write, which carries all of it.
- Failures never reach the loop as exceptions: a transport error, a timeout or a malformed
  reply (:class:`~controller.errors.SquallError` from a codec) makes the quantities it carried
  stale (``None``, listed in ``failed``) and ``comm_ok`` False, or the write False.
  ``CancelledError`` is never caught. State changes (device lost, device back) are logged
  once each, not every tick.
"""

from __future__ import annotations

import asyncio
import dataclasses
import logging
import math
import random
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import Self

from controller.clock import Clock
from controller.control import Outputs
from controller.drivers import (
    InputBits,
    InputValues,
    Measurement,
    OptodeCommand,
    OptodeLineError,
    OptodeReply,
    OptodeRequest,
    OptodeStatus,
    OutputValues,
    RegisterMap,
    decode_reply,
    encode_outputs,
    encode_point,
    encode_request,
    encode_safe_outputs,
    point,
)
from controller.drivers._transport_common import RetryPolicy, TransportError
from controller.drivers._transport_modbus import ModbusTransport
from controller.drivers._transport_runs import BlockRun
from controller.drivers._transport_serial import SerialLineTransport
from controller.errors import SquallError
from controller.rig import Rig
from controller.rig._io import InputCorrection, ModbusLink, RigIo, resolve_io
from controller.runtime._io import ChamberReadings, Quantity
from controller.runtime._settings import ControlPlan, RunSettings

__all__ = ["HardwareIO"]

_log = logging.getLogger(__name__)

_OFF = Outputs(heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=0.0)
_TIMEOUT_POINT = point("watchdog_timeout_s")
_SETUP_PAUSE_MAX_S = 5.0
#: Optode statuses whose values must not be used (clamped or unreliable), dimensionless.
_UNUSABLE = OptodeStatus.LOW_SIGNAL | OptodeStatus.O2_RANGE
_STOP_FAILURES = (TransportError, SquallError, TimeoutError)
_ANALOG = (
    ("temperature_c", Quantity.TEMPERATURE),
    ("par", Quantity.PAR),
    ("flow_cm_s", Quantity.FLOW),
)


@dataclass(kw_only=True)
class _Optode:
    """One chamber's optode and its latest measurement."""

    chamber: str
    line: SerialLineTransport
    phase_s: float = 0.0
    """Offset of this optode's polls on the common grid, s: the optodes' polls are spread
    over the period, not all due at once (and at the same instant as a control tick)."""
    tag: int = 0
    polled_s: float | None = None
    o2_umol_l: float | None = None
    o2_sat_pct: float | None = None
    unreported_miss: bool = False
    polls: int = 0
    misses: int = 0
    first: asyncio.Event = field(default_factory=asyncio.Event)


def _transport(link: ModbusLink) -> ModbusTransport:
    policy = RetryPolicy(timeout_s=link.timeout_s, attempts=link.attempts, backoff_s=link.backoff_s)
    if link.tcp is not None:
        return ModbusTransport.tcp(link.tcp.host, link.tcp.port, policy=policy)
    assert link.rtu is not None  # the model allows exactly one of the two
    parity = link.rtu.parity.value
    return ModbusTransport.rtu(
        link.rtu.port,
        baud=link.rtu.baud,
        parity=parity,
        stop_bits=link.rtu.stop_bits,
        policy=policy,
    )


class HardwareIO:
    """The rig's devices as chamber I/O.

    Parameters
    ----------
    io
        An explicit I/O map (links and optode ports, no ports file: see
        :func:`~controller.rig.resolve_io`), checked against ``chambers`` (no unit).
    chambers
        The rig's chamber ids in rig order (no unit).
    clock
        The run's clock (optode cadence and time stamps; no unit).
    watchdog_timeout_s
        Device watchdog timeout written to every module, s (0.5..6000); must exceed the
        control tick period with room to spare (common practice: three periods).
    safe
        Drives each module applies when its watchdog trips, % each; default all off.
    budget_s
        Longest a chamber's read or write may take in all, s; keep it below the loop's read
        and write timeouts so a slow device yields stale values rather than a timed-out read.
    """

    def __init__(
        self,
        io: RigIo,
        chambers: Sequence[str],
        clock: Clock,
        *,
        watchdog_timeout_s: float,
        safe: Mapping[str, Outputs] | None = None,
        budget_s: float = 1.5,
    ) -> None:
        if io.from_announcement is not None:
            raise ValueError("resolve the ports file first (controller.rig.resolve_io)")
        io.check_chambers(chambers)
        if not (math.isfinite(budget_s) and budget_s > 0):
            raise ValueError(f"budget_s must be a finite number above 0, got {budget_s!r}")
        self._clock = clock
        self._chambers = tuple(chambers)
        self._budget_s = float(budget_s)
        where = "io.watchdog_timeout_s"
        if watchdog_timeout_s < 0.5:  # and encode_point refuses more than 6000 s
            raise SquallError("below 0.5 s", field=where)
        (self._timeout_word,) = encode_point(_TIMEOUT_POINT, watchdog_timeout_s, where=where)
        self.watchdog_timeout_s = float(watchdog_timeout_s)
        self.optode_period_s = io.optode_period_s
        self._optode_max_age_s = 2.0 * io.optode_period_s  # one missed poll is tolerated
        self.links: dict[str, ModbusTransport] = {}
        """Modbus transport per link name."""
        self._runs: dict[str, BlockRun] = {}
        """The run of neighbouring blocks each chamber's module belongs to."""
        self._rng = random.Random(0)  # jitter of set-up retries; seeded: runs repeat
        for link, ids in zip(io.modbus, io.link_chambers(chambers), strict=True):
            transport = _transport(link)
            self.links[link.name] = transport
            if 2 * link.timeout_s + link.backoff_s > budget_s:
                _log.warning(
                    "link %s: a second attempt (after %g s) would not fit the %g s budget "
                    "of a read or write; lower timeout_s to let retries happen",
                    link.name,
                    link.timeout_s + link.backoff_s,
                    budget_s,
                )
            rmap = RegisterMap.build(ids, link.register_map, where=f"io.{link.name}")
            for blocks in rmap.runs():
                run = BlockRun(
                    transport,
                    blocks[0].unit_id,
                    blocks,
                    word_order=rmap.word_order,
                    timeout_word=self._timeout_word,
                    safe_words={
                        b.chamber_id: encode_safe_outputs(
                            _values((safe or {}).get(b.chamber_id, _OFF)),
                            where=f"{b.chamber_id}.safe",
                        )
                        for b in blocks
                    },
                    budget_s=self._budget_s,
                )
                self._runs.update(dict.fromkeys(run.chambers, run))
        self._optodes: dict[str, _Optode] = {
            cid: _Optode(
                chamber=cid,
                line=SerialLineTransport(port.port, baud=port.baud, timeout_s=io.optode_timeout_s),
                phase_s=k * io.optode_period_s / len(io.optodes),
            )
            for k, (cid, port) in enumerate(io.optodes.items())
        }
        self._corrections = dict(io.corrections)
        self._healthy: dict[tuple[str, str], bool] = {}

    @classmethod
    def from_rig(
        cls,
        rig: Rig,
        clock: Clock,
        *,
        base_dir: Path,
        plan: ControlPlan | None = None,
        settings: RunSettings | None = None,
    ) -> HardwareIO:
        """Chamber I/O for a rig file's ``[io]`` table.

        Parameters
        ----------
        rig
            The rig, with an ``io`` table (no unit).
        clock
            The run's clock (no unit).
        base_dir
            Folder of the rig file; ``io.from_announcement`` is relative to it (no unit).
        plan
            The run's control plan: its settings and each chamber's safe outputs (no unit).
        settings
            Run settings when there is no plan; default :class:`RunSettings` (no unit).

        Returns
        -------
        HardwareIO
            Not yet started (no unit).
        """
        if rig.io is None:
            raise SquallError(
                "the rig has no [io] table saying how to reach its devices; add one, or run "
                "with --sim",
                field="io",
            )
        ids = [c.id for c in rig.chambers]
        io = resolve_io(rig.io, ids, base_dir=base_dir)
        settings = plan.settings if plan is not None else (settings or RunSettings())
        safe = {}
        if plan is not None:
            safe = {c: s.interlocks.safe_outputs() for c, s in plan.chambers.items()}
        watchdog_s = io.watchdog_timeout_s or min(3.0 * settings.period_s, 6000.0)
        if watchdog_s < 1.5 * settings.period_s:
            raise SquallError(
                f"{watchdog_s:g} s would trip the modules between control ticks of "
                f"{settings.period_s:g} s; use at least 1.5 periods (common practice: three)",
                field="io.watchdog_timeout_s",
            )
        budget_s = 0.8 * min(settings.read_timeout_s, settings.write_timeout_s)
        return cls(io, ids, clock, watchdog_timeout_s=watchdog_s, safe=safe, budget_s=budget_s)

    @property
    def chambers(self) -> tuple[str, ...]:
        """Chamber identifiers in rig order."""
        return self._chambers

    def optode_stats(self, chamber: str) -> tuple[int, int]:
        """Polls made and polls missed by one chamber's optode.

        Parameters
        ----------
        chamber
            Chamber identifier.

        Returns
        -------
        tuple of int
            (polls, misses), count.
        """
        opt = self._optodes[chamber]
        return opt.polls, opt.misses

    # ------------------------------------------------------------------ lifecycle
    async def __aenter__(self) -> Self:
        """Allow the transports to connect (they open on first use)."""
        for link in self.links.values():
            await link.reopen()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        """Close every connection and port; the modules' watchdogs stay armed."""
        for run in set(self._runs.values()):
            await run.aclose()
        for link in self.links.values():
            await link.close()
        for opt in self._optodes.values():
            opt.line.close()

    async def run(self, ready: asyncio.Event) -> None:
        """Set up every module, take a first optode reading, set ``ready``; poll optodes.

        Parameters
        ----------
        ready
            Set once every module is set up and every optode has been asked once. A module
            that never answers keeps it unset: the loop then gives up after its ready
            timeout, before any output is energised.
        """
        async with asyncio.TaskGroup() as group:
            for opt in self._optodes.values():
                group.create_task(self._poll(opt), name=f"optode-{opt.chamber}")
            async with asyncio.TaskGroup() as setup:
                for chamber in self._runs:
                    setup.create_task(self._start(chamber), name=f"setup-{chamber}")
            for opt in self._optodes.values():
                await opt.first.wait()  # each poll is bounded by the optode timeout
            ready.set()
            _log.info("devices ready: %d modules, %d optodes", len(self._runs), len(self._optodes))
            if not self._optodes:
                await asyncio.Event().wait()  # nothing else to do until cancelled

    def _note(self, chamber: str, device: str, ok: bool, detail: object = "") -> None:
        key = (chamber, device)
        if self._healthy.get(key, True) != ok:
            if ok:
                _log.info("%s: %s answers again", chamber, device)
            else:
                _log.warning("%s: %s failed: %s", chamber, device, detail)
        self._healthy[key] = ok

    # ------------------------------------------------------------------ Modbus set-up
    async def _start(self, chamber: str) -> None:
        """Set up one module, trying again after a growing, jittered pause until it answers.

        Each request is bounded by the link's policy from the moment it is sent; the wait
        behind the other modules' requests on the same link is not held against it.
        """
        pause = 0.1
        while True:
            try:
                await self._runs[chamber].setup(chamber)
                self._note(chamber, "modbus", True)
                return
            except _STOP_FAILURES as exc:
                self._note(chamber, "modbus", False, exc)
            await asyncio.sleep(pause * self._rng.uniform(0.5, 1.0))
            pause = min(2 * pause, _SETUP_PAUSE_MAX_S)

    # ------------------------------------------------------------------ reads
    async def read(self, chamber: str) -> ChamberReadings:
        """Read one chamber's module (and report its optode's latest measurement).

        Parameters
        ----------
        chamber
            Chamber identifier.

        Returns
        -------
        ChamberReadings
            Temperature (°C), PAR (µmol photons m⁻² s⁻¹), flow (cm s⁻¹), level and E-stop
            from the module; O2 (µmol L⁻¹, % air saturation) from the optode's latest
            measurement; stale parts ``None`` and listed in ``failed``.
        """
        now = self._clock.now_s()
        run = self._runs[chamber]
        inputs: InputValues | None = None
        contacts: InputBits | None = None
        try:
            async with asyncio.timeout(self._budget_s):
                inputs, contacts = await run.read(chamber)
        except _STOP_FAILURES as exc:
            self._note(chamber, "modbus", False, exc)
        else:
            self._note(chamber, "modbus", True)
        failed: set[Quantity] = set()
        values: dict[str, float | bool | None] = {}
        if inputs is None or contacts is None:
            failed |= {Quantity.TEMPERATURE, Quantity.PAR, Quantity.FLOW}
            failed |= {Quantity.LEVEL, Quantity.E_STOP}
        else:
            values |= _corrected(inputs, self._corrections.get(chamber))
            failed |= {quantity for key, quantity in _ANALOG if values[key] is None}
            values |= {"level_ok": contacts.level_ok, "e_stop": not contacts.estop_ok}
            if contacts.watchdog_tripped:
                _log.warning("%s: the module's watchdog holds its outputs safe", chamber)
        comm_ok = inputs is not None
        opt = self._optodes.get(chamber)
        if opt is not None:
            if opt.unreported_miss:
                comm_ok = False
                opt.unreported_miss = False
            fresh = opt.polled_s is not None and now - opt.polled_s <= self._optode_max_age_s
            if fresh and opt.o2_umol_l is not None:
                values |= {"o2_umol_l": opt.o2_umol_l, "o2_sat_pct": opt.o2_sat_pct}
            else:
                failed.add(Quantity.OXYGEN)
        return ChamberReadings(
            chamber=chamber,
            t_s=now,
            comm_ok=comm_ok,
            failed=frozenset(failed),
            **values,  # type: ignore[arg-type]
        )

    # ------------------------------------------------------------------ writes
    async def write(self, chamber: str, outputs: Outputs) -> bool:
        """Drive one chamber's actuators and feed its module's watchdog.

        Parameters
        ----------
        chamber
            Chamber identifier.
        outputs
            Heater, chiller, lamp and pump drives, % each.

        Returns
        -------
        bool
            True when the module took drives, relays, feed and safe drives; False otherwise.
        """
        run = self._runs[chamber]
        try:
            drive_words = encode_outputs(_values(outputs), where=f"{chamber}.outputs")
            async with asyncio.timeout(self._budget_s):
                await run.write(chamber, drive_words)
        except _STOP_FAILURES as exc:
            self._note(chamber, "modbus", False, exc)
            return False
        self._note(chamber, "modbus", True)
        return True

    # ------------------------------------------------------------------ optodes
    async def _poll(self, opt: _Optode) -> None:
        """Ask at once (for ``ready``), then on the grid ``start + phase + k * period``."""
        period = self.optode_period_s
        next_s = self._clock.now_s() + opt.phase_s
        while True:
            await self._sample(opt)
            opt.first.set()
            next_s += period
            now = self._clock.now_s()
            if next_s <= now:  # a late poll skips grid points rather than catching up
                next_s += math.ceil((now - next_s) / period + 1e-12) * period
            await self._clock.sleep_until(next_s)

    async def _sample(self, opt: _Optode) -> None:
        opt.tag = opt.tag % 0xFFFF + 1
        tag = opt.tag
        source = opt.line.port
        got: list[OptodeReply] = []

        def ours(line: bytes) -> bool:
            try:
                reply = decode_reply(line, source=source)
            except OptodeLineError as exc:
                _log.warning("%s: optode line dropped: %s", opt.chamber, exc)
                return False
            if reply.tag != tag:
                return False  # a late reply to an abandoned request
            got.append(reply)
            return True

        opt.polls += 1
        request = encode_request(OptodeRequest(command=OptodeCommand.SAMPLE, tag=tag))
        o2: tuple[float | None, float | None] = (None, None)
        try:
            await opt.line.exchange(request, accept=ours)
        except TransportError as exc:
            opt.misses += 1
            opt.unreported_miss = True
            self._note(opt.chamber, "optode", False, exc)
        else:
            self._note(opt.chamber, "optode", True)
            reply = got[-1]  # a refusal (ERR), or a reading flagged unusable, gives no value
            if isinstance(reply, Measurement) and not reply.status & _UNUSABLE:
                o2 = (reply.o2_umol_l, reply.o2_sat_pct)
            else:
                _log.warning("%s: optode gave no usable oxygen: %s", opt.chamber, reply)
        # replaced only now: a read during the exchange still sees the previous measurement
        opt.polled_s = self._clock.now_s()
        opt.o2_umol_l, opt.o2_sat_pct = o2


def _corrected(inputs: InputValues, fix: InputCorrection | None) -> dict[str, float | None]:
    """Readings with the rig's calibration corrections applied (°C, µmol m⁻² s⁻¹, cm s⁻¹).

    PAR and flow cannot be negative; a correction that would make them so reads 0.
    """
    t, par, flow = inputs.temperature_c, inputs.par_umol_m2_s, inputs.flow_cm_s
    if fix is not None:
        if t is not None:
            t = fix.temperature_gain * t + fix.temperature_offset_c
        if par is not None:
            par = max(0.0, fix.par_gain * par + fix.par_offset)
        if flow is not None:
            flow = max(0.0, fix.flow_gain * flow + fix.flow_offset_cm_s)
    return {"temperature_c": t, "par": par, "flow_cm_s": flow}


def _values(outputs: Outputs) -> OutputValues:
    return OutputValues(**dataclasses.asdict(outputs))
