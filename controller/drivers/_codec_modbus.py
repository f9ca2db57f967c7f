"""Pure codec for the chamber I/O module: the points of a chamber block and its records.

Rule: this module does no I/O, reads no clock and imports no transport. Everything that
decides which value sits at which offset lives here (and in :mod:`._modbus_scalar` for the
word formats), so the controller's transport, the simulator's server and
``hardware-notes/register-map.md`` agree by construction.

Layout: every chamber owns one *block* of addresses, ``base + offset``, with the same base in
all four Modbus tables (coils, discrete inputs, input registers, holding registers). A block is
one logical I/O module with its own device-side watchdog (see :mod:`._register_map`).
"""

from __future__ import annotations

import enum
from collections.abc import Sequence
from dataclasses import dataclass

from controller.drivers._modbus_scalar import (
    Encoding,
    Point,
    Table,
    WordOrder,
    check_word,
    decode_point,
    encode_point,
)
from controller.errors import SquallError

__all__ = [
    "CYCLIC_INPUT_WORDS",
    "POINTS",
    "ContactStatus",
    "InputBits",
    "InputStatus",
    "InputValues",
    "OutputValues",
    "RelayBits",
    "decode_contact_status",
    "decode_input_bits",
    "decode_inputs",
    "decode_outputs",
    "decode_relay_word",
    "decode_relays",
    "decode_safe_outputs",
    "encode_contact_status",
    "encode_input_bits",
    "encode_inputs",
    "encode_outputs",
    "encode_relay_word",
    "encode_relays",
    "encode_safe_outputs",
    "next_watchdog_count",
    "point",
]


def _p(
    name: str,
    table: Table,
    offset: int,
    encoding: Encoding,
    unit: str,
    minimum: float,
    maximum: float,
    scale: float = 1.0,
    description: str = "",
) -> Point:
    return Point(
        name=name,
        table=table,
        offset=offset,
        encoding=encoding,
        unit=unit,
        minimum=minimum,
        maximum=maximum,
        scale=scale,
        description=description,
    )


_IR, _HR, _CO, _DI = (
    Table.INPUT_REGISTER,
    Table.HOLDING_REGISTER,
    Table.COIL,
    Table.DISCRETE_INPUT,
)
_U16, _I16, _F32, _BIT = Encoding.UINT16, Encoding.INT16, Encoding.FLOAT32, Encoding.BIT

POINTS: tuple[Point, ...] = (
    _p("temperature_c", _IR, 0, _F32, "°C", -50.0, 150.0, 1.0, "water temperature probe"),
    _p("par_umol_m2_s", _IR, 2, _U16, "µmol photons m⁻² s⁻¹", 0.0, 6000.0, 0.1, "PAR sensor"),
    _p("flow_cm_s", _IR, 3, _U16, "cm s⁻¹", 0.0, 600.0, 0.01, "flow over the community"),
    _p("level_pct", _IR, 4, _U16, "% of nominal", 0.0, 150.0, 0.1, "water level transmitter"),
    _p("input_status", _IR, 5, _U16, "bit field", 0, 0x000F, 1.0, "per-input fault bits"),
    _p("contact_status", _IR, 6, _U16, "bit field", 0, 0x0007, 1.0, "the contacts, as bits"),
    _p("heater_pct", _HR, 0, _U16, "%", 0.0, 100.0, 0.01, "heater drive"),
    _p("chiller_pct", _HR, 1, _U16, "%", 0.0, 100.0, 0.01, "chiller drive"),
    _p("lamp_pct", _HR, 2, _U16, "%", 0.0, 100.0, 0.01, "lamp drive"),
    _p("pump_pct", _HR, 3, _U16, "%", 0.0, 100.0, 0.01, "pump drive"),
    _p("watchdog_timeout_s", _HR, 4, _U16, "s", 0.0, 6000.0, 0.1, "0 = watchdog off"),
    _p("watchdog_counter", _HR, 5, _U16, "count", 0, 0xFFFF, 1.0, "feed: write a new value"),
    _p("safe_heater_pct", _HR, 6, _U16, "%", 0.0, 100.0, 0.01, "heater drive when tripped"),
    _p("safe_chiller_pct", _HR, 7, _U16, "%", 0.0, 100.0, 0.01, "chiller drive when tripped"),
    _p("safe_lamp_pct", _HR, 8, _U16, "%", 0.0, 100.0, 0.01, "lamp drive when tripped"),
    _p("safe_pump_pct", _HR, 9, _U16, "%", 0.0, 100.0, 0.01, "pump drive when tripped"),
    _p("relay_bits", _HR, 10, _U16, "bit field", 0, 0x000F, 1.0, "the relay coils, as bits"),
    _p("heater_on", _CO, 0, _BIT, "relay", 0, 1, 1.0, "heater relay closed"),
    _p("chiller_on", _CO, 1, _BIT, "relay", 0, 1, 1.0, "chiller relay closed"),
    _p("lamp_on", _CO, 2, _BIT, "relay", 0, 1, 1.0, "lamp relay closed"),
    _p("pump_on", _CO, 3, _BIT, "relay", 0, 1, 1.0, "pump relay closed"),
    _p("level_ok", _DI, 0, _BIT, "contact", 0, 1, 1.0, "level switch closed (level good)"),
    _p("estop_ok", _DI, 1, _BIT, "contact", 0, 1, 1.0, "E-stop loop closed (not pressed)"),
    _p("watchdog_tripped", _DI, 2, _BIT, "flag", 0, 1, 1.0, "outputs held safe by watchdog"),
)
"""Every point of a chamber block, in table and offset order (see hardware-notes)."""


_BY_NAME = {p.name: p for p in POINTS}  # a constant index: looked up on every encode and decode


def point(name: str) -> Point:
    """Return the point called ``name``.

    Parameters
    ----------
    name
        Point name, e.g. ``"heater_pct"`` (no unit: it is an identifier).

    Returns
    -------
    Point
        The point's table, offset, encoding and scaling (no unit: a description).
    """
    found = _BY_NAME.get(name)
    if found is not None:
        return found
    known = ", ".join(p.name for p in POINTS)
    raise SquallError(f"no register-map point {name!r}; known points: {known}", field=name)


# --------------------------------------------------------------------------- block records


class InputStatus(enum.IntFlag):
    """Fault bits of the ``input_status`` register: the input's reading is not valid."""

    TEMPERATURE_FAULT = 0x0001
    PAR_FAULT = 0x0002
    FLOW_FAULT = 0x0004
    LEVEL_FAULT = 0x0008


_INPUT_FIELDS: tuple[tuple[str, str, InputStatus], ...] = (
    ("temperature_c", "temperature_c", InputStatus.TEMPERATURE_FAULT),
    ("par_umol_m2_s", "par_umol_m2_s", InputStatus.PAR_FAULT),
    ("flow_cm_s", "flow_cm_s", InputStatus.FLOW_FAULT),
    ("level_pct", "level_pct", InputStatus.LEVEL_FAULT),
)
_INPUT_WORDS = 6  # input registers 0..5
CYCLIC_INPUT_WORDS = 7
"""Input registers 0..6 of a block: every reading and every contact in one request (count)."""


def _fault_words(p: Point, word_order: WordOrder) -> tuple[int, ...]:
    """Words a device puts in a faulted input: quiet NaN for floats, all ones for integers."""
    if p.encoding is Encoding.FLOAT32:
        nan = (0x7FC0, 0x0000)
        return nan if word_order is WordOrder.HIGH_FIRST else (nan[1], nan[0])
    return (0xFFFF,) * p.word_count


@dataclass(frozen=True, kw_only=True)
class InputValues:
    """The analog inputs of one chamber block; ``None`` means the device flags a fault."""

    temperature_c: float | None
    """Water temperature, °C."""
    par_umol_m2_s: float | None
    """PAR at the community, µmol photons m⁻² s⁻¹."""
    flow_cm_s: float | None
    """Flow over the community, cm s⁻¹."""
    level_pct: float | None
    """Water level, % of nominal."""


def encode_inputs(
    values: InputValues,
    word_order: WordOrder = WordOrder.HIGH_FIRST,
    *,
    where: str = "inputs",
) -> tuple[int, ...]:
    """Encode a block's analog inputs as the device presents them (input registers 0..5).

    Parameters
    ----------
    values
        Readings in engineering units (°C, µmol photons m⁻² s⁻¹, cm s⁻¹, %); ``None`` marks a
        faulted input, which sets its status bit and fills its words with the fault pattern.
    word_order
        Register order of 32-bit values (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    tuple of int
        Six words for input-register offsets 0..5 (no unit).
    """
    words = [0] * _INPUT_WORDS
    status = InputStatus(0)
    for attr, name, flag in _INPUT_FIELDS:
        p = point(name)
        value = getattr(values, attr)
        if value is None:
            status |= flag
            encoded = _fault_words(p, word_order)
        else:
            encoded = encode_point(p, value, word_order=word_order, where=f"{where}.{name}")
        words[p.offset : p.offset + p.word_count] = encoded
    words[point("input_status").offset] = int(status)
    return tuple(words)


def decode_inputs(
    words: Sequence[int],
    word_order: WordOrder = WordOrder.HIGH_FIRST,
    *,
    where: str = "inputs",
) -> InputValues:
    """Decode input registers 0..5 of a block.

    Parameters
    ----------
    words
        Six words read from input-register offsets 0..5 (no unit).
    word_order
        Register order of 32-bit values (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    InputValues
        Readings in engineering units (°C, µmol photons m⁻² s⁻¹, cm s⁻¹, %), ``None`` where
        the device flags the input as faulted.
    """
    if len(words) != _INPUT_WORDS:
        raise SquallError(f"expected {_INPUT_WORDS} input registers, got {len(words)}", field=where)
    status_word = check_word(words[point("input_status").offset], f"{where}.input_status")
    if status_word & ~int(sum(InputStatus)) & 0xFFFF:
        raise SquallError(
            f"reserved status bits set (0x{status_word:04X})", field=f"{where}.input_status"
        )
    status = InputStatus(status_word)
    decoded: dict[str, float | None] = {}
    for attr, name, flag in _INPUT_FIELDS:
        p = point(name)
        chunk = words[p.offset : p.offset + p.word_count]
        if status & flag:
            for w in chunk:
                check_word(w, f"{where}.{name}")
            decoded[attr] = None
        else:
            decoded[attr] = decode_point(p, chunk, word_order=word_order, where=f"{where}.{name}")
    return InputValues(**decoded)


@dataclass(frozen=True, kw_only=True)
class OutputValues:
    """Actuator drives of one chamber block, each 0..100 %."""

    heater_pct: float
    """Heater drive, %."""
    chiller_pct: float
    """Chiller drive, %."""
    lamp_pct: float
    """Lamp drive, %."""
    pump_pct: float
    """Pump drive, %."""


_OUTPUT_NAMES = ("heater_pct", "chiller_pct", "lamp_pct", "pump_pct")


def _encode_drive_block(values: OutputValues, prefix: str, where: str) -> tuple[int, ...]:
    out: list[int] = []
    for name in _OUTPUT_NAMES:
        (word,) = encode_point(
            point(prefix + name), getattr(values, name), where=f"{where}.{prefix}{name}"
        )
        out.append(word)
    return tuple(out)


def _decode_drive_block(words: Sequence[int], prefix: str, where: str) -> OutputValues:
    if len(words) != len(_OUTPUT_NAMES):
        raise SquallError(
            f"expected {len(_OUTPUT_NAMES)} holding registers, got {len(words)}", field=where
        )
    return OutputValues(
        **{
            name: decode_point(point(prefix + name), [w], where=f"{where}.{prefix}{name}")
            for name, w in zip(_OUTPUT_NAMES, words, strict=True)
        }
    )


def encode_outputs(values: OutputValues, *, where: str = "outputs") -> tuple[int, ...]:
    """Encode actuator drives for holding registers 0..3.

    Parameters
    ----------
    values
        Drives, % (0..100 each; resolution 0.01 %).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    tuple of int
        Four words for holding-register offsets 0..3 (no unit).
    """
    return _encode_drive_block(values, "", where)


def decode_outputs(words: Sequence[int], *, where: str = "outputs") -> OutputValues:
    """Decode holding registers 0..3 into actuator drives.

    Parameters
    ----------
    words
        Four words read from holding-register offsets 0..3 (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    OutputValues
        Drives, %.
    """
    return _decode_drive_block(words, "", where)


def encode_safe_outputs(values: OutputValues, *, where: str = "safe") -> tuple[int, ...]:
    """Encode the watchdog's safe drives for holding registers 6..9.

    Parameters
    ----------
    values
        Drives the module applies when its watchdog trips, % (0..100 each).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    tuple of int
        Four words for holding-register offsets 6..9 (no unit).
    """
    return _encode_drive_block(values, "safe_", where)


def decode_safe_outputs(words: Sequence[int], *, where: str = "safe") -> OutputValues:
    """Decode holding registers 6..9 into the watchdog's safe drives.

    Parameters
    ----------
    words
        Four words read from holding-register offsets 6..9 (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    OutputValues
        Safe drives, %.
    """
    return _decode_drive_block(words, "safe_", where)


def next_watchdog_count(count: int) -> int:
    """The next value to write to ``watchdog_counter`` (wraps from 65535 to 0).

    Parameters
    ----------
    count
        The value last written, 0..65535 (count).

    Returns
    -------
    int
        A different value, 0..65535 (count).
    """
    return (check_word(count, "watchdog_counter") + 1) & 0xFFFF


@dataclass(frozen=True, kw_only=True)
class RelayBits:
    """Relay coils 0..3 of a block: True = relay closed (actuator may run)."""

    heater_on: bool
    chiller_on: bool
    lamp_on: bool
    pump_on: bool


@dataclass(frozen=True, kw_only=True)
class InputBits:
    """Discrete inputs 0..2 of a block (closed contacts read True)."""

    level_ok: bool
    """Level switch closed: water level good. Open (False) on low level or a broken wire."""
    estop_ok: bool
    """E-stop loop closed: not pressed. Open (False) when pressed or the wire is broken."""
    watchdog_tripped: bool
    """The module's watchdog expired and holds the outputs at their safe drives."""


_RELAY_NAMES = ("heater_on", "chiller_on", "lamp_on", "pump_on")
_INPUT_BIT_NAMES = ("level_ok", "estop_ok", "watchdog_tripped")


def _decode_bits(bits: Sequence[object], names: Sequence[str], where: str) -> dict[str, bool]:
    if len(bits) < len(names):
        raise SquallError(f"expected {len(names)} bits, got {len(bits)}", field=where)
    out: dict[str, bool] = {}
    for name, bit in zip(names, bits, strict=False):
        if not (isinstance(bit, bool) or bit in (0, 1)):
            raise SquallError(f"malformed bit {bit!r}", field=f"{where}.{name}")
        out[name] = bool(bit)
    return out


def encode_relays(relays: RelayBits) -> tuple[bool, ...]:
    """Coil values for offsets 0..3 (heater, chiller, lamp, pump).

    Parameters
    ----------
    relays
        Relay states (no unit).

    Returns
    -------
    tuple of bool
        Four coil values, True = closed (no unit).
    """
    return tuple(getattr(relays, n) for n in _RELAY_NAMES)


def decode_relays(bits: Sequence[object], *, where: str = "relays") -> RelayBits:
    """Decode coils 0..3; extra trailing bits (a read pads to whole bytes) are ignored.

    Parameters
    ----------
    bits
        At least four coil values as read (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    RelayBits
        Relay states (no unit).
    """
    return RelayBits(**_decode_bits(bits, _RELAY_NAMES, where))


def encode_relay_word(relays: RelayBits) -> int:
    """The ``relay_bits`` word (holding register 10): coil ``i`` in bit ``i``.

    Parameters
    ----------
    relays
        Relay states (no unit).

    Returns
    -------
    int
        The word, 0..15 (no unit).
    """
    return sum(1 << i for i, closed in enumerate(encode_relays(relays)) if closed)


def decode_relay_word(word: int, *, where: str = "relay_bits") -> RelayBits:
    """Decode the ``relay_bits`` word (holding register 10) into relay states.

    Parameters
    ----------
    word
        The word, 0..65535 (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    RelayBits
        Relay states (no unit); a bit above 0x8 set is a malformed word (SquallError).
    """
    value = check_word(word, where)
    if value & ~0x000F:
        raise SquallError(f"reserved relay bits set (0x{value:04X})", field=where)
    return decode_relays([bool(value >> i & 1) for i in range(len(_RELAY_NAMES))], where=where)


def encode_input_bits(inputs: InputBits) -> tuple[bool, ...]:
    """Discrete-input values for offsets 0..2 (level_ok, estop_ok, watchdog_tripped).

    Parameters
    ----------
    inputs
        Contact states (no unit).

    Returns
    -------
    tuple of bool
        Three values (no unit).
    """
    return tuple(getattr(inputs, n) for n in _INPUT_BIT_NAMES)


def decode_input_bits(bits: Sequence[object], *, where: str = "contacts") -> InputBits:
    """Decode discrete inputs 0..2; extra trailing bits are ignored.

    Parameters
    ----------
    bits
        At least three values as read (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    InputBits
        Contact states (no unit).
    """
    return InputBits(**_decode_bits(bits, _INPUT_BIT_NAMES, where))


class ContactStatus(enum.IntFlag):
    """Bits of the ``contact_status`` input register: the discrete inputs, mirrored."""

    LEVEL_OK = 0x0001
    ESTOP_OK = 0x0002
    WATCHDOG_TRIPPED = 0x0004


_CONTACT_FLAGS = (
    ("level_ok", ContactStatus.LEVEL_OK),
    ("estop_ok", ContactStatus.ESTOP_OK),
    ("watchdog_tripped", ContactStatus.WATCHDOG_TRIPPED),
)


def encode_contact_status(inputs: InputBits) -> int:
    """The ``contact_status`` word (input register 6) for a block's contacts.

    Parameters
    ----------
    inputs
        Contact states (no unit).

    Returns
    -------
    int
        The word, 0..7 (no unit).
    """
    return int(sum((flag for name, flag in _CONTACT_FLAGS if getattr(inputs, name)), start=0))


def decode_contact_status(word: int, *, where: str = "contact_status") -> InputBits:
    """Decode the ``contact_status`` word (input register 6) into contact states.

    Parameters
    ----------
    word
        The word as read, 0..65535 (no unit).
    where
        Field-path prefix named in errors (no unit).

    Returns
    -------
    InputBits
        Contact states (no unit); a reserved bit set is a malformed reply (SquallError).
    """
    value = check_word(word, where)
    if value & ~int(sum(ContactStatus)) & 0xFFFF:
        raise SquallError(f"reserved contact bits set (0x{value:04X})", field=where)
    return InputBits(**{name: bool(value & flag) for name, flag in _CONTACT_FLAGS})
