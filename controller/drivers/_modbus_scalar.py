"""Modbus scalars: how one engineering value becomes 16-bit register words and back.

Rule: no I/O, no clock, no transport imports. A value is ``raw * scale + bias`` where raw is an
unsigned or signed 16-bit word or an IEEE 754 single spread over two words in a configurable
word order. Values outside a point's engineering range are refused both ways with
:class:`~controller.errors.SquallError` naming the point; nothing is clamped silently.
"""

from __future__ import annotations

import enum
import math
import struct
from collections.abc import Sequence
from dataclasses import dataclass

from controller.errors import SquallError

__all__ = [
    "BLOCK_SPAN",
    "Encoding",
    "Point",
    "Table",
    "WordOrder",
    "check_word",
    "decode_float32",
    "decode_point",
    "encode_float32",
    "encode_point",
]

BLOCK_SPAN = 16
"""Addresses reserved per chamber block in each table; offsets run 0..15."""
_DECIMALS_KEPT = 9  # decoded integer-coded values are rounded to 1e-9 of their unit


class Table(enum.Enum):
    """The four Modbus data tables, with the function codes that read and write them."""

    COIL = "coil"
    DISCRETE_INPUT = "discrete-input"
    INPUT_REGISTER = "input-register"
    HOLDING_REGISTER = "holding-register"

    @property
    def is_bit(self) -> bool:
        """True for the single-bit tables (coils and discrete inputs)."""
        return self in (Table.COIL, Table.DISCRETE_INPUT)

    @property
    def writable(self) -> bool:
        """True for the tables a client may write (coils and holding registers)."""
        return self in (Table.COIL, Table.HOLDING_REGISTER)

    @property
    def function_codes(self) -> tuple[int, ...]:
        """Modbus function codes that address this table (no unit)."""
        return {
            "coil": (1, 5, 15),
            "discrete-input": (2,),
            "input-register": (4,),
            "holding-register": (3, 6, 16, 22, 23),
        }[self.value]

    @classmethod
    def for_function_code(cls, function_code: int) -> Table:
        """The table a function code addresses.

        Parameters
        ----------
        function_code
            Modbus function code (no unit).

        Returns
        -------
        Table
            The addressed table (no unit).
        """
        for table in cls:
            if function_code in table.function_codes:
                return table
        raise SquallError(f"function code {function_code} addresses no data table")


class Encoding(enum.Enum):
    """How an engineering value is carried in the table."""

    BIT = "bit"
    UINT16 = "uint16"
    INT16 = "int16"
    FLOAT32 = "float32"

    @property
    def word_count(self) -> int:
        """Number of 16-bit registers the value occupies (0 for a bit), count."""
        return {"bit": 0, "uint16": 1, "int16": 1, "float32": 2}[self.value]


class WordOrder(enum.Enum):
    """Order of the two registers of a 32-bit value; bytes within a register are big-endian."""

    HIGH_FIRST = "high-first"
    """Most significant word at the lower address (bytes ABCD on the wire)."""
    LOW_FIRST = "low-first"
    """Least significant word at the lower address (bytes CDAB on the wire)."""


@dataclass(frozen=True, kw_only=True)
class Point:
    """One named value in a chamber block.

    The engineering value is ``raw * scale + bias`` (for ``FLOAT32`` the raw value is the
    decoded IEEE 754 single). ``minimum``/``maximum`` bound the engineering value both when
    encoding (a request the device would refuse) and when decoding (a reply no healthy device
    sends).
    """

    name: str
    table: Table
    offset: int
    encoding: Encoding
    unit: str
    minimum: float
    maximum: float
    scale: float = 1.0
    bias: float = 0.0
    description: str = ""

    def __post_init__(self) -> None:
        if not 0 <= self.offset < BLOCK_SPAN:
            raise ValueError(f"{self.name}: offset {self.offset} outside 0..{BLOCK_SPAN - 1}")
        if self.table.is_bit != (self.encoding is Encoding.BIT):
            raise ValueError(f"{self.name}: bits live in coils/discrete inputs only")
        if self.offset + max(self.encoding.word_count, 1) > BLOCK_SPAN:
            raise ValueError(f"{self.name}: runs past the end of the block")
        if not (math.isfinite(self.scale) and self.scale > 0):
            raise ValueError(f"{self.name}: scale must be finite and positive")
        if not self.minimum <= self.maximum:
            raise ValueError(f"{self.name}: minimum above maximum")

    @property
    def word_count(self) -> int:
        """Registers occupied (0 for a bit), count."""
        return self.encoding.word_count


# --------------------------------------------------------------------------- words and floats


def check_word(word: object, where: str) -> int:
    """Return ``word`` if it is an int in 0..65535, else raise SquallError at ``where``."""
    if isinstance(word, bool) or not isinstance(word, int) or not 0 <= word <= 0xFFFF:
        raise SquallError(f"malformed register word {word!r}: expected 0..65535", field=where)
    return word


def encode_float32(value: float, word_order: WordOrder = WordOrder.HIGH_FIRST) -> tuple[int, int]:
    """Encode an IEEE 754 single into two registers.

    Parameters
    ----------
    value
        The value to encode; must be finite and representable as a float32 (any unit).
    word_order
        Which register goes to the lower address (no unit).

    Returns
    -------
    tuple of int
        Two register words, 0..65535 each, lower address first (no unit).
    """
    if not math.isfinite(value):
        raise SquallError(f"cannot encode non-finite value {value!r} as float32")
    try:
        packed = struct.pack(">f", value)
    except OverflowError:
        raise SquallError(f"value {value!r} is too large for a float32") from None
    high, low = struct.unpack(">HH", packed)
    return (high, low) if word_order is WordOrder.HIGH_FIRST else (low, high)


def decode_float32(
    words: Sequence[int], word_order: WordOrder = WordOrder.HIGH_FIRST, *, where: str = "float32"
) -> float:
    """Decode two registers into an IEEE 754 single.

    Parameters
    ----------
    words
        Two register words, lower address first (no unit).
    word_order
        Which register holds the high half (no unit).
    where
        Field path named in errors (no unit).

    Returns
    -------
    float
        The decoded value, finite (any unit).
    """
    if len(words) != 2:
        raise SquallError(f"expected 2 registers for a float32, got {len(words)}", field=where)
    first, second = (check_word(w, where) for w in words)
    high, low = (first, second) if word_order is WordOrder.HIGH_FIRST else (second, first)
    (value,) = struct.unpack(">f", struct.pack(">HH", high, low))
    if not math.isfinite(value):
        raise SquallError(f"device sent a non-finite float32 ({value!r})", field=where)
    return float(value)


# --------------------------------------------------------------------------- one point


def _check_range(p: Point, value: float, where: str, verb: str) -> None:
    if not p.minimum <= value <= p.maximum:
        raise SquallError(
            f"{verb} {value!r} {p.unit} outside {p.minimum:g}..{p.maximum:g} {p.unit}",
            field=where,
        )


def encode_point(
    p: Point,
    value: float,
    *,
    word_order: WordOrder = WordOrder.HIGH_FIRST,
    where: str | None = None,
) -> tuple[int, ...]:
    """Encode one engineering value into its register words.

    Parameters
    ----------
    p
        The point (table, encoding, scaling) (no unit).
    value
        The engineering value, in ``p.unit``; must lie in ``p.minimum..p.maximum``.
    word_order
        Register order of 32-bit values (no unit).
    where
        Field path named in errors; defaults to the point's name (no unit).

    Returns
    -------
    tuple of int
        ``p.word_count`` words, lower address first, each 0..65535 (no unit).
    """
    where = where or p.name
    if p.encoding is Encoding.BIT:
        raise SquallError("bits are not carried in registers; use the bit helpers", field=where)
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise SquallError(f"cannot encode {value!r}: not a finite number", field=where)
    _check_range(p, value, where, "value")
    if p.encoding is Encoding.FLOAT32:
        return encode_float32((value - p.bias) / p.scale, word_order)
    raw = round((value - p.bias) / p.scale)
    low, high = (0, 0xFFFF) if p.encoding is Encoding.UINT16 else (-0x8000, 0x7FFF)
    if not low <= raw <= high:
        raise SquallError(
            f"value {value!r} {p.unit} needs raw {raw}, outside {p.encoding.value}", field=where
        )
    return (raw & 0xFFFF,)


def decode_point(
    p: Point,
    words: Sequence[int],
    *,
    word_order: WordOrder = WordOrder.HIGH_FIRST,
    where: str | None = None,
) -> float:
    """Decode one point's register words into its engineering value.

    Parameters
    ----------
    p
        The point (table, encoding, scaling) (no unit).
    words
        Exactly ``p.word_count`` words as read from the device (no unit).
    word_order
        Register order of 32-bit values (no unit).
    where
        Field path named in errors; defaults to the point's name (no unit).

    Returns
    -------
    float
        The engineering value, in ``p.unit``, within ``p.minimum..p.maximum``.
    """
    where = where or p.name
    if p.encoding is Encoding.BIT:
        raise SquallError("bits are not carried in registers; use the bit helpers", field=where)
    if len(words) != p.word_count:
        raise SquallError(f"expected {p.word_count} register(s), got {len(words)}", field=where)
    if p.encoding is Encoding.FLOAT32:
        raw: float = decode_float32(words, word_order, where=where)
    else:
        word = check_word(words[0], where)
        raw = word - 0x10000 if p.encoding is Encoding.INT16 and word & 0x8000 else word
    value = raw * p.scale + p.bias
    if p.encoding is not Encoding.FLOAT32:
        # 8421 * 0.01 is 84.21000000000001 in binary floats; the device meant 84.21.
        value = round(value, _DECIMALS_KEPT)
    _check_range(p, value, where, "device reported")
    return value
