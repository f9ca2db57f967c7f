"""Modbus responses: whatever register words or bits a module returns decode to values inside
the documented ranges (or ``None`` for an input the module flags as faulted) or to a
``SquallError`` naming the block and point, never to another exception.

Words are drawn anywhere (negative, above 0xFFFF, the float32 patterns of NaN and infinity),
with wrong lengths and, for bits, with objects that are not bits, since a transport bug or a
misbehaving module could hand over any of them. The register map is probed at arbitrary
addresses and spans.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Sequence

from hypothesis import event, given
from hypothesis import strategies as st

from controller.drivers import (
    BLOCK_SPAN,
    POINTS,
    Encoding,
    InputValues,
    OutputValues,
    RegisterMap,
    Table,
    WordOrder,
    decode_input_bits,
    decode_inputs,
    decode_outputs,
    decode_point,
    decode_relays,
    decode_safe_outputs,
    point,
)
from controller.errors import SquallError

from ._harness import budget

_SPECIAL_WORDS = [0, 1, 0x7F80, 0xFF80, 0x7FC0, 0xFFFF, 0x8000, 0x7FFF, 10000, 10001]
"""Words that make float32 NaN/±inf halves, signed extremes and the % scale's edges."""
WORDS = st.one_of(
    st.integers(0, 0xFFFF),
    st.sampled_from(_SPECIAL_WORDS),
    st.integers(-(2**40), 2**40),
)
"""One register word as a module or a faulty transport might hand it over."""


def word_lists(length: int) -> st.SearchStrategy[list[int]]:
    """Half the right length, else one off or anything from empty to long."""
    right = st.lists(WORDS, min_size=length, max_size=length)
    return st.one_of(
        right,
        right,
        right,
        right.map(lambda w: w[:-1]),
        st.lists(WORDS, min_size=length + 1, max_size=length + 1),
        st.lists(WORDS, max_size=3 * length),
    )


def clear_error(error: SquallError, where: str) -> None:
    """A decode error names the block (and usually the point) and says what is wrong."""
    assert error.field is not None and error.field.startswith(where), error.field
    assert len(error.message.strip()) >= 8, error.message
    event(f"refused: {error.field}")


def in_range(name: str, value: float | None) -> None:
    """A decoded value lies inside its point's documented range (``None``: faulted input)."""
    if value is None:
        return
    p = point(name)
    assert p.minimum <= value <= p.maximum, (name, value)


_STATUS = point("input_status").offset


@budget(400)
@given(words=word_lists(6), status=st.none() | st.integers(0, 15), order=st.sampled_from(WordOrder))
def test_input_registers(words: list[int], status: int | None, order: WordOrder) -> None:
    if status is not None and len(words) > _STATUS:  # a legal status word: the values decode
        words[_STATUS] = status
    try:
        values = decode_inputs(words, order, where="C3.inputs")
    except SquallError as error:
        clear_error(error, "C3.inputs")
        return
    assert isinstance(values, InputValues)
    event("decoded")
    for name in ("temperature_c", "par_umol_m2_s", "flow_cm_s", "level_pct"):
        in_range(name, getattr(values, name))


def _drive_block(
    decode: Callable[..., OutputValues], prefix: str, words: Sequence[int], where: str
) -> None:
    try:
        values = decode(words, where=where)
    except SquallError as error:
        clear_error(error, where)
        return
    event("decoded")
    for name in ("heater_pct", "chiller_pct", "lamp_pct", "pump_pct"):
        in_range(prefix + name, getattr(values, name))


@budget(300)
@given(words=word_lists(4))
def test_holding_registers_outputs(words: list[int]) -> None:
    _drive_block(decode_outputs, "", words, "C3.outputs")


@budget(300)
@given(words=word_lists(4))
def test_holding_registers_safe_outputs(words: list[int]) -> None:
    _drive_block(decode_safe_outputs, "safe_", words, "C3.safe")


BITS = st.one_of(
    st.booleans(),
    st.sampled_from([0, 1, 2, -1, None, "1", 1.0, 0.5, b"\x01", [], True]),
)


@budget(300)
@given(bits=st.lists(BITS, max_size=8))
def test_coils_and_discrete_inputs(bits: list[object]) -> None:
    for decode, where in ((decode_relays, "C3.relays"), (decode_input_bits, "C3.contacts")):
        try:
            decoded = decode(bits, where=where)
        except SquallError as error:
            clear_error(error, where)
            continue
        event("decoded")
        values = [getattr(decoded, f.name) for f in dataclasses.fields(decoded)]
        assert all(isinstance(v, bool) for v in values)
        # pymodbus pads bit reads to whole bytes, so trailing bits beyond the block are ignored
        assert len(bits) >= len(values) and values == [bool(b) for b in bits[: len(values)]]


@budget(400)
@given(
    index=st.integers(0, len(POINTS) - 1),
    words=st.lists(WORDS, max_size=4),
    order=st.sampled_from(WordOrder),
)
def test_any_point_any_words(index: int, words: list[int], order: WordOrder) -> None:
    p = POINTS[index]
    if p.encoding is Encoding.BIT:
        return  # bits go through decode_relays / decode_input_bits
    try:
        value = decode_point(p, words, word_order=order, where=f"C3.{p.name}")
    except SquallError as error:
        clear_error(error, f"C3.{p.name}")
        return
    event("decoded")
    assert p.minimum <= value <= p.maximum


@budget(300)
@given(
    chambers=st.integers(1, 64),
    unit=st.integers(-5, 300),
    first=st.integers(-100, 70000),
    count=st.integers(-5, 3000),
    table=st.sampled_from(Table),
)
def test_register_map_lookups_at_any_address(
    chambers: int, unit: int, first: int, count: int, table: Table
) -> None:
    """A request for any unit and address span finds the blocks it touches or none."""
    registers = RegisterMap.build([f"K{n}" for n in range(chambers)])
    touched = registers.blocks_touched(unit, first, count)
    for block in touched:
        assert block.unit_id == unit
        assert block.base <= first + count - 1 and first <= block.base + BLOCK_SPAN - 1
    found = registers.locate(table, unit, first)
    if found is not None:
        block, p = found
        assert block.unit_id == unit and p.table is table
        span = max(p.word_count, 1)  # a bit point spans one address
        assert block.base + p.offset <= first < block.base + p.offset + span
