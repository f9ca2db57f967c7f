"""Register-map codec: scaling, sign, word order, block records, and the map layout."""

from __future__ import annotations

import math
import struct

import pytest
from hypothesis import given
from hypothesis import strategies as st
from pymodbus.client import ModbusTcpClient

from controller.drivers import (
    BLOCK_SPAN,
    CYCLIC_INPUT_WORDS,
    MAX_RUN_BLOCKS,
    POINTS,
    ChamberBlockConfig,
    Encoding,
    InputBits,
    InputStatus,
    InputValues,
    OutputValues,
    Point,
    RegisterMap,
    RegisterMapConfig,
    RelayBits,
    Table,
    WordOrder,
    decode_contact_status,
    decode_float32,
    decode_input_bits,
    decode_inputs,
    decode_outputs,
    decode_point,
    decode_relays,
    decode_safe_outputs,
    encode_contact_status,
    encode_float32,
    encode_input_bits,
    encode_inputs,
    encode_outputs,
    encode_point,
    encode_relays,
    encode_safe_outputs,
    next_watchdog_count,
    point,
)
from controller.errors import SquallError

HIGH, LOW = WordOrder.HIGH_FIRST, WordOrder.LOW_FIRST

# --------------------------------------------------------------------------- scalars

# (point, engineering value, expected words)
ENCODE_TABLE = [
    ("heater_pct", 0.0, (0,)),
    ("heater_pct", 100.0, (10000,)),
    ("heater_pct", 37.25, (3725,)),
    ("heater_pct", 0.29, (29,)),  # 0.29 / 0.01 is 28.999999999999996 in binary floats
    ("par_umol_m2_s", 1234.5, (12345,)),
    ("flow_cm_s", 12.34, (1234,)),
    ("level_pct", 100.0, (1000,)),
    ("watchdog_timeout_s", 2.5, (25,)),
    ("watchdog_counter", 65535, (0xFFFF,)),
]


@pytest.mark.parametrize(("name", "value", "words"), ENCODE_TABLE)
def test_encode_point_table(name: str, value: float, words: tuple[int, ...]) -> None:
    assert encode_point(point(name), value) == words
    assert decode_point(point(name), words) == pytest.approx(value, abs=1e-9)


SIGNED = Point(
    name="offset_c",
    table=Table.INPUT_REGISTER,
    offset=0,
    encoding=Encoding.INT16,
    unit="°C",
    minimum=-100.0,
    maximum=100.0,
    scale=0.01,
)


@pytest.mark.parametrize(
    ("value", "word"),
    [(0.0, 0x0000), (-0.01, 0xFFFF), (-1.5, 0xFF6A), (1.5, 0x0096), (-100.0, 0xD8F0)],
)
def test_int16_is_twos_complement(value: float, word: int) -> None:
    assert encode_point(SIGNED, value) == (word,)
    assert decode_point(SIGNED, [word]) == pytest.approx(value, abs=1e-12)


def test_bias_is_the_value_at_raw_zero() -> None:
    kelvin = Point(
        name="t",
        table=Table.INPUT_REGISTER,
        offset=0,
        encoding=Encoding.UINT16,
        unit="°C",
        minimum=-273.15,
        maximum=100.0,
        scale=0.01,
        bias=-273.15,
    )
    assert encode_point(kelvin, 20.0) == (29315,)
    assert decode_point(kelvin, [29315]) == pytest.approx(20.0, abs=1e-9)


@pytest.mark.parametrize("order", [HIGH, LOW])
@pytest.mark.parametrize("value", [0.0, 18.5, -3.25, 1.0e-3, 123.456])
def test_float32_matches_pymodbus(order: WordOrder, value: float) -> None:
    # Reference library: pymodbus' own client converter (big = high word first).
    reference = ModbusTcpClient.convert_to_registers(
        value,
        ModbusTcpClient.DATATYPE.FLOAT32,
        word_order="big" if order is HIGH else "little",
    )
    assert list(encode_float32(value, order)) == reference
    assert decode_float32(reference, order) == struct.unpack(">f", struct.pack(">f", value))[0]


def test_float32_word_orders_are_swapped() -> None:
    # 18.5 = 0x41940000 as an IEEE 754 single (from memory; checked by struct above)
    assert encode_float32(18.5, HIGH) == (0x4194, 0x0000)
    assert encode_float32(18.5, LOW) == (0x0000, 0x4194)


@pytest.mark.parametrize(
    ("name", "value", "message"),
    [
        ("heater_pct", 100.01, "outside 0..100"),
        ("heater_pct", -0.5, "outside 0..100"),
        ("heater_pct", math.nan, "not a finite number"),
        ("heater_pct", math.inf, "not a finite number"),
        ("temperature_c", 151.0, "outside -50..150"),
        ("watchdog_counter", 65536, "outside 0..65535"),
    ],
)
def test_encode_refuses_out_of_range(name: str, value: float, message: str) -> None:
    with pytest.raises(SquallError, match=message) as info:
        encode_point(point(name), value, where=f"c1.{name}")
    assert info.value.field == f"c1.{name}"


def test_encode_refuses_non_numbers() -> None:
    with pytest.raises(SquallError, match="not a finite number"):
        encode_point(point("heater_pct"), True)
    with pytest.raises(SquallError, match="not a finite number"):
        encode_point(point("heater_pct"), "12")  # type: ignore[arg-type]
    with pytest.raises(SquallError, match="bit helpers"):
        encode_point(point("heater_on"), 1)


@pytest.mark.parametrize(
    ("name", "words", "message"),
    [
        ("heater_pct", [10001], "outside 0..100"),
        ("heater_pct", [70000], "expected 0..65535"),
        ("heater_pct", [-1], "expected 0..65535"),
        ("heater_pct", [1, 2], "expected 1 register"),
        ("heater_pct", [], "expected 1 register"),
        ("temperature_c", [0x4194], "expected 2 register"),
        ("temperature_c", [0x7FC0, 0x0000], "non-finite"),
        ("temperature_c", [0x7F80, 0x0000], "non-finite"),
        ("temperature_c", [0x4348, 0x0000], "outside -50..150"),  # 200.0
    ],
)
def test_decode_rejects_malformed_replies(name: str, words: list[int], message: str) -> None:
    with pytest.raises(SquallError, match=message) as info:
        decode_point(point(name), words)
    assert info.value.field == name


@pytest.mark.parametrize(
    "p", [p for p in POINTS if p.encoding is not Encoding.BIT], ids=lambda p: p.name
)
@given(fraction=st.floats(min_value=0.0, max_value=1.0))
def test_round_trip_on_the_wire_grid(p: Point, fraction: float) -> None:
    """encode -> decode is the identity for every value the wire can carry."""
    raw_low = math.ceil((p.minimum - p.bias) / p.scale)
    raw_high = math.floor((p.maximum - p.bias) / p.scale)
    if p.encoding is Encoding.FLOAT32:
        value = struct.unpack(
            ">f", struct.pack(">f", p.minimum + fraction * (p.maximum - p.minimum))
        )[0]
        value = min(max(value, p.minimum), p.maximum)
    else:
        raw = round(raw_low + fraction * (raw_high - raw_low))
        value = round(raw * p.scale + p.bias, 9)  # the grid as the codec documents it
    for order in (HIGH, LOW):
        words = encode_point(p, value, word_order=order)
        assert len(words) == p.word_count
        assert decode_point(p, words, word_order=order) == value


@given(word=st.integers(min_value=0, max_value=10000))
def test_decode_then_encode_gives_the_same_word(word: int) -> None:
    p = point("lamp_pct")
    assert encode_point(p, decode_point(p, [word])) == (word,)


@given(
    value=st.floats(width=32, allow_nan=False, allow_infinity=False),
    order=st.sampled_from(WordOrder),
)
def test_float32_round_trip_any_single(value: float, order: WordOrder) -> None:
    assert decode_float32(encode_float32(value, order), order) == value


@given(words=st.lists(st.integers(min_value=-5, max_value=70000), min_size=0, max_size=8))
def test_garbage_words_only_raise_squall_error(words: list[int]) -> None:
    for p in POINTS:
        if p.encoding is Encoding.BIT:
            continue
        try:
            value = decode_point(p, words)
        except SquallError:
            continue
        assert p.minimum <= value <= p.maximum


def test_point_definitions_are_checked() -> None:
    with pytest.raises(ValueError, match="offset"):
        Point(
            name="x",
            table=Table.INPUT_REGISTER,
            offset=16,
            encoding=Encoding.UINT16,
            unit="",
            minimum=0,
            maximum=1,
        )
    with pytest.raises(ValueError, match="bits live"):
        Point(
            name="x",
            table=Table.COIL,
            offset=0,
            encoding=Encoding.UINT16,
            unit="",
            minimum=0,
            maximum=1,
        )
    with pytest.raises(ValueError, match="past the end"):
        Point(
            name="x",
            table=Table.INPUT_REGISTER,
            offset=15,
            encoding=Encoding.FLOAT32,
            unit="",
            minimum=0,
            maximum=1,
        )
    with pytest.raises(SquallError, match="no register-map point 'heater'"):
        point("heater")


def test_points_do_not_overlap_within_a_table() -> None:
    for table in Table:
        used: set[int] = set()
        for p in POINTS:
            if p.table is table:
                span = set(range(p.offset, p.offset + max(p.word_count, 1)))
                assert not used & span, p.name
                used |= span


def test_function_codes_name_their_table() -> None:
    assert Table.for_function_code(4) is Table.INPUT_REGISTER
    assert Table.for_function_code(6) is Table.HOLDING_REGISTER
    assert Table.for_function_code(15) is Table.COIL
    assert Table.for_function_code(2) is Table.DISCRETE_INPUT
    with pytest.raises(SquallError, match="function code 8"):
        Table.for_function_code(8)


# --------------------------------------------------------------------------- block records


def test_inputs_block_layout() -> None:
    words = encode_inputs(
        InputValues(temperature_c=18.5, par_umol_m2_s=250.0, flow_cm_s=5.0, level_pct=99.5)
    )
    assert words == (0x4194, 0x0000, 2500, 500, 995, 0)


def test_faulted_inputs_set_status_and_decode_to_none() -> None:
    values = InputValues(temperature_c=None, par_umol_m2_s=10.0, flow_cm_s=None, level_pct=100.0)
    words = encode_inputs(values, LOW)
    assert words[5] == InputStatus.TEMPERATURE_FAULT | InputStatus.FLOW_FAULT
    assert words[0:2] == (0x0000, 0x7FC0)  # quiet NaN, low word first
    assert words[3] == 0xFFFF
    assert decode_inputs(words, LOW) == values


def test_decode_inputs_rejects_reserved_status_and_wrong_length() -> None:
    good = list(
        encode_inputs(InputValues(temperature_c=1, par_umol_m2_s=0, flow_cm_s=0, level_pct=0))
    )
    with pytest.raises(SquallError, match="reserved status bits") as info:
        decode_inputs([*good[:5], 0x0010], where="c3.inputs")
    assert info.value.field == "c3.inputs.input_status"
    with pytest.raises(SquallError, match="expected 6 input registers"):
        decode_inputs(good[:5])
    nan_without_flag = [0x7FC0, 0, *good[2:]]
    with pytest.raises(SquallError, match="non-finite") as info:
        decode_inputs(nan_without_flag)
    assert info.value.field == "inputs.temperature_c"


@given(
    t=st.integers(-50_000, 150_000).map(lambda i: i / 1000),
    par=st.one_of(st.none(), st.integers(0, 60000).map(lambda i: i / 10)),
    flow=st.one_of(st.none(), st.integers(0, 60000).map(lambda i: i / 100)),
    level=st.one_of(st.none(), st.integers(0, 1500).map(lambda i: i / 10)),
    order=st.sampled_from(WordOrder),
)
def test_inputs_round_trip(
    t: float, par: float | None, flow: float | None, level: float | None, order: WordOrder
) -> None:
    t32 = struct.unpack(">f", struct.pack(">f", t))[0]
    values = InputValues(temperature_c=t32, par_umol_m2_s=par, flow_cm_s=flow, level_pct=level)
    decoded = decode_inputs(encode_inputs(values, order), order)
    assert decoded.temperature_c == t32
    for name in ("par_umol_m2_s", "flow_cm_s", "level_pct"):
        expected = getattr(values, name)
        got = getattr(decoded, name)
        assert (got is None) if expected is None else got == pytest.approx(expected, abs=1e-9)


drive = st.integers(0, 10000).map(lambda i: i / 100)


@given(h=drive, c=drive, lamp=drive, pump=drive)
def test_outputs_and_safe_outputs_round_trip(h: float, c: float, lamp: float, pump: float) -> None:
    values = OutputValues(heater_pct=h, chiller_pct=c, lamp_pct=lamp, pump_pct=pump)
    assert decode_outputs(encode_outputs(values)) == values
    assert decode_safe_outputs(encode_safe_outputs(values)) == values


def test_outputs_errors_name_the_drive() -> None:
    with pytest.raises(SquallError) as info:
        encode_outputs(
            OutputValues(heater_pct=0, chiller_pct=0, lamp_pct=120, pump_pct=0), where="c2.outputs"
        )
    assert info.value.field == "c2.outputs.lamp_pct"
    with pytest.raises(SquallError) as info:
        decode_safe_outputs([0, 0, 0, 10001])
    assert info.value.field == "safe.safe_pump_pct"
    with pytest.raises(SquallError, match="expected 4 holding registers"):
        decode_outputs([0, 0, 0])


def test_bits_round_trip_and_padding() -> None:
    relays = RelayBits(heater_on=True, chiller_on=False, lamp_on=True, pump_on=True)
    assert encode_relays(relays) == (True, False, True, True)
    # a coil read returns whole bytes: trailing padding bits are ignored
    assert decode_relays([True, False, True, True, False, False, False, False]) == relays
    contacts = InputBits(level_ok=True, estop_ok=False, watchdog_tripped=True)
    assert decode_input_bits(list(encode_input_bits(contacts))) == contacts
    with pytest.raises(SquallError, match="expected 3 bits"):
        decode_input_bits([True])
    with pytest.raises(SquallError, match="malformed bit") as info:
        decode_relays([1, 0, 2, 0])
    assert info.value.field == "relays.lamp_on"


def test_watchdog_counter_always_changes_and_wraps() -> None:
    assert next_watchdog_count(0) == 1
    assert next_watchdog_count(65535) == 0
    with pytest.raises(SquallError):
        next_watchdog_count(65536)


# --------------------------------------------------------------------------- the map


def test_default_map_strides_blocks_by_32() -> None:
    rmap = RegisterMap.build(["c1", "c2", "c3"])
    assert [(b.unit_id, b.base) for b in rmap.blocks] == [(1, 0), (1, 32), (1, 64)]
    assert rmap.block("c2").address("heater_pct") == 32
    assert rmap.block("c3").address("watchdog_counter") == 69
    assert rmap.block("c3").address("estop_ok") == 65
    assert rmap.word_order is HIGH
    assert rmap.unit_ids == (1,)


def test_overrides_move_blocks_and_units() -> None:
    config = RegisterMapConfig(
        unit_id=3,
        first_block_address=256,
        block_stride=64,
        word_order=LOW,
        chambers={"b": ChamberBlockConfig(unit_id=9, block_address=0)},
    )
    rmap = RegisterMap.build(["a", "b", "c"], config)
    assert [(b.chamber_id, b.unit_id, b.base) for b in rmap.blocks] == [
        ("a", 3, 256),
        ("b", 9, 0),
        ("c", 3, 384),
    ]
    assert rmap.unit_ids == (3, 9)
    assert rmap.word_order is LOW


def test_map_errors_name_the_chamber() -> None:
    overlap = RegisterMapConfig(chambers={"b": ChamberBlockConfig(block_address=0)})
    with pytest.raises(SquallError, match="overlaps chamber a") as info:
        RegisterMap.build(["a", "b"], overlap)
    assert info.value.field == "register_map.chambers.b"
    unknown = RegisterMapConfig(chambers={"zz": ChamberBlockConfig(unit_id=2)})
    with pytest.raises(SquallError, match="unknown chamber") as info:
        RegisterMap.build(["a"], unknown)
    assert info.value.field == "register_map.chambers.zz"
    with pytest.raises(SquallError, match="at least one chamber"):
        RegisterMap.build([])
    with pytest.raises(SquallError, match="no register block"):
        RegisterMap.build(["a"]).block("b")


def test_config_validation_rejects_misaligned_blocks() -> None:
    with pytest.raises(ValueError, match="multiple of 16"):
        RegisterMapConfig(block_stride=40)
    with pytest.raises(ValueError, match="multiple of 16"):
        ChamberBlockConfig(block_address=100)
    with pytest.raises(ValueError, match="greater than or equal to 16"):
        RegisterMapConfig(block_stride=0)
    with pytest.raises(ValueError, match="Extra inputs"):
        RegisterMapConfig.model_validate({"unitid": 2})


def test_locate_and_blocks_touched() -> None:
    rmap = RegisterMap.build(["c1", "c2"])
    block, p = rmap.locate(Table.INPUT_REGISTER, 1, 33) or (None, None)
    assert block is not None and block.chamber_id == "c2" and p is not None
    assert p.name == "temperature_c"  # second word of the float
    assert rmap.locate(Table.INPUT_REGISTER, 1, 40) is None  # gap inside the block
    assert rmap.locate(Table.INPUT_REGISTER, 1, 64) is None  # past the last block
    assert rmap.locate(Table.INPUT_REGISTER, 2, 0) is None  # unknown unit
    located = rmap.locate(Table.COIL, 1, 35)
    assert located is not None and located[1].name == "pump_on"
    assert [b.chamber_id for b in rmap.blocks_touched(1, 0, 6)] == ["c1"]
    assert [b.chamber_id for b in rmap.blocks_touched(1, 10, 30)] == ["c1", "c2"]
    assert rmap.blocks_touched(1, 16, 16) == ()
    assert BLOCK_SPAN == 16


@pytest.mark.parametrize("level_ok", [False, True])
@pytest.mark.parametrize("estop_ok", [False, True])
@pytest.mark.parametrize("tripped", [False, True])
def test_contact_status_mirrors_the_discrete_inputs(
    level_ok: bool, estop_ok: bool, tripped: bool
) -> None:
    contacts = InputBits(level_ok=level_ok, estop_ok=estop_ok, watchdog_tripped=tripped)
    word = encode_contact_status(contacts)
    bits = encode_input_bits(contacts)
    assert word == sum(1 << i for i, bit in enumerate(bits) if bit)  # bit i = discrete input i
    assert decode_contact_status(word) == contacts


def test_contact_status_rejects_reserved_bits() -> None:
    with pytest.raises(SquallError, match="reserved contact bits") as info:
        decode_contact_status(0x0009, where="c1.contacts")
    assert info.value.field == "c1.contacts"
    with pytest.raises(SquallError):
        decode_contact_status(0x10000)


def test_one_cyclic_read_of_a_full_run_fits_one_request() -> None:
    # Modbus application protocol v1.1b3, 6.4 (125 registers a read) and 6.12 (123 a write)
    assert CYCLIC_INPUT_WORDS == 1 + max(
        p.offset for p in POINTS if p.table is Table.INPUT_REGISTER
    )
    assert (MAX_RUN_BLOCKS - 1) * BLOCK_SPAN + CYCLIC_INPUT_WORDS <= 125
    assert MAX_RUN_BLOCKS * BLOCK_SPAN + CYCLIC_INPUT_WORDS > 125  # one more would not
    assert (MAX_RUN_BLOCKS - 1) * BLOCK_SPAN + 6 <= 123


def test_runs_group_neighbours_on_one_unit() -> None:
    ids = [f"c{i}" for i in range(1, 12)]
    packed = RegisterMap.build(
        ids, RegisterMapConfig(block_stride=16, chambers={"c11": ChamberBlockConfig(unit_id=2)})
    )
    runs = [[b.chamber_id for b in run] for run in packed.runs()]
    assert runs == [ids[:8], ["c9", "c10"], ["c11"]]  # at most eight; c11 is on unit 2
    assert [len(r) for r in packed.runs(3)] == [3, 3, 3, 1, 1]
    spread = RegisterMap.build(["a", "b"])  # the default stride leaves a gap: no run
    assert [[b.chamber_id for b in run] for run in spread.runs()] == [["a"], ["b"]]
    with pytest.raises(ValueError, match="max_blocks"):
        spread.runs(0)
