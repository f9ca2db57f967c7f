"""The committed fault table is generated from measured records and has every row."""

from __future__ import annotations

import importlib

import pytest

from controller.rig import FaultKind

from .table import GAPS, HERE, OTHER_FAULTS, README, ROWS, load, render


def test_the_readme_is_exactly_what_the_committed_records_render_to() -> None:
    run, records = load()
    assert README.read_text(encoding="utf-8") == render(run, records), (
        "tests/faults/README.md was edited by hand or is stale: python -m tests.faults.table"
    )


def test_every_simulator_fault_kind_and_every_other_fault_has_exactly_one_row() -> None:
    _, records = load()
    assert [r.fault for r in records] == list(ROWS)
    text = README.read_text(encoding="utf-8")
    missing = [k.value for k in FaultKind if f"| `{k.value}` |" not in text]
    assert missing == [], f"simulator fault kinds without a row: {missing}"


def test_every_committed_record_was_within_its_bounds() -> None:
    _, records = load()
    for record in records:
        record.check(alarm=record.alarm)


def test_every_other_fault_is_measured_by_the_file_named_for_it() -> None:
    for name, file in OTHER_FAULTS:
        assert f'fault="{name}"' in (HERE / file).read_text(encoding="utf-8"), (name, file)


@pytest.mark.parametrize("test_id", [test for test, _ in GAPS])
def test_every_known_gap_is_kept_by_a_strict_xfail(test_id: str) -> None:
    file, name = test_id.split("::")
    module = importlib.import_module(f"{__package__}.{file.removesuffix('.py')}")
    marks = [m for m in getattr(getattr(module, name), "pytestmark", []) if m.name == "xfail"]
    assert len(marks) == 1, test_id
    # strict: closing the gap turns the test red; raises: only the gap's own assertion
    # counts as the expected failure, a broken scenario (any other error) does not
    assert marks[0].kwargs.get("strict") is True, test_id
    assert marks[0].kwargs.get("raises") is AssertionError, test_id
