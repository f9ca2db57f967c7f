"""One chamber's I/O module as the simulator presents it: registers, relays, watchdog, E-stop.

Rules of this module
--------------------
- The module is the device behind one chamber block of the register map
  (``hardware-notes/register-map.md``). It knows nothing about Modbus framing or sockets:
  :mod:`._modbus` asks it for words and bits and hands it writes.
- Time is the rack's simulated time (``rack.t_s``). The watchdog and the power state are
  evaluated by :meth:`IoModule.refresh`, which the server calls before every request and the
  runner after every physics step, so a trip is seen no later than the next of either.
- Effective drive of each actuator = holding-register drive if its relay coil is closed, else
  0; everything is 0 while the E-stop loop is open. The result goes to ``rack.set_outputs``
  after every change, so the rack always runs what the module would switch.
- A refused write changes nothing and answers a Modbus exception code (:class:`Refusal`).
  Writes are checked first (:meth:`IoModule.check_holding`, :meth:`IoModule.check_coils`)
  and applied after, so a request that spans several modules is taken by all or by none.
  Reserved offsets read 0 and take writes of 0, which change nothing.
"""

from __future__ import annotations

import enum
import math

from controller.drivers import (
    BLOCK_SPAN,
    POINTS,
    InputBits,
    InputValues,
    Table,
    WordOrder,
    decode_point,
    encode_contact_status,
    encode_inputs,
    point,
)
from controller.errors import SquallError
from controller.rig import FaultKind
from simulator import Rack
from simulator._readout import Sweep

__all__ = ["IoModule", "Refusal"]

_DRIVES = ("heater_pct", "chiller_pct", "lamp_pct", "pump_pct")
_HR_POINTS = {p.offset: p for p in POINTS if p.table is Table.HOLDING_REGISTER}
_COIL_OFFSETS = frozenset(p.offset for p in POINTS if p.table is Table.COIL)
_DRIVE_OFFSETS = frozenset(point(n).offset for n in _DRIVES)
_SAFE_OFFSET = {n: point("safe_" + n).offset for n in _DRIVES}
_RELAY_OFFSET = {n: point(n.replace("_pct", "_on")).offset for n in _DRIVES}
_TIMEOUT = point("watchdog_timeout_s")
_COUNTER = point("watchdog_counter")
_RELAY_WORD = point("relay_bits")
_OUTPUT_OFFSETS = _DRIVE_OFFSETS | {_RELAY_WORD.offset}  # refused while tripped


class Refusal(enum.IntEnum):
    """Why a write was refused; values are the Modbus exception codes sent back."""

    ILLEGAL_ADDRESS = 0x02
    """The write touches an address with no writable point."""
    ILLEGAL_VALUE = 0x03
    """A value is outside its point's range."""
    BUSY = 0x06
    """Output writes while the watchdog holds the outputs safe: feed it first."""


class IoModule:
    """The simulated I/O module of one chamber.

    Parameters
    ----------
    rack
        The simulated rack the module reads and drives.
    chamber_id
        The chamber whose block this module serves.
    word_order
        Register order of 32-bit values (no unit).
    """

    def __init__(self, rack: Rack, chamber_id: str, word_order: WordOrder) -> None:
        self.rack = rack
        self.chamber_id = chamber_id
        self.word_order = word_order
        self._nominal_volume_l = rack.rig.chamber(chamber_id).water_volume_l
        self._level: tuple[float, float] | None = None
        """(rack time, level) of the last level computed, (s, %)."""
        self._hr = [0] * BLOCK_SPAN
        self._coils = [False] * BLOCK_SPAN
        self._tripped = False
        self._last_feed_s = rack.t_s
        self._estop_pressed = False
        self._unpowered = False
        self.trips = 0
        """How many times the watchdog has tripped since start, count."""
        self._apply()

    # ------------------------------------------------------------------ state

    @property
    def tripped(self) -> bool:
        """True while the watchdog holds the outputs at their safe drives."""
        return self._tripped

    @property
    def estop_pressed(self) -> bool:
        """True while the chamber's E-stop loop is open."""
        return self._estop_pressed

    def set_estop(self, pressed: bool) -> None:
        """Press or release the chamber's E-stop (open or close its loop).

        Parameters
        ----------
        pressed
            True opens the loop: every actuator loses power until released (no unit).
        """
        self._estop_pressed = bool(pressed)
        self._apply()

    def reachable(self) -> bool:
        """Whether the module answers now (no comm-timeout, no power loss on its chamber)."""
        return self.rack.comm_ok(self.chamber_id, "modbus")

    def refresh(self) -> None:
        """Bring the module up to ``rack.t_s``: reboot after a power loss, expire the watchdog."""
        now = self.rack.t_s
        unpowered = any(
            f.kind is FaultKind.POWER_LOSS and f.chamber in (None, self.chamber_id)
            for f in self.rack.active_faults()
        )
        if unpowered:
            self._unpowered = True
            return
        if self._unpowered:  # power is back: the module boots with power-on defaults
            self._unpowered = False
            self._hr = [0] * BLOCK_SPAN
            self._coils = [False] * BLOCK_SPAN
            self._tripped = False
            self._last_feed_s = now
            self._apply()
            return
        timeout_s = decode_point(_TIMEOUT, [self._hr[_TIMEOUT.offset]])
        if timeout_s > 0 and not self._tripped and now - self._last_feed_s > timeout_s:
            self._trip()

    def _trip(self) -> None:
        for name in _DRIVES:
            safe_word = self._hr[_SAFE_OFFSET[name]]
            self._hr[point(name).offset] = safe_word
            self._coils[_RELAY_OFFSET[name]] = safe_word > 0
        self._tripped = True
        self.trips += 1
        self._apply()

    def effective_drives(self) -> dict[str, float]:
        """What the module switches to the actuators now.

        Returns
        -------
        dict of str to float
            Drive per actuator (``heater_pct`` ...), %.
        """
        if self._estop_pressed:
            return {name: 0.0 for name in _DRIVES}
        return {
            name: (
                decode_point(point(name), [self._hr[point(name).offset]])
                if self._coils[_RELAY_OFFSET[name]]
                else 0.0
            )
            for name in _DRIVES
        }

    def _apply(self) -> None:
        self.rack.set_outputs(self.chamber_id, **self.effective_drives())

    # ------------------------------------------------------------------ reads

    @staticmethod
    def _measured(value: float | None, name: str) -> float | None:
        """What the module's input makes of a sensor's value (None: silent sensor)."""
        if value is None:
            return None
        p = point(name)
        value = float(value)
        if not math.isfinite(value) or value > p.maximum:
            return None  # beyond the input's measuring range: the module flags a fault
        if value < p.minimum:
            # noise around zero of a non-negative quantity reads 0; anything else is a fault
            return p.minimum if p.minimum == 0.0 else None
        return value

    def _level_pct(self) -> float:
        """The level transmitter: water volume over the nominal volume, %; the rack's whole
        truth is costly, so it is looked up once per rack time, not once per request."""
        now = self.rack.t_s
        if self._level is None or self._level[0] != now:
            volume_l = self.rack.truth(self.chamber_id).water_volume_l
            self._level = (now, 100.0 * volume_l / self._nominal_volume_l)
        return self._level[1]

    def input_words(self) -> tuple[int, ...]:
        """Input registers 0..6: sample every input and the contacts now, and encode them.

        Returns
        -------
        tuple of int
            Seven register words (no unit).
        """
        return self.encode_sweep(self.rack.sweep([self.chamber_id], [False]), 0)

    def encode_sweep(self, sweep: Sweep, index: int) -> tuple[int, ...]:
        """Input registers 0..6 from a rack sweep's readings of this chamber (a sweep reads
        several modules at once, as one-by-one reads in its order would).

        Parameters
        ----------
        sweep
            Readings of several chambers (°C, µmol photons m⁻² s⁻¹, cm s⁻¹, level switch).
        index
            This chamber's place in the sweep (no unit).

        Returns
        -------
        tuple of int
            Seven register words (no unit).
        """
        failed = sweep.errors[index] is not None  # a sensor that broke down reads as a fault
        level = self._level_pct()
        level_point = point("level_pct")
        values = InputValues(
            temperature_c=None
            if failed
            else self._measured(sweep.temperature_c[index], "temperature_c"),
            par_umol_m2_s=None if failed else self._measured(sweep.par[index], "par_umol_m2_s"),
            flow_cm_s=None if failed else self._measured(sweep.flow_cm_s[index], "flow_cm_s"),
            level_pct=min(max(level, level_point.minimum), level_point.maximum),
        )
        words = encode_inputs(values, self.word_order, where=f"{self.chamber_id}.inputs")
        level_ok = sweep.level_ok[index]
        contacts = InputBits(
            level_ok=self.rack.read_level_ok(self.chamber_id) if level_ok is None else level_ok,
            estop_ok=not self._estop_pressed,
            watchdog_tripped=self._tripped,
        )
        return (*words, encode_contact_status(contacts))

    def holding_words(self) -> tuple[int, ...]:
        """All holding registers of the block (unmapped offsets read 0; ``relay_bits`` reads
        the relay coils).

        Returns
        -------
        tuple of int
            ``BLOCK_SPAN`` words (no unit).
        """
        words = list(self._hr)
        words[_RELAY_WORD.offset] = sum(
            1 << i for i, name in enumerate(_DRIVES) if self._coils[_RELAY_OFFSET[name]]
        )
        return tuple(words)

    def coil_bits(self) -> tuple[bool, ...]:
        """All coils of the block (unmapped offsets read open).

        Returns
        -------
        tuple of bool
            ``BLOCK_SPAN`` bits (no unit).
        """
        return tuple(self._coils)

    def _contacts(self) -> InputBits:
        return InputBits(
            level_ok=self.rack.read_level_ok(self.chamber_id),
            estop_ok=not self._estop_pressed,
            watchdog_tripped=self._tripped,
        )

    def input_bits(self) -> tuple[bool, ...]:
        """All discrete inputs of the block (unmapped offsets read open).

        Returns
        -------
        tuple of bool
            ``BLOCK_SPAN`` bits (no unit).
        """
        contacts = self._contacts()
        bits = [False] * BLOCK_SPAN
        bits[point("level_ok").offset] = contacts.level_ok
        bits[point("estop_ok").offset] = contacts.estop_ok
        bits[point("watchdog_tripped").offset] = contacts.watchdog_tripped
        return tuple(bits)

    # ----------------------------------------------------------------- writes

    def check_holding(self, offset: int, words: list[int]) -> Refusal | None:
        """Whether a holding-register write would be refused, changing nothing.

        Parameters
        ----------
        offset
            Block offset of the first register (no unit).
        words
            Register words to write (no unit).

        Returns
        -------
        Refusal or None
            Why the write would be refused, or None when it would be applied (no unit).
        """
        if offset < 0 or offset + len(words) > BLOCK_SPAN:
            return Refusal.ILLEGAL_ADDRESS
        for o, word in enumerate(words, start=offset):
            p = _HR_POINTS.get(o)
            if p is None:
                if word != 0:
                    return Refusal.ILLEGAL_ADDRESS
                continue
            try:
                decode_point(p, [word])
            except SquallError:
                return Refusal.ILLEGAL_VALUE
        if self._tripped and _OUTPUT_OFFSETS.intersection(range(offset, offset + len(words))):
            return Refusal.BUSY
        return None

    def write_holding(self, offset: int, words: list[int]) -> Refusal | None:
        """Write holding registers starting at a block offset.

        Parameters
        ----------
        offset
            Block offset of the first register (no unit).
        words
            Register words to write (no unit).

        Returns
        -------
        Refusal or None
            Why the whole write was refused, or None when it was applied (no unit).
        """
        refusal = self.check_holding(offset, words)
        if refusal is not None:
            return refusal
        now = self.rack.t_s
        for o, word in enumerate(words, start=offset):
            if o not in _HR_POINTS:
                continue  # a reserved offset: the 0 written changes nothing
            if o == _RELAY_WORD.offset:  # the relay coils, as bits
                for i, name in enumerate(_DRIVES):
                    self._coils[_RELAY_OFFSET[name]] = bool(word >> i & 1)
                continue
            if o == _COUNTER.offset and word != self._hr[o]:
                self._last_feed_s = now
                self._tripped = False
            if o == _TIMEOUT.offset:
                self._last_feed_s = now
            self._hr[o] = word
        self._apply()
        return None

    def check_coils(self, offset: int, bits: list[bool]) -> Refusal | None:
        """Whether a relay-coil write would be refused, changing nothing.

        Parameters
        ----------
        offset
            Block offset of the first coil (no unit).
        bits
            Coil values, True = closed (no unit).

        Returns
        -------
        Refusal or None
            Why the write would be refused, or None when it would be applied (no unit).
        """
        if offset < 0 or offset + len(bits) > BLOCK_SPAN:
            return Refusal.ILLEGAL_ADDRESS
        if any(bit and o not in _COIL_OFFSETS for o, bit in enumerate(bits, start=offset)):
            return Refusal.ILLEGAL_ADDRESS
        if self._tripped and _COIL_OFFSETS.intersection(range(offset, offset + len(bits))):
            return Refusal.BUSY
        return None

    def write_coils(self, offset: int, bits: list[bool]) -> Refusal | None:
        """Write relay coils starting at a block offset.

        Parameters
        ----------
        offset
            Block offset of the first coil (no unit).
        bits
            Coil values, True = closed (no unit).

        Returns
        -------
        Refusal or None
            Why the whole write was refused, or None when it was applied (no unit).
        """
        refusal = self.check_coils(offset, bits)
        if refusal is not None:
            return refusal
        for o, bit in enumerate(bits, start=offset):
            if o in _COIL_OFFSETS:
                self._coils[o] = bool(bit)
        self._apply()
        return None
