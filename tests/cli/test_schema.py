"""``squall schema``: the JSON Schema editors use matches the models."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from controller.cli import main
from controller.protocol import Protocol
from controller.rig import Rig


@pytest.mark.parametrize(("name", "model"), [("protocol", Protocol), ("rig", Rig)])
def test_schema_prints_model_schema(
    name: str, model: type[Protocol] | type[Rig], capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["schema", name]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed["$schema"].endswith("/2020-12/schema")
    assert printed["properties"] == model.model_json_schema()["properties"]
    assert printed["additionalProperties"] is False  # unknown keys are refused in editors too


def test_schema_writes_a_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "protocol.schema.json"
    assert main(["schema", "protocol", "-o", str(out)]) == 0
    assert "format" in json.loads(out.read_text(encoding="utf-8"))["required"]
    assert str(out) in capsys.readouterr().out


def test_schema_of_unknown_format_is_one_line_error(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["schema", "recipe"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("squall: error: squall schema: argument format: invalid choice")
    assert err.count("\n") == 1


def test_schema_to_unwritable_place_is_located(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / "missing-dir" / "s.json"
    assert main(["schema", "rig", "-o", str(target)]) == 2
    assert capsys.readouterr().err.startswith(f"squall: error: {target}: cannot write the schema")
