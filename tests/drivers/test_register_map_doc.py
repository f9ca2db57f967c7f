"""hardware-notes/register-map.md says what the codec does: its tables are checked here."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from controller.drivers import POINTS, RegisterMap, WordOrder, encode_point, point
from simulator.endpoints import Refusal

DOC = Path(__file__).resolve().parents[2] / "hardware-notes" / "register-map.md"


def table_after(marker: str) -> list[list[str]]:
    """Rows (cells stripped) of the markdown table that follows an HTML comment marker."""
    text = DOC.read_text(encoding="utf-8")
    start = text.index(f"<!-- {marker} -->")
    rows = []
    for line in text[start:].splitlines()[1:]:
        if not line.startswith("|"):
            if rows:
                break
            continue
        rows.append([cell.strip() for cell in line.strip("|").split("|")])
    return rows[2:]  # drop header and separator


def test_points_table_matches_the_codec() -> None:
    rows = table_after("points")
    assert len(rows) == len(POINTS)
    for row, p in zip(rows, POINTS, strict=True):
        table, offset, name, kind, scale, unit, span, meaning = row
        words = max(p.word_count, 1)
        expected_offset = f"{p.offset}–{p.offset + 1}" if words == 2 else str(p.offset)
        assert (table, offset, name, kind) == (
            p.table.value,
            expected_offset,
            f"`{p.name}`",
            p.encoding.value,
        )
        assert float(scale) == p.scale
        assert unit == p.unit
        assert span == f"{p.minimum:g}..{p.maximum:g}"
        assert meaning == p.description


def test_encoding_examples_match_the_codec() -> None:
    rows = table_after("encodings")
    assert rows
    for name, value, high_first, low_first in rows:
        p = point(name.strip("`"))
        for order, words in ((WordOrder.HIGH_FIRST, high_first), (WordOrder.LOW_FIRST, low_first)):
            got = encode_point(p, float(value), word_order=order)
            assert " ".join(f"0x{w:04X}" for w in got) == words, (name, value, order)


def test_default_layout_table_matches_the_map() -> None:
    text = DOC.read_text(encoding="utf-8")
    row = re.search(r"^\| block base \|(.*)\|$", text, re.M)
    assert row
    bases = [int(cell) for cell in row.group(1).split("|")]
    rmap = RegisterMap.build([f"C{i}" for i in range(1, 9)])
    assert bases == [b.base for b in rmap.blocks]


@pytest.mark.parametrize("code", ["02", "03", "06"])
def test_documented_exception_codes_exist_in_the_simulator(code: str) -> None:
    assert int(code) in {int(r) for r in Refusal}
    assert f"exception {code}" in DOC.read_text(encoding="utf-8")
