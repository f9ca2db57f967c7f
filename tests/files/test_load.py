"""Loader: every broken file gives one located line ``FILE:LINE: field.path: message``."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from controller.errors import SquallError
from controller.files import FileProblems, format_path, load_model, locate, read_text

from ._toy_models import Doc

VALID = """\
format = "toy/1"
title = "A toy"

[site]
name = "Saltmarrow Lagoon (fictional)"
latitude_deg = 46.9

[groups.warm]
role = "treatment"
chambers = ["C1", "C2"]

[groups.ambient]
role = "control"
chambers = ["C3"]

[[phases]]
name = "acclimation"
duration = "3d"
  [phases.programs]
  temperature = [
    { kind = "hold", value = 18.0 },
    { kind = "ramp", to = 22.0, rate_per_h = 0.5 },
  ]

[[phases]]
name = "exposure"
duration = "5d"
  [phases.groups.warm]
  light = [ { kind = "daily-cycle", mean = 300.0 } ]
"""


def _write(tmp_path: Path, text: str | bytes, name: str = "doc.toml") -> Path:
    path = tmp_path / name
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def _error(tmp_path: Path, text: str | bytes) -> SquallError:
    path = _write(tmp_path, text)
    with pytest.raises(SquallError) as info:
        load_model(path, Doc)
    return info.value


def test_valid_document_loads(tmp_path: Path) -> None:
    doc = load_model(_write(tmp_path, VALID), Doc)
    assert doc.phases[1].groups["warm"].light is not None
    assert doc.phases[0].programs is not None
    assert doc.site is not None and doc.site.latitude_deg == 46.9


# (description, text replacement old -> new, expected prefix after "FILE:")
BROKEN: list[tuple[str, str, str, str]] = [
    (
        "unknown top key",
        'title = "A toy"',
        'titel = "A toy"',
        "2: titel: unknown key 'titel'; did you mean 'title'?",
    ),
    (
        "unknown key in table",
        "latitude_deg = 46.9",
        "latitude = 46.9",
        "6: site.latitude: unknown key 'latitude'; did you mean 'latitude_deg'?",
    ),
    (
        "out of range",
        "latitude_deg = 46.9",
        "latitude_deg = 146.9",
        "6: site.latitude_deg: Input should be less than or equal to 90 (got 146.9)",
    ),
    (
        "wrong type",
        "latitude_deg = 46.9",
        'latitude_deg = "north"',
        "6: site.latitude_deg: Input should be a valid number",
    ),
    (
        "literal with suggestion",
        'format = "toy/1"',
        'format = "toy/l"',
        "1: format: Input should be 'toy/1' (got 'toy/l'); did you mean 'toy/1'?",
    ),
    (
        "ramp keys only, chosen by the block's kind",
        "rate_per_h = 0.5",
        "rate_per_h = 0.5, valu = 1",
        "22: phases.0.programs.temperature.1.valu: unknown key 'valu'; "
        "allowed here: from, kind, rate_per_h, to",
    ),
    (
        "enum with suggestion",
        'role = "control"',
        'role = "contrl"',
        "13: groups.ambient.role: Input should be 'treatment' or 'control' (got 'contrl'); "
        "did you mean 'control'?",
    ),
    (
        "missing key points at its table",
        'role = "control"\n',
        "",
        "12: groups.ambient.role: required key is missing here",
    ),
    (
        "misspelt key, no separate missing report",
        'role = "control"',
        'rol = "control"',
        "13: groups.ambient.rol: unknown key 'rol'; did you mean 'role'?",
    ),
    (
        "empty list",
        'chambers = ["C3"]',
        "chambers = []",
        "14: groups.ambient.chambers: List should have at least 1 item",
    ),
    (
        "second array-of-tables element",
        'name = "exposure"',
        'nme = "exposure"',
        "26: phases.1.nme: unknown key 'nme'; did you mean 'name'?",
    ),
    (
        "missing key in array-of-tables element",
        'name = "exposure"\n',
        "",
        "25: phases.1.name: required key is missing here",
    ),
    (
        "item of a multi-line array",
        "rate_per_h = 0.5",
        "rate_per_h = -0.5",
        "22: phases.0.programs.temperature.1.rate_per_h: Input should be greater than 0 (got -0.5)",
    ),
    (
        "unknown key in inline table",
        "rate_per_h = 0.5",
        "rate_per_hr = 0.5",
        "22: phases.0.programs.temperature.1.rate_per_hr: unknown key 'rate_per_hr'; "
        "did you mean 'rate_per_h'?",
    ),
    (
        "unknown block kind",
        'kind = "hold"',
        'kind = "hodl"',
        "21: phases.0.programs.temperature.0.kind: unknown kind 'hodl'; "
        "expected one of hold, ramp, daily-cycle; did you mean 'hold'?",
    ),
    (
        "alias choices",
        "mean = 300.0",
        "maen = 300.0",
        "29: phases.1.groups.warm.light.0.maen: unknown key 'maen'; did you mean 'mean'?",
    ),
    (
        "group override table",
        "[phases.groups.warm]",
        "[phases.groups.warm]\n  lihgt = []",
        "29: phases.1.groups.warm.lihgt: unknown key 'lihgt'; did you mean 'light'?",
    ),
    (
        "plain union alternatives merged",
        'title = "A toy"',
        'title = "A toy"\nbegins = "later"',
        "3: begins: Input should be 'on-launch' (got 'later'); or Input should be a valid integer",
    ),
    (
        "model validator SquallError located by field",
        "[phases.groups.warm]",
        "[phases.groups.hot]",
        "28: phases.1.groups.hot: no group named 'hot'",
    ),
    (
        "TOML: invalid value names the key",
        'duration = "3d"',
        "duration = 3d",
        "18: phases.0.duration: TOML syntax: "
        "Expected newline or end of document after a statement (column 13)",
    ),
    (
        "TOML: duplicate key",
        'title = "A toy"',
        'title = "A toy"\ntitle = "again"',
        "3: title: TOML syntax: Cannot overwrite a value (column 16)",
    ),
    (
        "TOML: unterminated header",
        "[site]",
        "[site",
        "4: TOML syntax: Expected ']' at the end of a table declaration (column 6)",
    ),
    (
        "TOML: broken item inside a multi-line array",
        '{ kind = "hold", value = 18.0 },',
        '{ kind = "hold", value = 18.0 }',
        "22: phases.0.programs.temperature: TOML syntax: Unclosed array (column 5)",
    ),
    (
        "TOML: unterminated string at end",
        "mean = 300.0 } ]\n",
        'mean = 300.0 } ]\nnotes = "open',
        "30: phases.1.groups.warm.notes: TOML syntax: Unterminated string (at the end of the file)",
    ),
]


@pytest.mark.parametrize(
    ("old", "new", "expected"), [b[1:] for b in BROKEN], ids=[b[0] for b in BROKEN]
)
def test_broken_file_is_located(tmp_path: Path, old: str, new: str, expected: str) -> None:
    assert old in VALID
    error = _error(tmp_path, VALID.replace(old, new, 1))
    line = error.one_line()
    assert line.startswith(f"{tmp_path / 'doc.toml'}:{expected}"), line
    assert "\n" not in line


def test_several_problems_report_first_by_line_and_count(tmp_path: Path) -> None:
    text = (
        VALID.replace("latitude_deg = 46.9", "latitude_deg = 99")
        .replace('title = "A toy"', 'titel = "A toy"')
        .replace("rate_per_h = 0.5", "rate_per_h = 0")
    )
    error = _error(tmp_path, text)
    assert isinstance(error, FileProblems)
    # "title" missing is not reported apart from "titel" unknown, which suggests it.
    assert [p.line for p in error.problems] == [2, 6, 22]
    assert error.one_line().endswith("(and 2 more)")
    assert error.line == 2


def test_file_not_found(tmp_path: Path) -> None:
    path = tmp_path / "absent.toml"
    with pytest.raises(SquallError) as info:
        load_model(path, Doc)
    assert info.value.one_line() == f"{path}: file not found"


def test_directory_is_refused(tmp_path: Path) -> None:
    with pytest.raises(SquallError) as info:
        load_model(tmp_path, Doc)
    assert info.value.one_line() == f"{tmp_path}: is a directory, expected a file"


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root reads anything")
def test_unreadable_file(tmp_path: Path) -> None:
    path = _write(tmp_path, VALID)
    path.chmod(0)
    with pytest.raises(SquallError) as info:
        load_model(path, Doc)
    assert info.value.one_line() == f"{path}: permission denied: cannot read this file"


def test_not_utf8_names_line_and_byte(tmp_path: Path) -> None:
    data = VALID.encode().replace(b'"A toy"', b'"A \xe9toy"')
    error = _error(tmp_path, data)
    assert error.one_line() == (
        f"{tmp_path / 'doc.toml'}:2: not UTF-8 text: byte 0xe9 at column 12; save the file as UTF-8"
    )


def test_byte_order_mark_is_accepted(tmp_path: Path) -> None:
    path = _write(tmp_path, b"\xef\xbb\xbf" + VALID.encode())
    assert read_text(path).startswith("format")
    assert load_model(path, Doc).title == "A toy"


def test_control_character_is_a_syntax_error_on_its_line(tmp_path: Path) -> None:
    error = _error(tmp_path, VALID.replace('name = "acclimation"', 'name = "accl\x01"'))
    assert error.one_line().startswith(f"{tmp_path / 'doc.toml'}:17: ")
    assert "TOML syntax" in error.one_line()


def test_locate_adds_file_and_line_to_field_errors() -> None:
    bare = SquallError("ramp too fast", field="phases.0.programs.temperature.1")
    located = locate(bare, text=VALID, file="p.toml")
    assert located.one_line() == "p.toml:22: phases.0.programs.temperature.1: ramp too fast"
    already = SquallError("x", file="other.toml", line=3)
    assert locate(already, text=VALID, file="p.toml") is already


def test_locate_quoted_keys_and_unknown_paths() -> None:
    text = '[groups."warm 1"]\nrole = "treatment"\n'
    error = SquallError("bad", field='groups."warm 1".role')
    assert locate(error, text=text, file="f").one_line() == 'f:2: groups."warm 1".role: bad'
    # A path not written at all falls back to its nearest written parent.
    error = SquallError("bad", field='groups."warm 1".chambers')
    assert locate(error, text=text, file="f").line == 1


def test_format_path_quotes_odd_keys() -> None:
    assert format_path(("phases", 2, "programs")) == "phases.2.programs"
    assert format_path(("groups", "a.b", 'q"')) == 'groups."a.b"."q\\""'
    assert format_path(()) == ""


def test_unhashable_value_where_a_tag_is_expected(tmp_path: Path) -> None:
    error = _error(tmp_path, VALID.replace('format = "toy/1"', "format = []\nextra = 1"))
    assert isinstance(error, FileProblems)
    fields = [p.field for p in error.problems]
    assert fields == ["format", "extra"]
