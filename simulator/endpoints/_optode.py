"""An emulated optode on a pseudo-terminal, speaking the project's optode line protocol.

Rules of this module
--------------------
- The emulator owns both ends of a pty: a client (the controller's driver, ``screen``, a test
  with pyserial) opens the slave path; the emulator reads the master end with an asyncio
  reader callback, so it needs no thread and works on the virtual-time loop too. Keeping the
  slave end open ourselves means clients may come and go without the master seeing EIO.
- :meth:`OptodeEmulator.answer` turns one request line into the reply bytes or None (silence).
  Silence when ``rack.comm_ok(chamber, "optode")`` is False (comm timeout, power loss) and
  when the optode itself does not answer (:class:`~simulator.SensorNoReply`, a dropout).
- Readings outside the protocol's ranges are clamped and flagged in the status bits, as the
  line protocol says a device does.
"""

from __future__ import annotations

import asyncio
import dataclasses
import datetime as dt
import logging
import os
import tty
from collections.abc import Callable

from controller.drivers import (
    CalibrationRecord,
    DeviceInfo,
    ErrorReply,
    LineSplitter,
    Measurement,
    OptodeCommand,
    OptodeErrorCode,
    OptodeLineError,
    OptodeReply,
    OptodeRequest,
    OptodeStatus,
    decode_request,
    encode_reply,
)
from controller.science.optode import OptodeCalibration, SignalKind, phase_from_concentration
from simulator import OptodeReading, Rack, SensorNoReply

__all__ = ["FIRMWARE", "OptodeEmulator", "measurement_from_reading"]

log = logging.getLogger(__name__)

FIRMWARE = "emu-1.0"
"""Firmware string the emulated optodes report."""

# (field, low, high, status bit set when clamped) — the DATA ranges of the line protocol
_CLAMPS: tuple[tuple[str, float, float, OptodeStatus], ...] = (
    ("o2_umol_l", -100.0, 3000.0, OptodeStatus.O2_RANGE),
    ("o2_sat_pct", -10.0, 500.0, OptodeStatus.O2_RANGE),
    ("temperature_c", -10.0, 60.0, OptodeStatus.TEMPERATURE_RANGE),
    ("phase_deg", 0.0, 90.0, OptodeStatus.O2_RANGE),
)


def measurement_from_reading(tag: int, reading: OptodeReading) -> Measurement:
    """Turn a rack reading into a ``DATA`` record, clamping and flagging as a device does.

    Parameters
    ----------
    tag
        The request's tag (no unit).
    reading
        The optode reading (µmol L⁻¹, %, °C, deg).

    Returns
    -------
    Measurement
        The reply record, every field within the protocol's range (µmol L⁻¹, %, °C, deg).
    """
    status = OptodeStatus.OK
    values: dict[str, float] = {}
    for name, low, high, flag in _CLAMPS:
        raw = float(getattr(reading, name))
        value = min(max(raw, low), high) if raw == raw else low  # NaN reads as the low end
        if value != raw:
            status |= flag
        values[name] = value
    return Measurement(tag=tag, status=status, **values)


class OptodeEmulator:
    """One chamber's optode, served on a pseudo-terminal.

    Parameters
    ----------
    rack
        The simulated rack; its ``start_utc`` dates the stored calibration.
    chamber_id
        Chamber whose optode this is (no unit).
    serial
        Serial number the optode reports (1..24 letters, digits, '.', '_', '-').
    sync
        Called before answering, to bring the rack up to the present; None when the caller
        steps the rack.
    """

    def __init__(
        self,
        rack: Rack,
        chamber_id: str,
        *,
        serial: str,
        sync: Callable[[], None] | None = None,
    ) -> None:
        if chamber_id not in rack.chamber_ids:
            raise KeyError(f"no chamber {chamber_id!r} in this rack")
        self.rack = rack
        self.chamber_id = chamber_id
        self._sync = sync
        self._splitter = LineSplitter()
        self._master: int | None = None
        self._slave: int | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self.path: str | None = None
        """Path of the pty's slave end that clients open, or None while closed."""
        self.requests = 0
        """Lines received, count."""
        self.silent = 0
        """Requests left unanswered (comm fault or sensor dropout), count."""
        self.info = DeviceInfo(tag=0, serial=serial, firmware=FIRMWARE)
        self.calibration = self._calibration()

    def _calibration(self) -> CalibrationRecord:
        """The stored two-point calibration, consistent with the rack's optode model."""
        chamber = self.rack.rig.chamber(self.chamber_id)
        optode = chamber.sim.sensors.optode
        truth = self.rack.truth(self.chamber_id)
        foil = OptodeCalibration(
            kind=SignalKind.PHASE_DEG,
            zero_reading=optode.phase0_deg,
            ksv_l_per_umol=optode.ksv_l_umol,
            quenchable_fraction=optode.quenchable_fraction,
            temp_c=truth.temperature_c,
        )
        # the foil's phase in air-saturated water at the start conditions (Stern–Volmer)
        phase100 = float(
            phase_from_concentration(foil, truth.o2_saturation_umol_l, truth.temperature_c)
        )
        start = self.rack.start_utc
        if start is None:
            raise ValueError("the rack needs a start_utc to date its optodes' calibration")
        return CalibrationRecord(
            tag=0,
            phase0_deg=round(optode.phase0_deg, 3),
            phase100_deg=round(phase100, 3),
            temperature_c=round(min(max(truth.temperature_c, -10.0), 60.0), 3),
            pressure_hpa=round(self.rack.rig.sim.pressure_kpa * 10.0, 1),
            date=start.astimezone(dt.UTC).date(),
        )

    # --------------------------------------------------------------- lifecycle

    def open(self) -> str:
        """Create the pty and start answering on the running event loop.

        Returns
        -------
        str
            The slave path clients open (no unit).
        """
        if self._master is not None:
            raise RuntimeError("the optode emulator is already open")
        master, slave = os.openpty()
        tty.setraw(slave)  # no echo, no CR/LF translation: bytes pass as sent
        os.set_blocking(master, False)
        self._master, self._slave = master, slave
        self.path = os.ttyname(slave)
        self._loop = asyncio.get_running_loop()
        self._loop.add_reader(master, self._readable)
        log.info("optode of %s on %s", self.chamber_id, self.path)
        return self.path

    def close(self) -> None:
        """Stop answering and close both ends of the pty."""
        if self._master is None:
            return
        if self._loop is not None and not self._loop.is_closed():
            self._loop.remove_reader(self._master)
        for fd in (self._master, self._slave):
            if fd is not None:
                os.close(fd)
        self._master = self._slave = None
        self._loop = None
        self.path = None

    # ---------------------------------------------------------------- serving

    def _readable(self) -> None:
        assert self._master is not None
        try:
            data = os.read(self._master, 4096)
        except (BlockingIOError, InterruptedError):
            return
        except OSError as exc:  # the pty went away under us
            log.warning("optode %s: read failed: %s", self.chamber_id, exc)
            return
        for line in self._splitter.feed(data):
            reply = self.answer(line)
            if reply is not None:
                self._send(reply)

    def _send(self, data: bytes) -> None:
        assert self._master is not None
        try:
            os.write(self._master, data)
        except BlockingIOError:  # nobody reads the port: the bytes are lost on the wire
            log.debug("optode %s: output buffer full, reply dropped", self.chamber_id)

    def answer(self, line: bytes) -> bytes | None:
        """The optode's answer to one received line.

        Parameters
        ----------
        line
            One line without its terminator (no unit).

        Returns
        -------
        bytes or None
            The reply line, or None when the optode stays silent (no unit).
        """
        self.requests += 1
        if self._sync is not None:
            self._sync()
        if not self.rack.comm_ok(self.chamber_id, "optode"):
            self.silent += 1
            return None
        try:
            request = decode_request(line, source=self.path)
        except OptodeLineError as exc:
            return encode_reply(ErrorReply(tag=exc.tag, code=exc.code))
        reply = self._reply(request)
        if reply is None:
            self.silent += 1
            return None
        return encode_reply(reply)

    def _reply(self, request: OptodeRequest) -> OptodeReply | None:
        if request.command is OptodeCommand.SAMPLE:
            try:
                reading = self.rack.read_optode(self.chamber_id)
            except SensorNoReply:
                return None
            return measurement_from_reading(request.tag, reading)
        if request.command is OptodeCommand.IDENT:
            return dataclasses.replace(self.info, tag=request.tag)
        if request.command is OptodeCommand.CALGET:
            return dataclasses.replace(self.calibration, tag=request.tag)
        return ErrorReply(tag=request.tag, code=OptodeErrorCode.UNKNOWN_COMMAND)
